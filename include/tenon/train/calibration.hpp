// tenon: calibrated uncertainty, measured on rows the network did not train on.
//
// Regression: split-conformal intervals (Lei et al. 2018), the prediction +-
// the conformal quantile of the calibration rows' |y - prediction|, or the
// normalized variant dividing each score by a per-row spread, so the band
// widens where the model is unsure. Classification: temperature scaling
// (Guo et al. 2017) fitted on the validation log loss, then conformal class
// sets with the score 1 - p(true class) (Sadinle et al. 2019). Full
// citations, sections (from memory): docs/design/calibration.md.
#pragma once

#include <algorithm>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <limits>
#include <optional>
#include <string>
#include <vector>

#include "tenon/format/calibration.hpp"
#include "tenon/core/compiled_once.hpp"
#include "tenon/prep/plan.hpp"
#include "tenon/train/metrics.hpp"
#include "tenon/train/trainer.hpp"
#include "tenon/train/workflow.hpp"

TENON_NAMESPACE_BEGIN

// --- the conformal quantile -------------------------------------------------------------------

/// The rank of the finite-sample conformal quantile among n sorted scores,
/// ceil((n + 1) * coverage) (Lei et al. 2018, section 2.2; Vovk et al. 2005).
/// It may be n + 1: then the quantile is +infinity (fewer than
/// coverage / (1 - coverage) rows). A product within 1e-9 above an integer
/// counts as that integer: a coverage such as 0.9 is not exact in binary.
inline std::size_t conformal_rank(std::size_t n, double coverage) {
    if (!(coverage > 0.0 && coverage < 1.0))
        raise(codes::core_argument_invalid, "conformal_rank: the coverage must lie strictly between 0 and 1, got " + number_to_text(coverage));
    const double x = static_cast<double>(n + 1) * coverage;
    double rank = std::ceil(x);
    if (rank - x > 1.0 - 1e-9) rank -= 1.0;
    return static_cast<std::size_t>(std::max(1.0, rank));
}

/// The conformal quantile of `scores` (the conformal_rank-th smallest;
/// +infinity when that rank exceeds the count). Ties count once each.
inline double conformal_quantile(std::vector<double> scores, double coverage) {
    const std::size_t rank = conformal_rank(scores.size(), coverage);
    if (rank > scores.size()) return std::numeric_limits<double>::infinity();
    for (double s : scores)
        if (std::isnan(s)) raise(codes::core_argument_invalid, "conformal_quantile: a score is NaN");
    std::nth_element(scores.begin(), scores.begin() + static_cast<std::ptrdiff_t>(rank - 1), scores.end());
    return scores[rank - 1];
}

// --- regression bands -------------------------------------------------------------------------

/// Fits a band on n calibration rows: predictions, true values and, when
/// not null, the per-row spreads (then the normalized variant as well).
inline interval_calibration fit_interval_calibration(const double* predicted, const double* actual, const double* spread, std::size_t n,
                                                     double coverage = default_coverage) {
    if (n == 0) raise(codes::core_argument_invalid, "fit_interval_calibration: no calibration rows");
    interval_calibration c;
    c.coverage = coverage;
    c.rows = n;
    std::vector<double> scores(n);
    for (std::size_t i = 0; i < n; ++i) {
        if (!std::isfinite(predicted[i]) || !std::isfinite(actual[i]))
            raise(codes::core_argument_invalid, "fit_interval_calibration: row " + std::to_string(i) + " has a non-finite prediction or value");
        scores[i] = std::abs(actual[i] - predicted[i]);
    }
    c.half_width = conformal_quantile(scores, coverage);
    if (spread) {
        double mean = 0.0;
        for (std::size_t i = 0; i < n; ++i) {
            if (!(spread[i] >= 0.0) || !std::isfinite(spread[i]))
                raise(codes::core_argument_invalid, "fit_interval_calibration: row " + std::to_string(i) + " has a negative or non-finite spread");
            mean += spread[i];
        }
        mean /= static_cast<double>(n);
        // 1% of the mean spread (common practice: a small constant added to
        // the scale, Lei et al. 2018, section 5.2, leave its size open).
        c.spread_floor = mean > 0.0 ? 0.01 * mean : 1e-12;
        for (std::size_t i = 0; i < n; ++i) scores[i] = std::abs(actual[i] - predicted[i]) / (spread[i] + c.spread_floor);
        c.has_spread = true;
        c.spread_quantile = conformal_quantile(scores, coverage);
    }
    return c;
}

