// tenon: the operations of the tape as free functions and operators.
//
// Each function records one node on the tape that owns its first operand and
// returns the new value. Elementwise binary operations broadcast: each
// dimension of an operand must equal the output's or be 1, so a 1 x n bias
// row is added to every row of a batch x n matrix, and a 1x1 value acts as a
// scalar.
#pragma once

#include "tenon/autodiff/tape.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {
template <class T>
tape<T>& owner_of(const var<T>& v) {
    if (!v.owner()) raise(codes::autodiff_value_foreign, "operation on an empty var (recorded on no tape)");
    return *v.owner();
}
}  // namespace detail

template <class T>
var<T> add(var<T> a, var<T> b) {
    return detail::owner_of(a).binary(op_kind::add, a, b);
}
template <class T>
var<T> subtract(var<T> a, var<T> b) {
    return detail::owner_of(a).binary(op_kind::subtract, a, b);
}
template <class T>
var<T> multiply(var<T> a, var<T> b) {
    return detail::owner_of(a).binary(op_kind::multiply, a, b);
}
template <class T>
var<T> divide(var<T> a, var<T> b) {
    return detail::owner_of(a).binary(op_kind::divide, a, b);
}

template <class T>
var<T> operator+(var<T> a, var<T> b) {
    return add(a, b);
}
template <class T>
var<T> operator-(var<T> a, var<T> b) {
    return subtract(a, b);
}
template <class T>
var<T> operator*(var<T> a, var<T> b) {
    return multiply(a, b);
}
template <class T>
var<T> operator/(var<T> a, var<T> b) {
    return divide(a, b);
}

/// c * x for a constant c.
template <class T>
var<T> scale(var<T> x, T c) {
    return detail::owner_of(x).unary(op_kind::scale, x, c);
}
/// x + c for a constant c.
template <class T>
var<T> shift(var<T> x, T c) {
    return detail::owner_of(x).unary(op_kind::shift, x, c);
}

template <class T>
var<T> operator*(var<T> x, T c) {
    return scale(x, c);
}
template <class T>
var<T> operator*(T c, var<T> x) {
    return scale(x, c);
}
template <class T>
var<T> operator+(var<T> x, T c) {
    return shift(x, c);
}
template <class T>
var<T> operator+(T c, var<T> x) {
    return shift(x, c);
}
template <class T>
var<T> operator-(var<T> x, T c) {
    return shift(x, -c);
}
template <class T>
var<T> operator-(var<T> x) {
    return scale(x, T(-1));
}
template <class T>
var<T> operator-(T c, var<T> x) {
    return shift(scale(x, T(-1)), c);
}
template <class T>
var<T> operator/(var<T> x, T c) {
    return scale(x, T(1) / c);
}

/// op(a) * op(b), where op transposes when asked; shapes must chain.
template <class T>
var<T> matmul(var<T> a, var<T> b, bool transpose_a = false, bool transpose_b = false) {
    return detail::owner_of(a).matmul(a, b, transpose_a, transpose_b);
}

/// Sum of all elements (1x1).
template <class T>
var<T> sum(var<T> x) {
    return detail::owner_of(x).unary(op_kind::sum_all, x);
}
/// Mean of all elements (1x1).
template <class T>
var<T> mean(var<T> x) {
    return detail::owner_of(x).unary(op_kind::mean_all, x);
}
/// Sum over one axis: 0 sums over rows (1 x cols), 1 over columns (rows x 1).
template <class T>
var<T> sum(var<T> x, int axis) {
    return detail::owner_of(x).reduce_axis(op_kind::sum_axis, x, axis);
}
/// Mean over one axis: 0 over rows (1 x cols), 1 over columns (rows x 1).
template <class T>
var<T> mean(var<T> x, int axis) {
    return detail::owner_of(x).reduce_axis(op_kind::mean_axis, x, axis);
}

