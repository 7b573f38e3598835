// See hand_loop.hpp. Compiled with -O3 -march=native (bench/CMakeLists.txt):
// the compiler may use every instruction of the build machine, fused
// multiply-adds included. The 8-32-32-1 shape is fixed at compile time, so
// the compiler can keep each layer's values in registers; one_row()
// refuses another shape.
#include "hand_loop.hpp"

#include <cmath>
#include <stdexcept>

namespace hand {
namespace {

template <std::size_t In, std::size_t Out>
void dense(const float* x, const layer& l, float* y) {
    float acc[Out] = {};
    for (std::size_t k = 0; k < In; ++k)
        for (std::size_t j = 0; j < Out; ++j) acc[j] += x[k] * l.weights[k * Out + j];
    for (std::size_t j = 0; j < Out; ++j) {
        const float v = l.bias ? acc[j] + l.bias[j] : acc[j];
        y[j] = l.relu && !(v > 0.0f) ? 0.0f : v;
    }
}

}  // namespace

float one_row(const network* nets, std::size_t count, const units& u, const float* x, float* scratch, float* spread) {
    float member[64];
    for (std::size_t m = 0; m < count; ++m) {
        const network& n = nets[m];
        if (n.layers.size() != 3 || n.layers[0].inputs != 8 || n.layers[0].outputs != 32 || n.layers[1].outputs != 32 || n.layers[2].outputs != 1)
            throw std::runtime_error("hand loop: the network is not 8-32-32-1");
        float* h1 = scratch;
        float* h2 = scratch + 32;
        dense<8, 32>(x, n.layers[0], h1);
        dense<32, 32>(h1, n.layers[1], h2);
        float y = 0.0f;
        dense<32, 1>(h2, n.layers[2], &y);
        if (n.bypass)
            for (std::size_t k = 0; k < 8; ++k) y += x[k] * n.bypass[k];
        member[m] = y;
    }
    float sum = 0.0f;
    for (std::size_t m = 0; m < count; ++m) sum += member[m];
    const auto to_units = [&](float v) { return static_cast<float>(u.center + (static_cast<double>(v) - u.low) / (u.high - u.low) * u.spread); };
    const float mean = to_units(sum / static_cast<float>(count));
    float squares = 0.0f;
    for (std::size_t m = 0; m < count; ++m) {
        const float d = to_units(member[m]) - mean;
        squares += d * d;
    }
    *spread = count > 1 ? std::sqrt(squares / static_cast<float>(count - 1)) : 0.0f;
    return mean;
}

}  // namespace hand