/// Share of rows inside their band and the band's mean width.
struct interval_scores {
    std::size_t rows = 0;
    double coverage = 0.0;
    double mean_width = 0.0;
};

inline interval_scores score_intervals(const double* actual, const double* low, const double* high, std::size_t n) {
    interval_scores s;
    s.rows = n;
    if (n == 0) return s;
    std::size_t inside = 0;
    for (std::size_t i = 0; i < n; ++i) {
        inside += actual[i] >= low[i] && actual[i] <= high[i];
        s.mean_width += high[i] - low[i];
    }
    s.coverage = static_cast<double>(inside) / static_cast<double>(n);
    s.mean_width /= static_cast<double>(n);
    return s;
}

// --- temperature scaling ----------------------------------------------------------------------

/// The temperature that minimizes the mean log loss of softmax(logits / T)
/// on the given rows (Guo et al. 2017, section 4.2). The loss is convex in
/// b = 1/T (a log-sum-exp of functions linear in b), so Newton's method on b
/// with step halving finds the minimum; T is kept within [1e-3, 1e3].
template <class T>
double fit_temperature(const matrix<T>& logits, const std::vector<std::size_t>& labels) {
    const std::size_t rows = logits.shape()[0], cols = logits.shape()[1];
    if (rows == 0 || rows != labels.size())
        raise(codes::core_argument_invalid,
              "fit_temperature: " + std::to_string(rows) + " rows of logits for " + std::to_string(labels.size()) + " labels");
    for (auto y : labels)
        if (y >= cols)
            raise(codes::core_argument_invalid, "fit_temperature: a label is " + std::to_string(y) + ", not below " + std::to_string(cols));
    // Mean loss, its first and second derivatives in b, from shifted logits.
    const auto loss_at = [&](double b, double* gradient, double* curvature) {
        double loss = 0.0, g = 0.0, h = 0.0;
        for (std::size_t i = 0; i < rows; ++i) {
            const T* z = logits.data() + i * cols;
            const double m = static_cast<double>(*std::max_element(z, z + cols));
            double sum = 0.0, first = 0.0, second = 0.0;
            for (std::size_t j = 0; j < cols; ++j) {
                const double d = static_cast<double>(z[j]) - m;
                const double e = std::exp(b * d);
                sum += e;
                first += e * d;
                second += e * d * d;
            }
            const double mean_d = first / sum;
            const double d_true = static_cast<double>(z[labels[i]]) - m;
            loss += std::log(sum) - b * d_true;
            g += mean_d - d_true;
            h += second / sum - mean_d * mean_d;
        }
        const double n = static_cast<double>(rows);
        if (gradient) *gradient = g / n;
        if (curvature) *curvature = h / n;
        return loss / n;
    };
    constexpr double b_low = 1e-3, b_high = 1e3;
    double b = 1.0, g = 0.0, h = 0.0;
    double loss = loss_at(b, &g, &h);
    for (int iteration = 0; iteration < 100; ++iteration) {
        if (!(h > 0.0) || std::abs(g) < 1e-13) break;
        double step = -g / h, next = b, next_loss = loss;
        bool moved = false;
        for (int halving = 0; halving < 60; ++halving, step *= 0.5) {
            next = std::clamp(b + step, b_low, b_high);
            next_loss = loss_at(next, nullptr, nullptr);
            if (next_loss <= loss) {
                moved = true;
                break;
            }
        }
        if (!moved || next == b) break;
        b = next;
        loss = loss_at(b, &g, &h);
    }
    return 1.0 / b;
}

