// A plain loop evaluating a small multilayer perceptron (bench/hand_loop.cpp,
// compiled with -O3 -march=native): the reference the predictor's one-row
// latency is compared with in bench_deploy.cpp. No tenon header is included
// there, so the flags cannot change how tenon's own inline code is built.
#pragma once

#include <cstddef>
#include <vector>

namespace hand {

// y = x W + b (W inputs x outputs, row-major), then max(y, 0) if relu.
struct layer {
    const float* weights = nullptr;
    const float* bias = nullptr;  // or null
    std::size_t inputs = 0, outputs = 0;
    bool relu = false;
};

// layers applied in turn; plus x V (V inputs x outputs) when `bypass` is set.
struct network {
    std::vector<layer> layers;
    const float* bypass = nullptr;
};

// The target's unit change: center + (y - low) / (high - low) * spread.
struct units {
    double center = 0, spread = 1, low = 0, high = 1;
};

// One row through every network; mean of their outputs (one output each)
// in the target's units, and their sample standard deviation in *spread.
// 8-32-32-1 networks only (fixed at compile time), at most 64 of them;
// `scratch` holds 128 floats.
float one_row(const network* nets, std::size_t count, const units& u, const float* x, float* scratch, float* spread);

}  // namespace hand