template <class T>
var<T> exp(var<T> x) {
    return detail::owner_of(x).unary(op_kind::exp, x);
}
template <class T>
var<T> log(var<T> x) {
    return detail::owner_of(x).unary(op_kind::log, x);
}
template <class T>
var<T> square(var<T> x) {
    return detail::owner_of(x).unary(op_kind::square, x);
}
template <class T>
var<T> sqrt(var<T> x) {
    return detail::owner_of(x).unary(op_kind::sqrt, x);
}
template <class T>
var<T> abs(var<T> x) {
    return detail::owner_of(x).unary(op_kind::abs, x);
}
/// x^p elementwise for a constant exponent p.
template <class T>
var<T> pow(var<T> x, T p) {
    return detail::owner_of(x).unary(op_kind::pow, x, p);
}

template <class T>
var<T> tanh(var<T> x) {
    return detail::owner_of(x).unary(op_kind::tanh, x);
}
template <class T>
var<T> sigmoid(var<T> x) {
    return detail::owner_of(x).unary(op_kind::sigmoid, x);
}
template <class T>
var<T> relu(var<T> x) {
    return detail::owner_of(x).unary(op_kind::relu, x);
}
/// x for x > 0, slope * x otherwise.
template <class T>
var<T> leaky_relu(var<T> x, T slope = T(0.01)) {
    return detail::owner_of(x).unary(op_kind::leaky_relu, x, slope);
}
/// x for x > 0, alpha (e^x - 1) otherwise (Clevert, Unterthiner & Hochreiter 2016).
template <class T>
var<T> elu(var<T> x, T alpha = T(1)) {
    return detail::owner_of(x).unary(op_kind::elu, x, alpha);
}
/// log(1 + e^x), computed without overflow.
template <class T>
var<T> softplus(var<T> x) {
    return detail::owner_of(x).unary(op_kind::softplus, x);
}
/// x Phi(x), the exact (erf) form (Hendrycks & Gimpel 2016).
template <class T>
var<T> gelu(var<T> x) {
    return detail::owner_of(x).unary(op_kind::gelu_erf, x);
}
/// 0.5 x (1 + tanh(sqrt(2/pi) (x + 0.044715 x^3))) (Hendrycks & Gimpel 2016).
template <class T>
var<T> gelu_tanh(var<T> x) {
    return detail::owner_of(x).unary(op_kind::gelu_tanh, x);
}

/// Per-row log(sum_j exp(x_ij)) (rows x 1), stable for large magnitudes.
template <class T>
var<T> logsumexp_rows(var<T> x) {
    return detail::owner_of(x).unary(op_kind::logsumexp_rows, x);
}
/// Per-row x_ij - logsumexp_i (same shape), stable for large magnitudes.
template <class T>
var<T> log_softmax_rows(var<T> x) {
    return detail::owner_of(x).unary(op_kind::log_softmax_rows, x);
}

/// f(x W + b) as one fused node; f is op_kind::relu, tanh, sigmoid,
/// leaky_relu or elu (coefficient >= 0: the slope or alpha). Pass an empty
/// var<T>() as `bias` for no bias. See tape::affine_activation.
template <class T>
var<T> affine_activation(var<T> x, var<T> weights, var<T> bias, op_kind unit, T coefficient = T(0)) {
    return detail::owner_of(x).affine_activation(x, weights, bias, unit, coefficient);
}
/// -sum_ij Q_ij log softmax(z_i)_j (1x1) as one fused node: cross-entropy of
/// the row softmax of `logits` against the weighted targets Q.
template <class T>
var<T> softmax_cross_entropy(var<T> logits, var<T> weights) {
    return detail::owner_of(logits).softmax_cross_entropy(logits, weights);
}

/// Limits x to [low, high]; the gradient passes where low <= x <= high.
template <class T>
var<T> clamp(var<T> x, T low, T high) {
    return detail::owner_of(x).unary(op_kind::clamp, x, low, high);
}
/// The same value, with no gradient flowing back through it.
template <class T>
var<T> stop_gradient(var<T> x) {
    return detail::owner_of(x).unary(op_kind::stop_gradient, x);
}

TENON_NAMESPACE_END