/// Expected calibration error over `bins` equal-width bins of the top
/// probability: sum over bins of |B|/n * |accuracy(B) - mean confidence(B)|
/// (Naeini, Cooper & Hauskrecht 2015; Guo et al. 2017, equation 3), on the
/// bins of reliability_bins.
template <class T>
double expected_calibration_error(const matrix<T>& probabilities, const std::vector<std::size_t>& labels, std::size_t bins = 15) {
    if (probabilities.shape()[0] == 0) raise(codes::core_argument_invalid, "expected_calibration_error: no rows");
    double ece = 0.0;
    for (const reliability_bin& b : reliability_bins(probabilities, labels, bins))
        ece += static_cast<double>(b.rows) * std::abs(b.accuracy - b.confidence);
    return ece / static_cast<double>(labels.size());
}

// --- class sets -------------------------------------------------------------------------------

/// Share of rows whose set holds the true class, and the mean set size.
struct set_scores {
    std::size_t rows = 0;
    double coverage = 0.0;
    double mean_size = 0.0;
};

template <class T>
set_scores score_class_sets(const class_calibration& c, const matrix<T>& probabilities, const std::vector<std::size_t>& labels) {
    const std::size_t rows = probabilities.shape()[0], classes = probabilities.shape()[1], w = class_set_words(classes);
    std::vector<std::uint64_t> words(rows * w);
    class_set_bits(c, probabilities.data(), rows, classes, words.data());
    set_scores s;
    s.rows = rows;
    if (rows == 0) return s;
    std::size_t covered = 0, members = 0;
    for (std::size_t i = 0; i < rows; ++i) {
        covered += static_cast<std::size_t>((words[i * w + labels[i] / 64] >> (labels[i] % 64)) & 1u);
        for (std::size_t k = 0; k < classes; ++k) members += static_cast<std::size_t>((words[i * w + k / 64] >> (k % 64)) & 1u);
    }
    s.coverage = static_cast<double>(covered) / static_cast<double>(rows);
    s.mean_size = static_cast<double>(members) / static_cast<double>(rows);
    return s;
}

/// Fits the temperature on the logits, then the set threshold on the
/// tempered probabilities of the same rows.
template <class T>
class_calibration fit_class_calibration(const matrix<T>& logits, const std::vector<std::size_t>& labels, double coverage = default_coverage) {
    class_calibration c;
    c.coverage = coverage;
    c.rows = labels.size();
    c.temperature = fit_temperature(logits, labels);
    const matrix<T> p = tempered_softmax_rows(logits, c.temperature);
    const std::size_t cols = p.shape()[1];
    std::vector<double> scores(labels.size());
    for (std::size_t i = 0; i < labels.size(); ++i) scores[i] = 1.0 - static_cast<double>(p.data()[i * cols + labels[i]]);
    c.set_threshold = conformal_quantile(scores, coverage);
    return c;
}

// --- whole models -----------------------------------------------------------------------------

/// How well a calibration holds on some rows (original units).
struct calibration_scores {
    bool classification = false;
    std::size_t rows = 0;
    // regression
    double interval_coverage = 0.0;
    double interval_mean_width = 0.0;
    // classification
    double set_coverage = 0.0;
    double set_mean_size = 0.0;
    double ece_uncalibrated = 0.0;  // softmax of the raw logits
    double ece = 0.0;  // after temperature scaling
    double log_loss_uncalibrated = 0.0;
    double log_loss = 0.0;
    // per row (regression) and per bin (classification), e.g. for a report
    std::vector<double> predicted, actual, low, high;
    std::vector<reliability_bin> reliability_uncalibrated, reliability;
};

namespace detail {

template <class T>
void original_units(const measured_plan& plan, const matrix<T>& outputs, const prepared_rows<T>& rows, std::vector<double>& predicted,
                    std::vector<double>& actual) {
    const scaling& ts = plan.target_scaling();
    predicted.resize(rows.rows.size());
    actual.resize(rows.rows.size());
    for (std::size_t i = 0; i < predicted.size(); ++i) {
        // As the predictor: the value is computed in double, then held in T.
        predicted[i] = static_cast<double>(static_cast<T>(ts.inverse(static_cast<double>(outputs.data()[i]))));
        actual[i] = ts.inverse(static_cast<double>(rows.targets.data()[i]));
    }
}

template <class T>
void require_rows(const prepared_rows<T>& rows, const char* who) {
    if (rows.rows.empty()) raise(codes::train_rows_empty, std::string(who) + ": no rows with a target to calibrate on");
}

}  // namespace detail

