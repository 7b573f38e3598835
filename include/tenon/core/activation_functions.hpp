// tenon: the activation functions by name, and the scalar formulas that
// both the tape (autodiff/tape.hpp) and the predictor (serve/predictor.hpp)
// evaluate, so training and serving compute the same bits.
#pragma once

#include <cmath>
#include <cstdint>
#include <string>

#include "tenon/core/enum_text.hpp"
#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"

TENON_NAMESPACE_BEGIN

enum class activation : std::uint8_t {
    identity,
    tanh,
    sigmoid,
    relu,
    leaky_relu,
    elu,
    softplus,
    gelu,
    gelu_tanh,
    softmax,
    log_softmax,
};

inline const char* to_string(activation a) noexcept {
    switch (a) {
    case activation::identity: return "identity";
    case activation::tanh: return "tanh";
    case activation::sigmoid: return "sigmoid";
    case activation::relu: return "relu";
    case activation::leaky_relu: return "leaky_relu";
    case activation::elu: return "elu";
    case activation::softplus: return "softplus";
    case activation::gelu: return "gelu";
    case activation::gelu_tanh: return "gelu_tanh";
    case activation::softmax: return "softmax";
    case activation::log_softmax: return "log_softmax";
    }
    return "unknown";
}
/// The former spelling of to_string(activation).
inline const char* activation_name(activation v) noexcept { return to_string(v); }

/// The activation with the given name; raises model.record.unknown_kind.
inline activation parse_activation(const std::string& name) {
    activation a{};
    if (!enum_from_text(name, a))
        raise(codes::model_record_unknown_kind, "activation '" + name + "' is not known (" + enum_choices<activation>() + ")");
    return a;
}

inline double default_coefficient(activation a) noexcept { return a == activation::leaky_relu ? 0.01 : (a == activation::elu ? 1.0 : 0.0); }

namespace detail {

template <class T>
T stable_sigmoid(T x) noexcept {
    if (x >= T(0)) return T(1) / (T(1) + std::exp(-x));
    const T e = std::exp(x);
    return e / (T(1) + e);
}

// softplus(x) = log(1 + e^x) = max(x, 0) + log1p(e^-|x|), finite for any x.
template <class T>
T stable_softplus(T x) noexcept {
    return (x > T(0) ? x : T(0)) + std::log1p(std::exp(-std::abs(x)));
}

// GELU constants (Hendrycks & Gimpel 2016, "Gaussian Error Linear Units", eq. 2
// and the tanh approximation in section 2): sqrt(2/pi) and 0.044715.
inline constexpr double gelu_sqrt_2_over_pi = 0.79788456080286535587989211986876;
inline constexpr double gelu_cubic = 0.044715;
inline constexpr double inv_sqrt2 = 0.70710678118654752440084436210485;
inline constexpr double inv_sqrt_2pi = 0.39894228040143267793994605993438;

}  // namespace detail

TENON_NAMESPACE_END
