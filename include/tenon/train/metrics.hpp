// tenon: evaluation metrics for classification and regression.
//
// Classification: accuracy, the confusion matrix (rows: true class), per-class
// precision, recall and F1 with macro averages (Sokolova & Lapalme 2009,
// table 3), and log loss. Regression: mean absolute error, root mean squared
// error and R^2. Where a ratio is 0/0 the result is defined (common
// practice): a precision, recall or F1 is 0; R^2 of a constant truth is 1 if
// every prediction is exact, else 0; log loss clips probabilities to
// [1e-15, 1 - 1e-15]. Full conventions: docs/design/evaluation.md.
#pragma once

#include <algorithm>
#include <cmath>
#include <cstddef>
#include <string>
#include <vector>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"
#include "tenon/core/matrix.hpp"

TENON_NAMESPACE_BEGIN

/// Counts of (true class, predicted class) pairs.
class confusion_matrix {
public:
    explicit confusion_matrix(std::size_t class_count = 0) : classes_(class_count), counts_(class_count * class_count, 0) {}

    std::size_t class_count() const noexcept { return classes_; }

    void add(std::size_t truth, std::size_t predicted) {
        if (truth >= classes_ || predicted >= classes_) {
            raise(codes::core_argument_invalid,
                  "confusion_matrix: class index " + std::to_string(truth >= classes_ ? truth : predicted) + " outside [0, " +
                      std::to_string(classes_) + ")");
        }
        ++counts_[truth * classes_ + predicted];
    }

    /// Rows with true class `truth` predicted as `predicted`.
    std::size_t count(std::size_t truth, std::size_t predicted) const { return counts_.at(truth * classes_ + predicted); }

    std::size_t total() const noexcept {
        std::size_t s = 0;
        for (auto c : counts_) s += c;
        return s;
    }

private:
    std::size_t classes_;
    std::vector<std::size_t> counts_;
};

struct class_scores {
    double precision = 0.0;
    double recall = 0.0;
    double f1 = 0.0;
    std::size_t true_rows = 0;  // rows whose true class is this one
};

struct classification_scores {
    double accuracy = 0.0;
    double macro_precision = 0.0;
    double macro_recall = 0.0;
    double macro_f1 = 0.0;
    std::vector<class_scores> per_class;
    confusion_matrix confusion;
};

struct regression_scores {
    double mae = 0.0;
    double rmse = 0.0;
    double r2 = 0.0;
};

namespace detail {
inline void require_same_length(std::size_t a, std::size_t b, const char* what) {
    if (a != b) {
        raise(codes::core_shape_mismatch, std::string(what) + ": " + std::to_string(a) + " true values but " + std::to_string(b) + " predictions");
    }
    if (a == 0) raise(codes::core_argument_invalid, std::string(what) + ": no rows to score");
}
inline double ratio_or_zero(double num, double den) { return den > 0.0 ? num / den : 0.0; }
}  // namespace detail

/// Scores predicted class indices against true ones.
inline classification_scores score_classes(const std::vector<std::size_t>& truth, const std::vector<std::size_t>& predicted,
                                           std::size_t class_count) {
    detail::require_same_length(truth.size(), predicted.size(), "score_classes");
    classification_scores s;
    s.confusion = confusion_matrix(class_count);
    std::size_t correct = 0;
    for (std::size_t i = 0; i < truth.size(); ++i) {
        s.confusion.add(truth[i], predicted[i]);
        correct += truth[i] == predicted[i];
    }
    s.accuracy = static_cast<double>(correct) / static_cast<double>(truth.size());
    s.per_class.resize(class_count);
    for (std::size_t c = 0; c < class_count; ++c) {
        std::size_t predicted_as_c = 0, actually_c = 0;
        for (std::size_t k = 0; k < class_count; ++k) {
            predicted_as_c += s.confusion.count(k, c);
            actually_c += s.confusion.count(c, k);
        }
        const double tp = static_cast<double>(s.confusion.count(c, c));
        auto& pc = s.per_class[c];
        pc.true_rows = actually_c;
        pc.precision = detail::ratio_or_zero(tp, static_cast<double>(predicted_as_c));
        pc.recall = detail::ratio_or_zero(tp, static_cast<double>(actually_c));
        pc.f1 = detail::ratio_or_zero(2.0 * pc.precision * pc.recall, pc.precision + pc.recall);
        s.macro_precision += pc.precision;
        s.macro_recall += pc.recall;
        s.macro_f1 += pc.f1;
    }
    if (class_count > 0) {
        s.macro_precision /= static_cast<double>(class_count);
        s.macro_recall /= static_cast<double>(class_count);
        s.macro_f1 /= static_cast<double>(class_count);
    }
    return s;
}

/// Index of the largest value in each row (the first one on ties).
template <class T>
std::vector<std::size_t> row_argmax(const matrix<T>& scores) {
    const std::size_t rows = scores.shape()[0], cols = scores.shape()[1];
    std::vector<std::size_t> out(rows, 0);
    for (std::size_t i = 0; i < rows; ++i) {
        const T* r = scores.data() + i * cols;
        out[i] = static_cast<std::size_t>(std::max_element(r, r + cols) - r);
    }
    return out;
}