namespace detail {

// The calibration of outputs already computed on the calibration rows:
// logits (classification) or prepared values (regression), and, for an
// ensemble's regression, the members' spread per row in the target's units.
template <class T>
model_calibration calibrate_outputs(const measured_plan& plan, const matrix<T>& outputs, const std::vector<double>* spread,
                                    const prepared_rows<T>& rows, double coverage) {
    conformal_rank(rows.rows.size(), coverage);  // checks the coverage
    model_calibration c;
    if (plan.target_type() == target_kind::classification) {
        c.classes = fit_class_calibration(outputs, std::vector<std::size_t>(rows.classes.begin(), rows.classes.end()), coverage);
    } else {
        std::vector<double> predicted, actual;
        original_units(plan, outputs, rows, predicted, actual);
        c.interval = fit_interval_calibration(predicted.data(), actual.data(), spread ? spread->data() : nullptr, predicted.size(), coverage);
    }
    return c;
}

template <class T>
calibration_scores score_outputs(const measured_plan& plan, const model_calibration& c, const matrix<T>& outputs, const std::vector<double>* spread,
                                 const prepared_rows<T>& rows) {
    calibration_scores s;
    s.rows = rows.rows.size();
    if (plan.target_type() == target_kind::classification) {
        if (!c.classes) raise(codes::core_argument_invalid, "score_calibration: the calibration has no class part for a classification model");
        s.classification = true;
        const std::vector<std::size_t> labels(rows.classes.begin(), rows.classes.end());
        const matrix<T> raw = softmax_rows(outputs), tempered = tempered_softmax_rows(outputs, c.classes->temperature);
        s.ece_uncalibrated = expected_calibration_error(raw, labels);
        s.ece = expected_calibration_error(tempered, labels);
        s.reliability_uncalibrated = reliability_bins(raw, labels);
        s.reliability = reliability_bins(tempered, labels);
        s.log_loss_uncalibrated = log_loss(raw, labels);
        s.log_loss = log_loss(tempered, labels);
        const set_scores sets = score_class_sets(*c.classes, tempered, labels);
        s.set_coverage = sets.coverage;
        s.set_mean_size = sets.mean_size;
    } else {
        if (!c.interval) raise(codes::core_argument_invalid, "score_calibration: the calibration has no interval for a regression model");
        original_units(plan, outputs, rows, s.predicted, s.actual);
        s.low.resize(s.predicted.size());
        s.high.resize(s.predicted.size());
        interval_bounds<double>(*c.interval, s.predicted.data(), spread ? spread->data() : nullptr, s.predicted.size(), s.low.data(), s.high.data());
        const interval_scores i = score_intervals(s.actual.data(), s.low.data(), s.high.data(), s.actual.size());
        s.interval_coverage = i.coverage;
        s.interval_mean_width = i.mean_width;
    }
    return s;
}

// What a fitted model's calibration sees on prepared rows. One network: its
// logits or prepared values. A seed ensemble: for classification the log of
// the members' mean probabilities (softmax of it is that mean, so tempering
// it is temperature scaling of the ensemble; the predictor does the same),
// for regression the members' mean prepared value and the sample standard
// deviation (n - 1) of the members' values in the target's units, which
// drives the normalized band (Lakshminarayanan et al. 2017 for the spread
// of an ensemble as its uncertainty).
template <class T>
struct ensemble_view {
    matrix<T> outputs;
    std::vector<double> spread;
    bool has_spread = false;
};

template <class T>
ensemble_view<T> ensemble_outputs(const std::vector<const network<T>*>& nets, const measured_plan& plan, const prepared_rows<T>& rows) {
    ensemble_view<T> v;
    if (nets.size() == 1) {
        v.outputs = network_outputs(*nets.front(), rows.features);
        return v;
    }
    const bool classify = plan.target_type() == target_kind::classification;
    v.outputs = averaged_outputs(nets, classify, rows.features);
    if (classify) {
        const T tiny = std::numeric_limits<T>::min();
        for (std::size_t k = 0; k < v.outputs.size(); ++k) v.outputs.data()[k] = std::log(std::max(v.outputs.data()[k], tiny));
        return v;
    }
    const scaling& ts = plan.target_scaling();
    const std::size_t n = rows.rows.size(), count = nets.size();
    std::vector<std::vector<double>> values;
    for (const network<T>* net : nets) {
        const matrix<T> out = network_outputs(*net, rows.features);
        values.push_back({});
        for (std::size_t i = 0; i < n; ++i) values.back().push_back(ts.inverse(static_cast<double>(out.data()[i])));
    }
    v.spread.assign(n, 0.0);
    for (std::size_t i = 0; i < n; ++i) {
        double mean = 0.0, squares = 0.0;
        for (const auto& m : values) mean += m[i];
        mean /= static_cast<double>(count);
        for (const auto& m : values) squares += (m[i] - mean) * (m[i] - mean);
        v.spread[i] = std::sqrt(squares / static_cast<double>(count - 1));
    }
    v.has_spread = true;
    return v;
}

template <class T>
ensemble_view<T> ensemble_outputs(const fitted_model<T>& model, const prepared_rows<T>& rows) {
    return ensemble_outputs(member_networks(model), model.plan, rows);
}

}  // namespace detail

