// tenon: regression losses: L1 (mean absolute error), L2 (mean squared
// error) and Huber.
//
// prediction is a var of shape rows x cols, target a matrix of the same shape;
// the reduction and sample weights follow loss_options.hpp. Class weights and
// label smoothing do not apply and raise model.loss.option.
#pragma once

#include <string>

#include "tenon/losses/loss_options.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {
template <class T>
var<T> regression_difference(const char* loss, tape<T>& t, var<T> prediction, const matrix<T>& target, const loss_options<T>& o) {
    // Checked before the message is built, so a correct step allocates nothing.
    if (shape_of(target) != prediction.shape()) require_shape(shape_of(target), prediction.shape(), loss_where(loss) + " target");
    reject_classification_options(loss, o);
    check_sample_weights(loss, o, shape_of(target).rows);
    return prediction - t.input(target);
}
}  // namespace detail

/// Mean (or sum) of |prediction - target|.
template <class T>
var<T> l1_loss(tape<T>& t, var<T> prediction, const matrix<T>& target, const loss_options<T>& options = {}) {
    const var<T> d = detail::regression_difference("L1", t, prediction, target, options);
    return detail::reduce_elementwise("L1", t, abs(d), options);
}

/// Mean (or sum) of (prediction - target)^2.
template <class T>
var<T> l2_loss(tape<T>& t, var<T> prediction, const matrix<T>& target, const loss_options<T>& options = {}) {
    const var<T> d = detail::regression_difference("L2", t, prediction, target, options);
    return detail::reduce_elementwise("L2", t, square(d), options);
}

/// Huber loss (Huber 1964, "Robust Estimation of a Location Parameter",
/// Ann. Math. Statist. 35(1), the rho function of section 4, from memory):
/// r^2 / 2 for |r| <= delta and delta (|r| - delta / 2) beyond, r the
/// residual. Written as q^2 / 2 + delta (|r| - q) with q = min(|r|, delta),
/// which equals both branches and has the right gradient on each side.
template <class T>
var<T> huber_loss(tape<T>& t, var<T> prediction, const matrix<T>& target, const loss_options<T>& options = {}) {
    if (!(options.delta > T(0)) || !std::isfinite(options.delta)) {
        raise(codes::model_loss_option, "Huber loss: delta must be positive and finite, got " + std::to_string(options.delta));
    }
    const var<T> d = detail::regression_difference("Huber", t, prediction, target, options);
    const var<T> a = abs(d);
    const var<T> q = clamp(a, T(0), options.delta);
    const var<T> e = T(0.5) * square(q) + options.delta * (a - q);
    return detail::reduce_elementwise("Huber", t, e, options);
}

TENON_NAMESPACE_END