/// Mean negative log-probability of the true class: -1/n sum_i ln p_i,y_i.
/// `probabilities` is rows x classes, each row a distribution.
template <class T>
double log_loss(const matrix<T>& probabilities, const std::vector<std::size_t>& truth) {
    detail::require_same_length(truth.size(), probabilities.shape()[0], "log_loss");
    const std::size_t cols = probabilities.shape()[1];
    constexpr double clip = 1e-15;
    double total = 0.0;
    for (std::size_t i = 0; i < truth.size(); ++i) {
        if (truth[i] >= cols) {
            raise(codes::core_argument_invalid,
                  "log_loss: row " + std::to_string(i) + " has class " + std::to_string(truth[i]) + " but only " + std::to_string(cols) +
                      " probability columns");
        }
        const double p = std::clamp(static_cast<double>(probabilities.data()[i * cols + truth[i]]), clip, 1.0 - clip);
        total -= std::log(p);
    }
    return total / static_cast<double>(truth.size());
}

/// One bin of a reliability diagram: rows whose top probability falls in
/// it, their mean top probability and the share of them predicted right.
struct reliability_bin {
    double low = 0.0, high = 0.0;  // the bin's confidence range (low, high]
    std::size_t rows = 0;
    double confidence = 0.0;  // mean top probability (0 for an empty bin)
    double accuracy = 0.0;  // share with the top class right (0 for an empty bin)
};

/// `bins` equal-width bins of the top probability of each row (Naeini,
/// Cooper & Hauskrecht 2015; Guo et al. 2017, section 2): a confidence c
/// falls in bin ceil(c * bins) - 1 (c = 0 in the first).
template <class T>
std::vector<reliability_bin> reliability_bins(const matrix<T>& probabilities, const std::vector<std::size_t>& labels, std::size_t bins = 15) {
    const std::size_t rows = probabilities.shape()[0], cols = probabilities.shape()[1];
    if (rows != labels.size() || bins == 0 || cols == 0)
        raise(codes::core_argument_invalid,
              "reliability_bins: " + std::to_string(rows) + " rows for " + std::to_string(labels.size()) + " labels, " + std::to_string(bins) +
                  " bins, " + std::to_string(cols) + " classes");
    std::vector<reliability_bin> out(bins);
    for (std::size_t b = 0; b < bins; ++b) {
        out[b].low = static_cast<double>(b) / static_cast<double>(bins);
        out[b].high = static_cast<double>(b + 1) / static_cast<double>(bins);
    }
    for (std::size_t i = 0; i < rows; ++i) {
        const T* p = probabilities.data() + i * cols;
        const std::size_t best = static_cast<std::size_t>(std::max_element(p, p + cols) - p);
        const double c = static_cast<double>(p[best]);
        const double position = std::ceil(c * static_cast<double>(bins)) - 1.0;  // NaN: the first bin
        const std::size_t b = !(position > 0.0) ? 0 : position >= static_cast<double>(bins - 1) ? bins - 1 : static_cast<std::size_t>(position);
        out[b].rows += 1;
        out[b].confidence += c;  // sums until the division below
        out[b].accuracy += best == labels[i] ? 1.0 : 0.0;
    }
    for (auto& b : out)
        if (b.rows > 0) {
            b.confidence /= static_cast<double>(b.rows);
            b.accuracy /= static_cast<double>(b.rows);
        }
    return out;
}

/// MAE, RMSE and R^2 of n predictions (both arrays hold n values).
template <class T>
regression_scores score_values(const T* truth, const T* predicted, std::size_t n) {
    if (n == 0) raise(codes::core_argument_invalid, "score_values: no rows to score");
    double mean = 0.0;
    for (std::size_t i = 0; i < n; ++i) mean += static_cast<double>(truth[i]);
    mean /= static_cast<double>(n);
    double abs_sum = 0.0, sq_sum = 0.0, total_sq = 0.0;
    for (std::size_t i = 0; i < n; ++i) {
        const double e = static_cast<double>(truth[i]) - static_cast<double>(predicted[i]);
        const double d = static_cast<double>(truth[i]) - mean;
        abs_sum += std::abs(e);
        sq_sum += e * e;
        total_sq += d * d;
    }
    regression_scores s;
    s.mae = abs_sum / static_cast<double>(n);
    s.rmse = std::sqrt(sq_sum / static_cast<double>(n));
    s.r2 = total_sq > 0.0 ? 1.0 - sq_sum / total_sq : (sq_sum == 0.0 ? 1.0 : 0.0);
    return s;
}

template <class T>
regression_scores score_values(const std::vector<T>& truth, const std::vector<T>& predicted) {
    detail::require_same_length(truth.size(), predicted.size(), "score_values");
    return score_values(truth.data(), predicted.data(), truth.size());
}

TENON_NAMESPACE_END
