// See hand_loop.hpp. Compiled with -O3 -march=native (bench/CMakeLists.txt):
// the compiler may use every instruction of the build machine, fused
// multiply-adds included.
#include "hand_loop.hpp"

#include <cmath>

namespace hand {

float predict(const network* nets, std::size_t count, const units& u, const float* x, float* scratch, float* spread) {
    float member[64];
    for (std::size_t m = 0; m < count; ++m) {
        const network& n = nets[m];
        const float* in = x;
        float* out = scratch;
        float* other = scratch + 64;
        for (const layer& l : n.layers) {
            for (std::size_t j = 0; j < l.outputs; ++j) out[j] = 0.0f;
            for (std::size_t k = 0; k < l.inputs; ++k)
                for (std::size_t j = 0; j < l.outputs; ++j) out[j] += in[k] * l.weights[k * l.outputs + j];
            if (l.bias)
                for (std::size_t j = 0; j < l.outputs; ++j) out[j] += l.bias[j];
            if (l.relu)
                for (std::size_t j = 0; j < l.outputs; ++j) out[j] = out[j] > 0.0f ? out[j] : 0.0f;
            in = out;
            float* t = out;
            out = other;
            other = t;
        }
        float y = in[0];
        if (n.bypass) {
            const std::size_t inputs = n.layers.front().inputs;
            for (std::size_t k = 0; k < inputs; ++k) y += x[k] * n.bypass[k];
        }
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
