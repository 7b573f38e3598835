// tenon: classification losses: cross-entropy from logits (class labels or
// probability targets), binary cross-entropy from logits, KL divergence.
//
// Cross-entropy is loss_i = -sum_j q_ij log softmax(z_i)_j (Bishop 2006,
// "Pattern Recognition and Machine Learning", eq. 4.108), with the row
// maximum subtracted so large logits neither overflow nor lose the loss to
// rounding; target, smoothing and weights fold into one matrix Q, recorded as
// one fused tape node. The reduction and the weights follow loss_options.hpp.
// How the fused node works: docs/design/losses.md.
#pragma once

#include <cmath>
#include <cstddef>
#include <string>
#include <vector>

#include "tenon/losses/loss_options.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {

// Checks that each row of `p` is a probability distribution (non-negative,
// summing to 1 within a tolerance suited to float).
template <class T>
void check_distribution_rows(const char* loss, const matrix<T>& p) {
    const std::size_t rows = p.shape()[0], cols = p.shape()[1];
    for (std::size_t i = 0; i < rows; ++i) {
        double total = 0.0;
        for (std::size_t j = 0; j < cols; ++j) {
            const T v = p.data()[i * cols + j];
            if (!(v >= T(0) && v <= T(1))) {
                raise(codes::model_loss_target,
                      loss_where(loss) + ": target row " + std::to_string(i) + ", column " + std::to_string(j) + " is " + std::to_string(v) +
                          ", not a probability");
            }
            total += static_cast<double>(v);
        }
        if (std::abs(total - 1.0) > 1e-4) {
            raise(codes::model_loss_target, loss_where(loss) + ": target row " + std::to_string(i) + " sums to " + std::to_string(total) + ", not 1");
        }
    }
}

template <class T>
T sample_weight(const loss_options<T>& o, std::size_t i) {
    return o.sample_weights.empty() ? T(1) : o.sample_weights[i];
}

}  // namespace detail

/// Cross-entropy of softmax(logits) against integer class labels (one per
/// row, each below the number of columns).
template <class T>
var<T> cross_entropy_loss(tape<T>& t, var<T> logits, const std::vector<std::size_t>& labels, const loss_options<T>& options = {}) {
    const char* name = "cross-entropy";
    const shape2 s = logits.shape();
    if (labels.size() != s.rows) {
        raise(codes::core_shape_mismatch,
              std::string(name) + " loss: " + std::to_string(labels.size()) + " labels for " + std::to_string(s.rows) + " rows of logits");
    }
    for (std::size_t i = 0; i < s.rows; ++i) {
        if (labels[i] >= s.cols) {
            raise(codes::model_loss_label_range,
                  std::string(name) + " loss: label " + std::to_string(labels[i]) + " at row " + std::to_string(i) +
                      " is not below the number of classes (" + std::to_string(s.cols) + ")");
        }
    }
    detail::check_sample_weights(name, options, s.rows);
    detail::check_class_weights(name, options, s.cols);
    detail::check_smoothing(name, options);

    double total = 0.0;
    for (std::size_t i = 0; i < s.rows; ++i) {
        const T c = options.class_weights.empty() ? T(1) : options.class_weights[labels[i]];
        total += static_cast<double>(detail::sample_weight(options, i) * c);
    }
    const T divisor = detail::reduction_divisor(name, options, total);
    const T eps = options.label_smoothing;
    const T off = eps / static_cast<T>(s.cols);
    matrix<T>& q = detail::loss_scratch<T>(1, s);
    ensure_shape(q, s);
    for (std::size_t i = 0; i < s.rows; ++i) {
        const T c = options.class_weights.empty() ? T(1) : options.class_weights[labels[i]];
        const T w = detail::sample_weight(options, i) * c / divisor;
        T* row = q.data() + i * s.cols;
        for (std::size_t j = 0; j < s.cols; ++j) row[j] = w * off;
        row[labels[i]] = w * ((T(1) - eps) + off);
    }
    return softmax_cross_entropy(logits, t.input(q));
}

/// Cross-entropy of softmax(logits) against target distributions (each row
/// non-negative, summing to 1).
template <class T>
var<T> cross_entropy_loss(tape<T>& t, var<T> logits, const matrix<T>& targets, const loss_options<T>& options = {}) {
    const char* name = "cross-entropy";
    const shape2 s = logits.shape();
    if (shape_of(targets) != s) require_shape(shape_of(targets), s, "cross-entropy loss target");
    detail::check_distribution_rows(name, targets);
    detail::check_sample_weights(name, options, s.rows);
    detail::check_class_weights(name, options, s.cols);
    detail::check_smoothing(name, options);

    matrix<T>& w = detail::loss_scratch<T>(0, shape2{s.rows, 1});
    ensure_shape(w, shape2{s.rows, 1});
    double total = 0.0;
    for (std::size_t i = 0; i < s.rows; ++i) {
        T c = T(1);
        if (!options.class_weights.empty()) {
            c = T(0);
            for (std::size_t j = 0; j < s.cols; ++j) c += options.class_weights[j] * targets.data()[i * s.cols + j];
        }
        w.data()[i] = detail::sample_weight(options, i) * c;
        total += static_cast<double>(w.data()[i]);
    }
    const T divisor = detail::reduction_divisor(name, options, total);
    const T eps = options.label_smoothing;
    const T off = eps / static_cast<T>(s.cols);
    matrix<T>& q = detail::loss_scratch<T>(1, s);
    ensure_shape(q, s);
    for (std::size_t i = 0; i < s.rows; ++i) {
        const T wi = w.data()[i] / divisor;
        for (std::size_t j = 0; j < s.cols; ++j) {
            q.data()[i * s.cols + j] = wi * ((T(1) - eps) * targets.data()[i * s.cols + j] + off);
        }
    }
    return softmax_cross_entropy(logits, t.input(q));
}

