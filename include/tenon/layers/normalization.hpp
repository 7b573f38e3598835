// tenon: layer normalization and batch normalization.
//
// Layer normalization (Ba, Kiros & Hinton 2016, "Layer Normalization",
// eq. 4) normalizes each row (sample) over its features:
//   y = (x - mean_row) / sqrt(var_row + epsilon) * gain + bias.
// Batch normalization (Ioffe & Szegedy 2015, "Batch Normalization:
// Accelerating Deep Network Training by Reducing Internal Covariate Shift",
// Algorithm 1) normalizes each column (feature) over the batch in training
// mode and keeps running estimates of the mean and variance; inference mode
// uses those estimates instead of the batch's (Algorithm 2, steps 8-11). The
// running estimates are exponential moving averages,
//   running = (1 - momentum) running + momentum * batch statistic,
// (common practice; the paper averages over many mini-batches), with the
// unbiased variance m / (m - 1) * var_batch (Algorithm 2, step 10). Both use
// the biased batch variance to normalize, as Algorithm 1 does. epsilon = 1e-5
// and momentum = 0.1 are common practice.
//
// Both are composed of tape operations, so their gradients follow from the
// tape's; the running estimates are non-trainable state buffers.
#pragma once

#include <cmath>
#include <string>
#include <vector>

#include "tenon/layers/layer.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {
inline void check_epsilon(const char* what, double epsilon) {
    if (!(epsilon > 0.0 && std::isfinite(epsilon))) {
        raise(codes::model_layer_option, std::string(what) + ": epsilon must be positive and finite, got " + std::to_string(epsilon));
    }
}
inline void check_width(const char* what, std::size_t width) {
    if (width == 0) raise(codes::model_layer_option, std::string(what) + ": the width must be positive, got 0");
}
}  // namespace detail

template <class T>
class layer_norm : public layer<T> {
public:
    explicit layer_norm(std::size_t width, double epsilon = 1e-5)
        : width_(width), epsilon_(epsilon), gain_("gain", shape2{1, width}), bias_("bias", shape2{1, width}) {
        detail::check_width("layer normalization", width);
        detail::check_epsilon("layer normalization", epsilon);
        gain_.value().fill(T(1));
        renamed();
    }

    var<T> forward(tape<T>& t, var<T> x, run_mode) override {
        this->require_width(x.shape().cols, width_);
        const var<T> centred = x - mean(x, 1);
        const var<T> variance = mean(square(centred), 1);
        const var<T> inv_std = pow(variance + static_cast<T>(epsilon_), T(-0.5));
        return centred * inv_std * t.watch(gain_) + t.watch(bias_);
    }

    const char* kind() const noexcept override { return "layer_norm"; }

    layer_record describe() const override {
        layer_record r = this->base_record();
        r.set_number("width", static_cast<double>(width_));
        r.set_number("epsilon", epsilon_);
        return r;
    }

    std::size_t output_width(std::size_t input_width) const override {
        this->require_width(input_width, width_);
        return width_;
    }

    void collect_parameters(std::vector<parameter<T>*>& out) override {
        out.push_back(&gain_);
        out.push_back(&bias_);
    }

    parameter<T>& gain() noexcept { return gain_; }
    parameter<T>& bias() noexcept { return bias_; }

protected:
    void renamed() override {
        const std::string q = this->qualified_name();
        gain_.set_name(q.empty() ? "gain" : q + ".gain");
        bias_.set_name(q.empty() ? "bias" : q + ".bias");
    }

private:
    std::size_t width_;
    double epsilon_;
    parameter<T> gain_;
    parameter<T> bias_;
};

template <class T>
class batch_norm : public layer<T> {
public:
    explicit batch_norm(std::size_t width, double momentum = 0.1, double epsilon = 1e-5)
        : width_(width), momentum_(momentum), epsilon_(epsilon), gain_("gain", shape2{1, width}), bias_("bias", shape2{1, width}),
          running_mean_("running_mean", shape2{1, width}), running_variance_("running_variance", shape2{1, width}) {
        detail::check_width("batch normalization", width);
        detail::check_epsilon("batch normalization", epsilon);
        if (!(momentum > 0.0 && momentum <= 1.0)) {
            raise(codes::model_layer_option, "batch normalization: momentum must be in (0, 1], got " + std::to_string(momentum));
        }
        gain_.value().fill(T(1));
        running_variance_.value().fill(T(1));
        running_mean_.set_trainable(false);
        running_variance_.set_trainable(false);
        renamed();
    }

    var<T> forward(tape<T>& t, var<T> x, run_mode mode) override {
        const shape2 s = x.shape();
        this->require_width(s.cols, width_);
        const T eps = static_cast<T>(epsilon_);
        if (mode == run_mode::inference) {
            const var<T> inv_std = pow(t.watch(running_variance_) + eps, T(-0.5));
            return (x - t.watch(running_mean_)) * inv_std * t.watch(gain_) + t.watch(bias_);
        }
        if (s.rows < 2) {
            raise(codes::model_batch_too_small, "batch normalization '" + this->qualified_name() +
                                                    "' in training mode: a batch of " + std::to_string(s.rows) +
                                                    " row(s) has no variance; use at least 2 rows or inference mode");
        }
        const var<T> batch_mean = mean(x, 0);
        const var<T> centred = x - batch_mean;
        const var<T> batch_variance = mean(square(centred), 0);
        const var<T> y = centred * pow(batch_variance + eps, T(-0.5)) * t.watch(gain_) + t.watch(bias_);

        const T m = static_cast<T>(momentum_);
        const T unbias = static_cast<T>(s.rows) / static_cast<T>(s.rows - 1);
        const T* bm = batch_mean.value().data();
        const T* bv = batch_variance.value().data();
        T* rm = running_mean_.value().data();
        T* rv = running_variance_.value().data();
        for (std::size_t j = 0; j < width_; ++j) {
            rm[j] = (T(1) - m) * rm[j] + m * bm[j];
            rv[j] = (T(1) - m) * rv[j] + m * unbias * bv[j];
        }
        return y;
    }

    const char* kind() const noexcept override { return "batch_norm"; }

    layer_record describe() const override {
        layer_record r = this->base_record();
        r.set_number("width", static_cast<double>(width_));
        r.set_number("momentum", momentum_);
        r.set_number("epsilon", epsilon_);
        return r;
    }

    std::size_t output_width(std::size_t input_width) const override {
        this->require_width(input_width, width_);
        return width_;
    }

    void collect_parameters(std::vector<parameter<T>*>& out) override {
        out.push_back(&gain_);
        out.push_back(&bias_);
    }
    void collect_state(std::vector<parameter<T>*>& out) override {
        out.push_back(&running_mean_);
        out.push_back(&running_variance_);
    }

    parameter<T>& gain() noexcept { return gain_; }
    parameter<T>& bias() noexcept { return bias_; }
    parameter<T>& running_mean() noexcept { return running_mean_; }
    parameter<T>& running_variance() noexcept { return running_variance_; }

protected:
    void renamed() override {
        const std::string q = this->qualified_name();
        const std::string p = q.empty() ? std::string() : q + ".";
        gain_.set_name(p + "gain");
        bias_.set_name(p + "bias");
        running_mean_.set_name(p + "running_mean");
        running_variance_.set_name(p + "running_variance");
    }

private:
    std::size_t width_;
    double momentum_;
    double epsilon_;
    parameter<T> gain_;
    parameter<T> bias_;
    parameter<T> running_mean_;
    parameter<T> running_variance_;
};

TENON_NAMESPACE_END
