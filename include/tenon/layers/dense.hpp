// tenon: the dense (affine) layer.
//
// y = x W + b for a batch x inputs matrix x, an inputs x outputs weight matrix
// W and a 1 x outputs bias row b added to every row.
#pragma once

#include <cstddef>
#include <string>
#include <vector>

#include "tenon/layers/initializers.hpp"
#include "tenon/layers/layer.hpp"

TENON_NAMESPACE_BEGIN

template <class T>
class dense : public layer<T> {
public:
    /// A layer with zero weights (to be initialized or loaded).
    dense(std::size_t inputs, std::size_t outputs, bool with_bias = true)
        : inputs_(inputs), outputs_(outputs), with_bias_(with_bias), weights_("weights", shape2{inputs, outputs}),
          bias_("bias", shape2{1, with_bias ? outputs : 0}) {
        if (inputs == 0 || outputs == 0) {
            raise(codes::model_layer_option,
                  "dense layer: inputs and outputs must be positive, got " + std::to_string(inputs) + " x " + std::to_string(outputs));
        }
        renamed();
    }

    /// A layer whose weights and bias are drawn by the given initializers.
    dense(std::size_t inputs, std::size_t outputs, random_engine& engine, initializer weights_init = {}, initializer bias_init = {init_scheme::zeros},
          bool with_bias = true)
        : dense(inputs, outputs, with_bias) {
        initialize_weights(engine, weights_init, bias_init);
    }

    void initialize_weights(random_engine& engine, initializer weights_init, initializer bias_init = {init_scheme::zeros}) {
        initialize(weights_.value(), weights_init, inputs_, outputs_, engine);
        if (with_bias_) initialize(bias_.value(), bias_init, inputs_, outputs_, engine);
    }

    var<T> forward(tape<T>& t, var<T> input, run_mode) override {
        this->require_width(input.shape().cols, inputs_);
        var<T> y = matmul(input, t.track(weights_));
        if (with_bias_) y = y + t.track(bias_);
        return y;
    }

    /// forward() followed by activation `unit` (coefficient: its slope or
    /// alpha), recorded as one fused tape node (tape::affine_activation);
    /// `unit` must pass tape<T>::fusable_activation. The same values as
    /// forward() and then the activation recorded on their own.
    var<T> forward_activated(tape<T>& t, var<T> input, op_kind unit, T coefficient) {
        this->require_width(input.shape().cols, inputs_);
        return t.affine_activation(input, t.track(weights_), with_bias_ ? t.track(bias_) : var<T>(), unit, coefficient);
    }

    const char* kind() const noexcept override { return "dense"; }

    layer_record describe() const override {
        layer_record r = this->base_record();
        r.set_number("inputs", static_cast<double>(inputs_));
        r.set_number("outputs", static_cast<double>(outputs_));
        r.set_number("bias", with_bias_ ? 1.0 : 0.0);
        return r;
    }

    std::size_t output_width(std::size_t input_width) const override {
        this->require_width(input_width, inputs_);
        return outputs_;
    }

    void collect_parameters(std::vector<parameter<T>*>& out) override {
        out.push_back(&weights_);
        if (with_bias_) out.push_back(&bias_);
    }

    std::size_t inputs() const noexcept { return inputs_; }
    std::size_t outputs() const noexcept { return outputs_; }
    bool has_bias() const noexcept { return with_bias_; }
    parameter<T>& weights() noexcept { return weights_; }
    parameter<T>& bias() noexcept { return bias_; }

protected:
    void renamed() override {
        const std::string q = this->qualified_name();
        weights_.set_name(q.empty() ? "weights" : q + ".weights");
        bias_.set_name(q.empty() ? "bias" : q + ".bias");
    }

private:
    std::size_t inputs_;
    std::size_t outputs_;
    bool with_bias_;
    parameter<T> weights_;
    parameter<T> bias_;
};

TENON_NAMESPACE_END