/// Binary cross-entropy of sigmoid(logits) against targets in [0, 1] of the
/// same shape, elementwise: -[y log s(z) + (1 - y) log(1 - s(z))], computed
/// as softplus(z) - y z, which is exact algebra and stays finite for any z
/// (softplus(z) - z = softplus(-z)). Class weights {negative, positive}
/// weigh each element by c0 (1 - y) + c1 y.
template <class T>
var<T> binary_cross_entropy_loss(tape<T>& t, var<T> logits, const matrix<T>& targets, const loss_options<T>& options = {}) {
    const char* name = "binary cross-entropy";
    const shape2 s = logits.shape();
    if (shape_of(targets) != s) require_shape(shape_of(targets), s, "binary cross-entropy loss target");
    for (std::size_t k = 0; k < targets.size(); ++k) {
        const T y = targets.data()[k];
        if (!(y >= T(0) && y <= T(1))) {
            raise(codes::model_loss_target,
                  std::string(name) + " loss: target row " + std::to_string(k / s.cols) + ", column " + std::to_string(k % s.cols) + " is " +
                      std::to_string(y) + ", not in [0, 1]");
        }
    }
    detail::check_sample_weights(name, options, s.rows);
    detail::check_class_weights(name, options, 2);
    detail::check_smoothing(name, options);

    // Smoothed target y' = (1 - eps) y + eps / 2, so y' z = (1 - eps) (y z) + (eps / 2) z.
    const T eps = options.label_smoothing;
    var<T> e = softplus(logits) - (T(1) - eps) * (logits * t.input(targets));
    if (eps != T(0)) e = e - (eps / T(2)) * logits;
    if (options.class_weights.empty()) return detail::reduce_elementwise(name, t, e, options);

    matrix<T>& w = detail::loss_scratch<T>(1, s);
    ensure_shape(w, s);
    double total = 0.0;
    const T c0 = options.class_weights[0], c1 = options.class_weights[1];
    for (std::size_t i = 0; i < s.rows; ++i) {
        const T si = detail::sample_weight(options, i);
        for (std::size_t j = 0; j < s.cols; ++j) {
            const T y = targets.data()[i * s.cols + j];
            const T wij = si * (c0 * (T(1) - y) + c1 * y);
            w.data()[i * s.cols + j] = wij;
            total += static_cast<double>(wij);
        }
    }
    const T divisor = detail::reduction_divisor(name, options, total);
    for (std::size_t k = 0; k < w.size(); ++k) w.data()[k] /= divisor;
    return sum(e * t.input(w));
}

namespace detail {
// KL(p || q) = sum_j p_j (log p_j - log q_j) (Kullback & Leibler 1951, "On
// Information and Sufficiency", Ann. Math. Statist. 22(1)), with 0 log 0 = 0.
// The first term does not depend on the prediction; it is added as a constant.
template <class T>
var<T> kl_from_log_prediction(tape<T>& t, var<T> log_q, const matrix<T>& p, const loss_options<T>& o, const char* name) {
    const shape2 s = log_q.shape();
    if (shape_of(p) != s) require_shape(shape_of(p), s, std::string(name) + " loss target");
    check_distribution_rows(name, p);
    check_sample_weights(name, o, s.rows);
    if (!o.class_weights.empty() || o.label_smoothing != T(0)) {
        raise(codes::model_loss_option, std::string(name) + " loss: class weights and label smoothing do not apply");
    }
    double total = 0.0;
    for (std::size_t i = 0; i < s.rows; ++i) total += static_cast<double>(sample_weight(o, i));
    const T divisor = reduction_divisor(name, o, total);
    matrix<T>& q = loss_scratch<T>(1, s);
    ensure_shape(q, s);
    double entropy_term = 0.0;  // sum_i w_i sum_j p_ij log p_ij / D
    for (std::size_t i = 0; i < s.rows; ++i) {
        const T wi = sample_weight(o, i) / divisor;
        for (std::size_t j = 0; j < s.cols; ++j) {
            const T pij = p.data()[i * s.cols + j];
            q.data()[i * s.cols + j] = wi * pij;
            if (pij > T(0)) entropy_term += static_cast<double>(wi) * static_cast<double>(pij) * std::log(static_cast<double>(pij));
        }
    }
    return shift(-sum(log_q * t.input(q)), static_cast<T>(entropy_term));
}
}  // namespace detail

/// KL(target || softmax(logits)), summed over the classes of each row.
template <class T>
var<T> kl_divergence_loss(tape<T>& t, var<T> logits, const matrix<T>& target, const loss_options<T>& options = {}) {
    return detail::kl_from_log_prediction(t, log_softmax_rows(logits), target, options, "KL divergence");
}

/// KL(target || prediction) for a prediction that already holds strictly
/// positive probabilities (e.g. the output of a softmax layer).
template <class T>
var<T> kl_divergence_probabilities_loss(tape<T>& t, var<T> prediction, const matrix<T>& target, const loss_options<T>& options = {}) {
    return detail::kl_from_log_prediction(t, log(prediction), target, options, "KL divergence");
}

TENON_NAMESPACE_END