/// Calibrates a network with its plan on prepared rows it did not train on
/// (e.g. the validation rows) at the given nominal coverage. A single
/// network's band has one half width (no spread to scale it by).
template <class T>
model_calibration calibrate_network(const network<T>& net, const measured_plan& plan, const prepared_rows<T>& rows,
                                    double coverage = default_coverage) {
    detail::require_rows(rows, "calibrate_network");
    return detail::calibrate_outputs(plan, network_outputs(net, rows.features), nullptr, rows, coverage);
}

/// Scores a calibration on prepared rows (e.g. the test rows).
template <class T>
calibration_scores score_calibration(const network<T>& net, const measured_plan& plan, const model_calibration& c, const prepared_rows<T>& rows) {
    detail::require_rows(rows, "score_calibration");
    return detail::score_outputs(plan, c, network_outputs(net, rows.features), nullptr, rows);
}

/// Calibrates a fitted model (one network or a seed ensemble) on `rows` of
/// `t` (rows it did not train on). An ensemble's regression band is also
/// fitted in its normalized form, scaled by the members' spread per row.
template <class T>
model_calibration calibrate_model(const fitted_model<T>& model, const table& t, const std::vector<std::size_t>& rows,
                                  double coverage = default_coverage) {
    const prepared_rows<T> p = model.plan.template apply<T>(t, rows);
    detail::require_rows(p, "calibrate_model");
    const detail::ensemble_view<T> v = detail::ensemble_outputs(model, p);
    return detail::calibrate_outputs(model.plan, v.outputs, v.has_spread ? &v.spread : nullptr, p, coverage);
}

/// Scores a calibration of a fitted model on `rows` of `t`.
template <class T>
calibration_scores score_calibration(const fitted_model<T>& model, const model_calibration& c, const table& t, const std::vector<std::size_t>& rows) {
    const prepared_rows<T> p = model.plan.template apply<T>(t, rows);
    detail::require_rows(p, "score_calibration");
    const detail::ensemble_view<T> v = detail::ensemble_outputs(model, p);
    return detail::score_outputs(model.plan, c, v.outputs, v.has_spread ? &v.spread : nullptr, p);
}

TENON_NAMESPACE_END

// The compiled-once mode (core/compiled_once.hpp).
#if defined(TENON_DETAIL_TRAIN_INSTANCE)
TENON_NAMESPACE_BEGIN
#define TENON_DETAIL_CALIBRATION_INSTANCES(T)                                                                                                        \
    TENON_DETAIL_TRAIN_INSTANCE model_calibration calibrate_model<T>(const fitted_model<T>&, const table&, const std::vector<std::size_t>&, double); \
    TENON_DETAIL_TRAIN_INSTANCE calibration_scores score_calibration<T>(const fitted_model<T>&, const model_calibration&, const table&,              \
                                                                        const std::vector<std::size_t>&);
TENON_DETAIL_CALIBRATION_INSTANCES(float)
TENON_DETAIL_CALIBRATION_INSTANCES(double)
#undef TENON_DETAIL_CALIBRATION_INSTANCES
TENON_NAMESPACE_END
#endif
