// tenon: activation functions as layers.
//
// One layer kind covers every activation of the tape (operations.hpp), plus
// softmax and log-softmax over each row. The coefficient is the slope of
// leaky_relu (default 0.01, common practice) or the alpha of elu (default 1,
// Clevert, Unterthiner & Hochreiter 2016, eq. 1); other activations ignore it.
#pragma once

#include <cstdint>
#include <string>

#include "tenon/core/activation_functions.hpp"
#include "tenon/layers/layer.hpp"

TENON_NAMESPACE_BEGIN

/// Records activation `a` of x on x's tape.
template <class T>
var<T> activate(var<T> x, activation a, T coefficient) {
    switch (a) {
    case activation::identity: return x;
    case activation::tanh: return tanh(x);
    case activation::sigmoid: return sigmoid(x);
    case activation::relu: return relu(x);
    case activation::leaky_relu: return leaky_relu(x, coefficient);
    case activation::elu: return elu(x, coefficient);
    case activation::softplus: return softplus(x);
    case activation::gelu: return gelu(x);
    case activation::gelu_tanh: return gelu_tanh(x);
    case activation::softmax: return exp(log_softmax_rows(x));
    case activation::log_softmax: return log_softmax_rows(x);
    }
    return x;
}

template <class T>
class activation_layer : public layer<T> {
public:
    explicit activation_layer(activation a) : activation_layer(a, default_coefficient(a)) {}
    activation_layer(activation a, double coefficient) : activation_(a), coefficient_(coefficient) {
        if (!std::isfinite(coefficient)) {
            raise(codes::model_layer_option,
                  std::string("activation layer (") + activation_name(a) + "): the coefficient must be finite, got " + std::to_string(coefficient));
        }
    }

    var<T> forward(tape<T>&, var<T> input, run_mode) override { return activate(input, activation_, static_cast<T>(coefficient_)); }

    const char* kind() const noexcept override { return "activation"; }

    layer_record describe() const override {
        layer_record r = this->base_record();
        r.set_text("function", activation_name(activation_));
        r.set_number("coefficient", coefficient_);
        return r;
    }

    std::size_t output_width(std::size_t input_width) const override { return input_width; }

    activation function() const noexcept { return activation_; }
    double coefficient() const noexcept { return coefficient_; }

private:
    activation activation_;
    double coefficient_;
};

TENON_NAMESPACE_END
