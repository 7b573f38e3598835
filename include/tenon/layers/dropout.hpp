// tenon: dropout (Srivastava, Hinton, Krizhevsky, Sutskever & Salakhutdinov
// 2014, "Dropout: a simple way to prevent neural networks from overfitting",
// JMLR 15, section 4).
//
// In training mode each value is kept with probability 1 - rate and scaled by
// 1 / (1 - rate) ("inverted" dropout, common practice), so inference passes
// values through unchanged. The mask comes from the layer's own seeded
// engine, one draw per value in row-major order; its buffers are reused, so
// steady-state steps allocate nothing. More: docs/design/layers.md.
#pragma once

#include <cstdint>
#include <string>
#include <vector>

#include "tenon/core/random.hpp"
#include "tenon/layers/layer.hpp"

TENON_NAMESPACE_BEGIN

template <class T>
class dropout : public layer<T> {
public:
    /// `rate` is the probability of dropping a value, in [0, 1).
    explicit dropout(double rate, std::uint64_t seed = 0) : rate_(rate), seed_(seed), engine_(seed) {
        if (!(rate >= 0.0 && rate < 1.0)) {
            raise(codes::model_layer_option, "dropout layer: the rate must be in [0, 1), got " + std::to_string(rate));
        }
    }

    var<T> forward(tape<T>& t, var<T> input, run_mode mode) override {
        if (mode == run_mode::inference || rate_ == 0.0) return input;
        ensure_shape(mask_, input.shape());
        const T keep_scale = static_cast<T>(1.0 / (1.0 - rate_));
        T* m = mask_.data();
        for (std::size_t k = 0; k < mask_.size(); ++k) m[k] = engine_.uniform01<double>() < rate_ ? T(0) : keep_scale;
        return input * t.input(mask_);
    }

    const char* kind() const noexcept override { return "dropout"; }

    layer_record describe() const override {
        layer_record r = this->base_record();
        r.set_number("rate", rate_);
        r.set_number("seed", static_cast<double>(seed_ & 0x1FFFFFFFFFFFFFull));
        return r;
    }

    std::size_t output_width(std::size_t input_width) const override { return input_width; }

    double rate() const noexcept { return rate_; }
    /// The mask of the last training forward (0 or 1 / (1 - rate) per value).
    const matrix<T>& last_mask() const noexcept { return mask_; }
    /// The engine, so that a host can save and restore its state.
    random_engine& engine() noexcept { return engine_; }

private:
    double rate_;
    std::uint64_t seed_;
    random_engine engine_;
    matrix<T> mask_;
};

TENON_NAMESPACE_END
