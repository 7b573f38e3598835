// tenon: options shared by the losses, and their weighting rule.
//
// Every loss returns a 1x1 value on the tape. Sample i carries the weight
// w_i = s_i * c(i) (its sample weight times its target's class weight); the
// mean reduction is sum_i w_i loss_i / sum_i w_i, the sum reduction
// sum_i w_i loss_i, so with no weights "mean" is the plain average (over all
// elements for the elementwise losses, over rows for cross-entropy and KL
// divergence). Steady-state steps allocate nothing. The rule in full:
// docs/design/losses.md.
#pragma once

#include <cmath>
#include <cstddef>
#include <cstdint>
#include <string>
#include <vector>

#include "tenon/autodiff/operations.hpp"

TENON_NAMESPACE_BEGIN

enum class loss_reduction : std::uint8_t { mean, sum };

template <class T>
struct loss_options {
    loss_reduction reduction = loss_reduction::mean;
    /// One non-negative weight per row (sample), or empty for all ones.
    std::vector<T> sample_weights;
    /// One non-negative weight per class, or empty for all ones; for binary
    /// cross-entropy two weights: {negative class, positive class}.
    std::vector<T> class_weights;
    /// Label smoothing epsilon in [0, 1): the target becomes
    /// (1 - epsilon) target + epsilon / K (Szegedy, Vanhoucke, Ioffe, Shlens &
    /// Wojna 2016, "Rethinking the Inception Architecture for Computer
    /// Vision", section 7); K = 2 for binary cross-entropy. Cross-entropy
    /// losses only.
    T label_smoothing = T(0);
    /// Huber threshold (Huber loss only), positive.
    T delta = T(1);
};

namespace detail {

// Buffers for a loss's constant inputs (weights, smoothed targets) before
// they are copied onto the tape: per slot a few buffers chosen by shape, so
// that alternating batch shapes (full batches and an epoch's shorter last
// batch) each keep a buffer of their own instead of reallocating one.
template <class T>
matrix<T>& loss_scratch(int slot, shape2 shape) {
    struct shelf {
        matrix<T> buffers[4];
        std::size_t next = 0;
    };
    thread_local shelf shelves[2];
    shelf& s = shelves[slot];
    for (auto& b : s.buffers)
        if (shape_of(b) == shape) return b;
    matrix<T>& b = s.buffers[s.next++ % 4];
    ensure_shape(b, shape);
    return b;
}

inline std::string loss_where(const char* loss) { return std::string(loss) + " loss"; }

template <class T>
void check_sample_weights(const char* loss, const loss_options<T>& o, std::size_t rows) {
    if (o.sample_weights.empty()) return;
    if (o.sample_weights.size() != rows) {
        raise(codes::model_loss_weights,
              loss_where(loss) + ": " + std::to_string(o.sample_weights.size()) + " sample weights for " + std::to_string(rows) + " rows");
    }
    for (std::size_t i = 0; i < rows; ++i) {
        const T w = o.sample_weights[i];
        if (!(w >= T(0)) || !std::isfinite(w)) {
            raise(codes::model_loss_weights,
                  loss_where(loss) + ": sample weight " + std::to_string(i) + " is " + std::to_string(w) +
                      "; weights must be finite and non-negative");
        }
    }
}

template <class T>
void check_class_weights(const char* loss, const loss_options<T>& o, std::size_t classes) {
    if (o.class_weights.empty()) return;
    if (o.class_weights.size() != classes) {
        raise(codes::model_loss_weights,
              loss_where(loss) + ": " + std::to_string(o.class_weights.size()) + " class weights for " + std::to_string(classes) + " classes");
    }
    for (std::size_t j = 0; j < classes; ++j) {
        const T w = o.class_weights[j];
        if (!(w >= T(0)) || !std::isfinite(w)) {
            raise(codes::model_loss_weights,
                  loss_where(loss) + ": class weight " + std::to_string(j) + " is " + std::to_string(w) +
                      "; weights must be finite and non-negative");
        }
    }
}

template <class T>
void check_smoothing(const char* loss, const loss_options<T>& o) {
    if (!(o.label_smoothing >= T(0) && o.label_smoothing < T(1))) {
        raise(codes::model_loss_option, loss_where(loss) + ": label smoothing must be in [0, 1), got " + std::to_string(o.label_smoothing));
    }
}

template <class T>
void reject_classification_options(const char* loss, const loss_options<T>& o) {
    if (!o.class_weights.empty()) {
        raise(codes::model_loss_option, loss_where(loss) + ": class weights apply to cross-entropy losses only");
    }
    if (o.label_smoothing != T(0)) {
        raise(codes::model_loss_option, loss_where(loss) + ": label smoothing applies to cross-entropy losses only");
    }
}

// The divisor of the mean reduction given the total weight; 1 for sum.
template <class T>
T reduction_divisor(const char* loss, const loss_options<T>& o, double total_weight) {
    if (o.reduction == loss_reduction::sum) return T(1);
    if (!(total_weight > 0.0)) {
        raise(codes::model_loss_weights, loss_where(loss) + ": the weights sum to zero, so the weighted mean is undefined");
    }
    return static_cast<T>(total_weight);
}

// sum_ij s_i E_ij / D for an elementwise loss E (rows x cols) and sample
// weights only; D = cols * sum_i s_i for the mean, 1 for the sum.
template <class T>
var<T> reduce_elementwise(const char* loss, tape<T>& t, var<T> e, const loss_options<T>& o) {
    const shape2 s = e.shape();
    if (o.sample_weights.empty()) {
        if (o.reduction == loss_reduction::sum) return sum(e);
        if (s.size() == 0) raise(codes::model_loss_weights, loss_where(loss) + ": the mean of an empty batch is undefined");
        return mean(e);
    }
    double total = 0.0;
    for (T w : o.sample_weights) total += static_cast<double>(w);
    const T divisor = reduction_divisor(loss, o, total * static_cast<double>(s.cols));
    matrix<T>& column = loss_scratch<T>(0, shape2{s.rows, 1});
    ensure_shape(column, shape2{s.rows, 1});
    for (std::size_t i = 0; i < s.rows; ++i) column.data()[i] = o.sample_weights[i] / divisor;
    return sum(e * t.input(column));
}

}  // namespace detail

TENON_NAMESPACE_END
