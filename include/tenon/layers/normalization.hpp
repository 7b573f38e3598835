// tenon: layer normalization and batch normalization.
//
// Layer normalization (Ba, Kiros & Hinton 2016, eq. 4) normalizes each row
// over its features. Batch normalization (Ioffe & Szegedy 2015, Algorithms 1
// and 2) normalizes each column over the batch in training mode and keeps
// moving-average estimates of the population mean and (unbiased) variance,
// which inference mode uses instead. Both are composed of tape operations;
// the estimates are non-trainable state buffers (older model files' names for
// them are mapped by detail::current_state_name). Formulas, defaults and
// their sources: docs/design/layers.md.
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
        return centred * inv_std * t.track(gain_) + t.track(bias_);
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
    explicit batch_norm(std::size_t width, double batch_weight = 0.1, double epsilon = 1e-5)
        : width_(width), batch_weight_(batch_weight), epsilon_(epsilon), gain_("gain", shape2{1, width}), bias_("bias", shape2{1, width}),
          population_mean_("population_mean", shape2{1, width}), population_variance_("population_variance", shape2{1, width}) {
        detail::check_width("batch normalization", width);
        detail::check_epsilon("batch normalization", epsilon);
        if (!(batch_weight > 0.0 && batch_weight <= 1.0)) {
            raise(codes::model_layer_option, "batch normalization: the batch weight must be in (0, 1], got " + std::to_string(batch_weight));
        }
        gain_.value().fill(T(1));
        population_variance_.value().fill(T(1));
        population_mean_.set_trainable(false);
        population_variance_.set_trainable(false);
        renamed();
    }

    var<T> forward(tape<T>& t, var<T> x, run_mode mode) override {
        const shape2 s = x.shape();
        this->require_width(s.cols, width_);
        const T eps = static_cast<T>(epsilon_);
        if (mode == run_mode::inference) {
            const var<T> inv_std = pow(t.track(population_variance_) + eps, T(-0.5));
            return (x - t.track(population_mean_)) * inv_std * t.track(gain_) + t.track(bias_);
        }
        if (s.rows < 2) {
            raise(codes::model_batch_norm_batch_too_small,
                  "batch normalization '" + this->qualified_name() + "' in training mode: a batch of " + std::to_string(s.rows) +
                      " row(s) has no variance; use at least 2 rows or inference mode");
        }
        const var<T> batch_mean = mean(x, 0);
        const var<T> centred = x - batch_mean;
        const var<T> batch_variance = mean(square(centred), 0);
        const var<T> y = centred * pow(batch_variance + eps, T(-0.5)) * t.track(gain_) + t.track(bias_);

        const T m = static_cast<T>(batch_weight_);
        const T unbias = static_cast<T>(s.rows) / static_cast<T>(s.rows - 1);
        const T* bm = batch_mean.value().data();
        const T* bv = batch_variance.value().data();
        T* pm = population_mean_.value().data();
        T* pv = population_variance_.value().data();
        for (std::size_t j = 0; j < width_; ++j) {
            pm[j] = (T(1) - m) * pm[j] + m * bm[j];
            pv[j] = (T(1) - m) * pv[j] + m * unbias * bv[j];
        }
        return y;
    }

    const char* kind() const noexcept override { return "batch_norm"; }

    layer_record describe() const override {
        layer_record r = this->base_record();
        r.set_number("width", static_cast<double>(width_));
        r.set_number("batch_weight", batch_weight_);
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
        out.push_back(&population_mean_);
        out.push_back(&population_variance_);
    }

    parameter<T>& gain() noexcept { return gain_; }
    parameter<T>& bias() noexcept { return bias_; }
    parameter<T>& population_mean() noexcept { return population_mean_; }
    parameter<T>& population_variance() noexcept { return population_variance_; }

protected:
    void renamed() override {
        const std::string q = this->qualified_name();
        const std::string p = q.empty() ? std::string() : q + ".";
        gain_.set_name(p + "gain");
        bias_.set_name(p + "bias");
        population_mean_.set_name(p + "population_mean");
        population_variance_.set_name(p + "population_variance");
    }

private:
    std::size_t width_;
    double batch_weight_;
    double epsilon_;
    parameter<T> gain_;
    parameter<T> bias_;
    parameter<T> population_mean_;
    parameter<T> population_variance_;
};

TENON_NAMESPACE_END
