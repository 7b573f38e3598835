// tenon: drift monitoring, comparing recent rows with the training rows.
//
// measure_drift() compares, per input column, the reference summary a model
// file keeps of its training rows (prep/reference.hpp) with a window of
// recent raw rows, and gives two numbers per column: the population
// stability index (PSI) over bins, flagged only above its own sampling noise
// under no change, and the two-sample Kolmogorov-Smirnov statistic for
// numeric and date/time columns. Window cells that cannot be read as the
// reference's kind are counted as unreadable and binned as missing.
// Bins, formulas, noise floor, thresholds and sources: docs/design/drift.md.
#pragma once

#include <algorithm>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <cstdio>
#include <limits>
#include <string>
#include <utility>
#include <vector>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"
#include "tenon/core/random.hpp"
#include "tenon/core/json_text.hpp"
#include "tenon/prep/reference.hpp"
#include "tenon/prep/cell_parsing.hpp"
#include "tenon/prep/table.hpp"

TENON_NAMESPACE_BEGIN

/// A column's drift verdict.
enum class drift_status : std::uint8_t { stable, watch, drifted };

inline const char* to_string(drift_status s) noexcept {
    switch (s) {
    case drift_status::stable: return "stable";
    case drift_status::watch: return "watch";
    case drift_status::drifted: return "drifted";
    }
    return "unknown";
}
/// The former spelling of to_string(drift_status).
inline const char* drift_status_name(drift_status v) noexcept { return to_string(v); }

struct drift_options {
    /// PSI above this marks a column "watch" (0.1: common practice).
    double psi_watch = 0.10;
    /// PSI above this flags a column as drifted (0.25: common practice).
    double psi_threshold = 0.25;
    /// D above this flags a column; 0 = the critical value at ks_significance.
    double ks_threshold = 0.0;
    /// Level of the Kolmogorov-Smirnov critical value, in (0, 1).
    double ks_significance = 0.01;
    /// Floor of a bin's share in the PSI sum, in (0, 0.01].
    double empty_bin_share = 1e-4;
    /// Probability that unchanged data exceed the PSI noise floor, in [0, 0.5];
    /// 0 turns the floor off (see docs/design/drift.md).
    double psi_noise_significance = 0.01;
    /// Draws of the PSI under no change that the noise floor is taken from,
    /// at least 20.
    std::size_t psi_noise_draws = 400;
};

/// One bin of a column's PSI.
struct drift_bin {
    std::string label;  // "[20, 30)", "< 20", "> 120", "(missing)", a category, "x (unseen)"
    std::uint64_t reference_count = 0;
    std::uint64_t window_count = 0;
    double reference_share = 0.0;  // before the floor
    double window_share = 0.0;
    double contribution = 0.0;  // (a - e) ln(a / e) with floored shares
};

/// Drift of one input column.
struct feature_drift {
    std::string column;
    column_kind kind = column_kind::numeric;
    std::uint64_t reference_rows = 0;  // training rows summarized (present + missing)
    std::uint64_t window_rows = 0;
    std::uint64_t window_missing = 0;  // missing in the window (unreadable included)
    std::uint64_t unreadable = 0;  // cells not readable as the column's kind
    std::uint64_t below_range = 0;  // numeric: window values below the training minimum
    std::uint64_t above_range = 0;  // numeric: window values above the training maximum
    double psi = 0.0;
    /// The PSI that unchanged data exceed with probability psi_noise_significance
    /// for these window and reference sizes (0 when the floor is off).
    double psi_noise = 0.0;
    double ks = std::numeric_limits<double>::quiet_NaN();  // NaN for categorical columns or no values
    /// How far ks may be from the exact two-sample D: 0 (exact), 1/1024
    /// (quantile points) or the largest histogram share (older summaries).
    double ks_error_bound = std::numeric_limits<double>::quiet_NaN();
    double ks_limit = std::numeric_limits<double>::quiet_NaN();  // the D that flags the column
    bool psi_flag = false;
    bool ks_flag = false;
    drift_status status = drift_status::stable;
    std::vector<drift_bin> bins;
    /// Categorical: categories the training rows never held, with window counts.
    std::vector<std::pair<std::string, std::uint64_t>> unseen_categories;

    bool drifted() const noexcept { return status == drift_status::drifted; }
};

struct drift_report {
    std::uint64_t window_rows = 0;
    drift_options options;
    std::vector<feature_drift> features;  // in the reference order (the plan's input columns)

    std::size_t drifted_count() const noexcept {
        std::size_t n = 0;
        for (const auto& f : features) n += f.drifted() ? 1 : 0;
        return n;
    }
    bool any_drift() const noexcept { return drifted_count() > 0; }
    /// The column's result; raises prep.column.unknown for another name.
    const feature_drift& feature(const std::string& column_name) const {
        for (const auto& f : features)
            if (f.column == column_name) return f;
        raise(codes::prep_column_unknown, "drift report: no column named '" + column_name + "'");
    }
};

// --- the statistics --------------------------------------------------------------------------

/// PSI of two distributions over the same bins (shares, each summing to 1),
/// every share floored at `empty_bin_share` (see docs/design/drift.md).
inline double population_stability_index(const std::vector<double>& reference_shares, const std::vector<double>& window_shares,
                                         double empty_bin_share = 1e-4) {
    if (reference_shares.size() != window_shares.size())
        raise(codes::core_shape_mismatch,
              "population_stability_index: " + std::to_string(reference_shares.size()) + " reference bins but " +
                  std::to_string(window_shares.size()) + " window bins");
    if (!(empty_bin_share > 0.0 && empty_bin_share <= 0.01))
        raise(codes::deploy_drift_option, "population_stability_index: empty_bin_share must be in (0, 0.01], got " + std::to_string(empty_bin_share));
    double psi = 0.0;
    for (std::size_t i = 0; i < reference_shares.size(); ++i) {
        const double e = std::max(reference_shares[i], empty_bin_share), a = std::max(window_shares[i], empty_bin_share);
        psi += (a - e) * std::log(a / e);
    }
    return psi;
}

/// The exact two-sample Kolmogorov-Smirnov statistic D = sup |F_a - F_b|
/// of two samples' empirical CDFs (NaN values are not allowed).
inline double ks_two_sample(std::vector<double> a, std::vector<double> b) {
    if (a.empty() || b.empty()) raise(codes::core_argument_invalid, "ks_two_sample: both samples need at least one value");
    for (const auto* s : {&a, &b})
        for (double v : *s)
            if (std::isnan(v)) raise(codes::core_argument_invalid, "ks_two_sample: a sample holds NaN");
    std::sort(a.begin(), a.end());
    std::sort(b.begin(), b.end());
    const double na = static_cast<double>(a.size()), nb = static_cast<double>(b.size());
    std::size_t i = 0, j = 0;
    double d = 0.0;
    // Both CDFs only jump at sample values: step past every copy of the
    // smallest value not yet passed, then compare.
    while (i < a.size() || j < b.size()) {
        const double x = i == a.size() ? b[j] : j == b.size() ? a[i] : std::min(a[i], b[j]);
        while (i < a.size() && a[i] == x) ++i;
        while (j < b.size() && b[j] == x) ++j;
        d = std::max(d, std::abs(static_cast<double>(i) / na - static_cast<double>(j) / nb));
    }
    return d;
}

/// The reference's CDF at x as measure_drift uses it: the ogive of the
/// histogram (linear within each bin), a step when minimum == maximum.
inline double reference_cdf(const feature_reference& f, double x) {
    if (f.histogram.empty() || !(x >= f.minimum)) return 0.0;
    if (x >= f.maximum) return 1.0;  // for minimum == maximum: the step at the one value
    std::uint64_t total = 0;
    for (auto c : f.histogram) total += c;
    if (total == 0) return 0.0;
    const double bins = static_cast<double>(f.histogram.size());
    const double position = (x - f.minimum) / (f.maximum - f.minimum) * bins;  // in [0, bins)
    const auto bin = std::min(static_cast<std::size_t>(position), f.histogram.size() - 1);
    std::uint64_t before = 0;
    for (std::size_t k = 0; k < bin; ++k) before += f.histogram[k];
    const double within = position - static_cast<double>(bin);
    return (static_cast<double>(before) + within * static_cast<double>(f.histogram[bin])) / static_cast<double>(total);
}

/// D between the reference's CDF (reference_cdf) and the window values'
/// empirical CDF. The reference CDF is continuous except for the step of a
/// one-value reference, and the window's is constant between its values, so
/// the supremum is reached at a window value or at that step, from one side
/// or the other: those points are all that is checked.
inline double ks_against_reference(const feature_reference& f, std::vector<double> window) {
    if (window.empty() || f.histogram.empty()) return std::numeric_limits<double>::quiet_NaN();
    std::sort(window.begin(), window.end());
    const double m = static_cast<double>(window.size());
    const auto left_cdf = [&](double x) {  // the reference CDF just below x
        if (x <= f.minimum) return 0.0;
        return reference_cdf(f, x);  // continuous for x > minimum
    };
    double d = 0.0;
    std::size_t i = 0;
    while (i < window.size()) {
        const double x = window[i];
        const double below = static_cast<double>(i) / m;  // window CDF just below x
        while (i < window.size() && window[i] == x) ++i;
        const double at = static_cast<double>(i) / m;  // window CDF at x
        d = std::max({d, std::abs(left_cdf(x) - below), std::abs(reference_cdf(f, x) - at)});
    }
    if (f.minimum == f.maximum) {  // the step of a one-value reference
        const double below = static_cast<double>(std::lower_bound(window.begin(), window.end(), f.minimum) - window.begin()) / m;
        const double at = static_cast<double>(std::upper_bound(window.begin(), window.end(), f.minimum) - window.begin()) / m;
        d = std::max({d, below, 1.0 - at});
    }
    return d;
}

/// The large-sample two-sample critical value of D at level `significance`
/// for samples of n and m values (Smirnov 1948, from memory; see the top).
inline double ks_critical_value(double significance, std::uint64_t n, std::uint64_t m) {
    if (!(significance > 0.0 && significance < 1.0))
        raise(codes::deploy_drift_option, "ks_critical_value: the significance must be in (0, 1), got " + std::to_string(significance));
    if (n == 0 || m == 0) return std::numeric_limits<double>::quiet_NaN();
    const double c = std::sqrt(-std::log(significance / 2.0) / 2.0);
    const double dn = static_cast<double>(n), dm = static_cast<double>(m);
    return c * std::sqrt((dn + dm) / (dn * dm));
}

/// The upper-tail standard normal quantile z with P(Z > z) = p, p in (0, 1):
/// Abramowitz & Stegun (1964) 26.2.23, absolute error below 4.5e-4.
inline double normal_upper_quantile(double p) {
    if (!(p > 0.0 && p < 1.0)) raise(codes::core_argument_invalid, "normal_upper_quantile: p must be in (0, 1), got " + std::to_string(p));
    const double q = p <= 0.5 ? p : 1.0 - p;
    const double t = std::sqrt(-2.0 * std::log(q));
    const double z = t - (2.515517 + 0.802853 * t + 0.010328 * t * t) / (1.0 + 1.432788 * t + 0.189269 * t * t + 0.001308 * t * t * t);
    return p <= 0.5 ? z : -z;
}

/// The chi-square quantile with `degrees` degrees of freedom exceeded with
/// probability p: Wilson & Hilferty (1931), chi2 ~ k (1 - 2/(9k) + z sqrt(2/(9k)))^3.
inline double chi_square_upper_quantile(double degrees, double p) {
    if (!(degrees > 0.0)) raise(codes::core_argument_invalid, "chi_square_upper_quantile: degrees of freedom must be positive");
    const double z = normal_upper_quantile(p), v = 2.0 / (9.0 * degrees);
    const double c = std::max(0.0, 1.0 - v + z * std::sqrt(v));
    return degrees * c * c * c;
}

/// PSI's noise floor for `bins` reference bins holding rows, n reference and
/// m window rows: (1/n + 1/m) chi2_{bins-1}(1 - significance) (see the top
/// of this file). 0 for fewer than two bins, no rows or significance 0.
inline double psi_noise_floor(std::size_t bins, std::uint64_t n, std::uint64_t m, double significance) {
    if (significance == 0.0 || bins < 2 || n == 0 || m == 0) return 0.0;
    return (1.0 / static_cast<double>(n) + 1.0 / static_cast<double>(m)) * chi_square_upper_quantile(static_cast<double>(bins - 1), significance);
}

/// The reference's CDF as a step function from its distribution (exact
/// with distinct values, G of reference.hpp with quantile points): the
/// points where it rises and its value from each point on.
inline std::vector<std::pair<double, double>> reference_steps(const feature_reference& f) {
    std::vector<std::pair<double, double>> steps;
    if (!f.distinct.empty()) {
        std::uint64_t total = 0, running = 0;
        for (const auto& kv : f.distinct) total += kv.second;
        for (const auto& kv : f.distinct) {
            running += kv.second;
            steps.emplace_back(kv.first, static_cast<double>(running) / static_cast<double>(total));
        }
    } else if (f.quantile_points.size() >= 2) {
        const double steps_k = static_cast<double>(f.quantile_points.size() - 1);
        for (std::size_t k = 0; k < f.quantile_points.size(); ++k) {
            const double share = static_cast<double>(k) / steps_k;
            if (!steps.empty() && steps.back().first == f.quantile_points[k])
                steps.back().second = share;  // ties: the largest k
            else
                steps.emplace_back(f.quantile_points[k], share);
        }
    }
    return steps;
}

/// D between a step reference CDF (reference_steps) and the window values'
/// empirical CDF: both are right-continuous steps, so the supremum is
/// reached at a point where one of them rises, with both evaluated there.
inline double ks_against_steps(const std::vector<std::pair<double, double>>& steps, std::vector<double> window) {
    if (window.empty() || steps.empty()) return std::numeric_limits<double>::quiet_NaN();
    std::sort(window.begin(), window.end());
    const double m = static_cast<double>(window.size());
    std::size_t i = 0, j = 0;
    double reference = 0.0, d = 0.0;
    while (i < steps.size() || j < window.size()) {
        const double x = i == steps.size() ? window[j] : j == window.size() ? steps[i].first : std::min(steps[i].first, window[j]);
        while (i < steps.size() && steps[i].first <= x) reference = steps[i++].second;
        while (j < window.size() && window[j] <= x) ++j;
        d = std::max(d, std::abs(reference - static_cast<double>(j) / m));
    }
    return d;
}

namespace detail {

inline void check_drift_options(const drift_options& o) {
    const auto fail = [](const std::string& what) { raise(codes::deploy_drift_option, "drift options: " + what); };
    if (!(o.psi_threshold > 0.0 && std::isfinite(o.psi_threshold)))
        fail("psi_threshold must be positive and finite, got " + std::to_string(o.psi_threshold));
    if (!(o.psi_watch >= 0.0 && o.psi_watch <= o.psi_threshold))
        fail("psi_watch must be in [0, psi_threshold = " + std::to_string(o.psi_threshold) + "], got " + std::to_string(o.psi_watch));
    if (!(o.ks_threshold >= 0.0 && o.ks_threshold <= 1.0)) fail("ks_threshold must be in [0, 1], got " + std::to_string(o.ks_threshold));
    if (!(o.ks_significance > 0.0 && o.ks_significance < 1.0)) fail("ks_significance must be in (0, 1), got " + std::to_string(o.ks_significance));
    if (!(o.empty_bin_share > 0.0 && o.empty_bin_share <= 0.01))
        fail("empty_bin_share must be in (0, 0.01], got " + std::to_string(o.empty_bin_share));
    if (!(o.psi_noise_significance >= 0.0 && o.psi_noise_significance <= 0.5))
        fail("psi_noise_significance must be in [0, 0.5], got " + std::to_string(o.psi_noise_significance));
    if (o.psi_noise_draws < 20) fail("psi_noise_draws must be at least 20, got " + std::to_string(o.psi_noise_draws));
}

// The label of the bin [low, high) (or [low, high] for the last) of a
// whole-number column: the whole numbers it holds; empty when it holds none.
inline std::string whole_number_label(double low, double high, bool last) {
    const double first = std::ceil(low);
    const double final_value = last ? std::floor(high) : std::ceil(high) - 1.0;
    if (first > final_value) return std::string();
    if (first == final_value) return short_number(first);
    return short_number(first) + " to " + short_number(final_value);
}

// Reads a window cell as a number (numeric and date/time references):
// 0 = value, 1 = missing, 2 = unreadable.
inline int window_number(const column& c, std::size_t r, column_kind wanted, double& value) {
    if (c.is_missing(r)) return 1;
    if (c.kind() != column_kind::categorical) {
        value = c.number(r);
        return 0;
    }
    const std::string_view text = trim_blanks(c.category(r));
    const bool ok = wanted == column_kind::datetime ? parse_datetime(text, value) || parse_number(text, value) : parse_number(text, value);
    return ok ? 0 : 2;
}

inline void finish_bins(feature_drift& f, std::uint64_t reference_total, double floor_share) {
    std::vector<double> e, a;
    for (auto& b : f.bins) {
        b.reference_share = reference_total ? static_cast<double>(b.reference_count) / static_cast<double>(reference_total) : 0.0;
        b.window_share = static_cast<double>(b.window_count) / static_cast<double>(f.window_rows);
        const double fe = std::max(b.reference_share, floor_share), fa = std::max(b.window_share, floor_share);
        b.contribution = (fa - fe) * std::log(fa / fe);
        e.push_back(b.reference_share);
        a.push_back(b.window_share);
    }
    f.psi = population_stability_index(e, a, floor_share);
}

// A binomial(trials, p) draw: the second waiting-time method (geometric
// gaps between successes) when trials p is below 30, else the normal
// approximation of de Moivre and Laplace, rounded and clamped (Devroye 1986,
// "Non-Uniform Random Variate Generation", sections X.4 and X.1).
inline std::uint64_t binomial_draw(random_engine& rng, std::uint64_t trials, double p) {
    if (trials == 0 || !(p > 0.0)) return 0;
    if (p >= 1.0) return trials;
    if (p > 0.5) return trials - binomial_draw(rng, trials, 1.0 - p);
    const double n = static_cast<double>(trials), mean = n * p;
    if (mean < 30.0) {
        const double log_q = std::log1p(-p);
        std::uint64_t successes = 0;
        double position = 0.0;
        for (;;) {
            position += std::floor(std::log(1.0 - rng.uniform01<double>()) / log_q) + 1.0;
            if (position > n) return successes;
            ++successes;
        }
    }
    const double draw = std::round(mean + std::sqrt(mean * (1.0 - p)) * rng.normal<double>());
    return draw <= 0.0 ? 0 : draw >= n ? trials : static_cast<std::uint64_t>(draw);
}

// Multinomial counts of `trials` over `shares` (summing to 1) by successive
// conditional binomials.
inline void multinomial_draw(random_engine& rng, std::uint64_t trials, const std::vector<double>& shares, std::vector<double>& counts) {
    counts.assign(shares.size(), 0.0);
    double rest = 1.0;
    for (std::size_t k = 0; k < shares.size() && trials > 0; ++k) {
        const std::uint64_t c = k + 1 == shares.size() ? trials : binomial_draw(rng, trials, rest > 0.0 ? shares[k] / rest : 1.0);
        counts[k] = static_cast<double>(c);
        trials -= c;
        rest -= shares[k];
    }
}

// The PSI noise floor by simulation (see docs/design/drift.md): reference
// shares of the bins the reference holds, and the probability of values
// the reference never held.
inline double simulated_psi_noise(const std::vector<double>& reference_shares, double new_value_probability, std::uint64_t n, std::uint64_t m,
                                  const drift_options& o, std::uint64_t seed) {
    if (o.psi_noise_significance == 0.0 || n == 0 || m == 0 || reference_shares.empty()) return 0.0;
    const double p_new = std::min(0.5, std::max(0.0, new_value_probability));
    std::vector<double> window_shares;
    for (double e : reference_shares) window_shares.push_back(e * (1.0 - p_new));
    window_shares.push_back(p_new);
    const bool fixed_reference = n >= 20 * m;
    random_engine rng(seed, 0x9510u);
    std::vector<double> psis, reference_counts, window_counts;
    psis.reserve(o.psi_noise_draws);
    for (std::size_t draw = 0; draw < o.psi_noise_draws; ++draw) {
        if (fixed_reference) {
            reference_counts.assign(reference_shares.begin(), reference_shares.end());
            for (auto& c : reference_counts) c *= static_cast<double>(n);
        } else {
            multinomial_draw(rng, n, reference_shares, reference_counts);
        }
        multinomial_draw(rng, m, window_shares, window_counts);
        double psi = 0.0;
        for (std::size_t k = 0; k < window_shares.size(); ++k) {
            const double e = std::max(k < reference_counts.size() ? reference_counts[k] / static_cast<double>(n) : 0.0, o.empty_bin_share);
            const double a = std::max(window_counts[k] / static_cast<double>(m), o.empty_bin_share);
            psi += (a - e) * std::log(a / e);
        }
        psis.push_back(psi);
    }
    std::sort(psis.begin(), psis.end());
    const auto rank = static_cast<std::size_t>(std::ceil((1.0 - o.psi_noise_significance) * static_cast<double>(psis.size())));
    return psis[std::min(psis.size() - 1, rank == 0 ? 0 : rank - 1)];
}

// The noise floor of a finished column.
inline void set_psi_noise(feature_drift& f, const feature_reference& ref, const drift_options& o, std::uint64_t seed) {
    std::vector<double> shares;
    for (const auto& b : f.bins)
        if (b.reference_count > 0) shares.push_back(static_cast<double>(b.reference_count) / static_cast<double>(f.reference_rows));
    double p_new = 0.0;
    std::uint64_t seen_once = 0;
    if (ref.kind == column_kind::categorical) {
        for (const auto& kv : ref.categories) seen_once += kv.second == 1 ? 1 : 0;
    } else {
        p_new = ref.present ? 2.0 / static_cast<double>(ref.present + 1) : 0.0;
        for (const auto& kv : ref.distinct) seen_once += kv.second == 1 ? 1 : 0;
    }
    if (ref.present) p_new += static_cast<double>(seen_once) / static_cast<double>(ref.present);
    f.psi_noise = simulated_psi_noise(shares, p_new, f.reference_rows, f.window_rows, o, seed);
}

inline feature_drift numeric_drift(const feature_reference& ref, const column& c, const std::vector<std::size_t>& rows, const drift_options& o) {
    feature_drift f;
    f.column = ref.column;
    f.kind = ref.kind;
    f.reference_rows = ref.present + ref.missing;
    f.window_rows = rows.size();
    // One bin per training value when there are no more values than
    // histogram bins (counts, modes, settings), else the histogram's.
    const bool per_value = !ref.distinct.empty() && ref.distinct.size() <= ref.histogram.size();
    const std::size_t bins = per_value ? ref.distinct.size() + 1 : ref.histogram.size();
    // bins: histogram (or values, then "between values")..., below, above, missing
    f.bins.resize(bins + 3);
    const double width = ref.histogram.empty() ? 0.0 : (ref.maximum - ref.minimum) / static_cast<double>(ref.histogram.size());
    if (per_value) {
        for (std::size_t k = 0; k < ref.distinct.size(); ++k) {
            f.bins[k].label = short_number(ref.distinct[k].first);
            f.bins[k].reference_count = ref.distinct[k].second;
        }
        f.bins[bins - 1].label = "(between values)";
    } else {
        for (std::size_t k = 0; k < bins; ++k) {
            const double low = ref.minimum + width * static_cast<double>(k);
            const double high = k + 1 == bins ? ref.maximum : ref.minimum + width * static_cast<double>(k + 1);
            if (ref.whole_numbers) {
                f.bins[k].label = whole_number_label(low, high, k + 1 == bins);
                if (f.bins[k].label.empty()) f.bins[k].label = "(none in " + short_number(low) + " to " + short_number(high) + ")";
            } else {
                f.bins[k].label = "[" + short_number(low) + ", " + short_number(high) + (k + 1 == bins ? "]" : ")");
            }
            f.bins[k].reference_count = ref.histogram[k];
        }
    }
    f.bins[bins].label = bins ? "< " + short_number(ref.minimum) : "(values)";
    f.bins[bins + 1].label = "> " + short_number(ref.maximum);
    f.bins[bins + 2].label = "(missing)";
    f.bins[bins + 2].reference_count = ref.missing;
    std::vector<double> values;
    values.reserve(rows.size());
    for (auto r : rows) {
        double v = 0.0;
        const int state = window_number(c, r, ref.kind, v);
        if (state != 0) {
            ++f.window_missing;
            f.unreadable += state == 2 ? 1 : 0;
            ++f.bins[bins + 2].window_count;
            continue;
        }
        values.push_back(v);
        if (bins == 0) {
            ++f.bins[bins].window_count;  // no training values: every value is new
        } else if (v < ref.minimum) {
            ++f.below_range;
            ++f.bins[bins].window_count;
        } else if (v > ref.maximum) {
            ++f.above_range;
            ++f.bins[bins + 1].window_count;
        } else if (per_value) {
            const auto at = std::lower_bound(ref.distinct.begin(), ref.distinct.end(), v,
                                             [](const std::pair<double, std::uint64_t>& kv, double x) { return kv.first < x; });
            const bool known = at != ref.distinct.end() && at->first == v;
            ++f.bins[known ? static_cast<std::size_t>(at - ref.distinct.begin()) : bins - 1].window_count;
        } else {
            ++f.bins[ref.bin_of(v)].window_count;
        }
    }
    // Whole-number bins that hold no whole number are empty on both sides: left out.
    if (ref.whole_numbers && !per_value)
        f.bins.erase(std::remove_if(f.bins.begin(), f.bins.end(),
                                    [](const drift_bin& b) { return b.label.rfind("(none in ", 0) == 0 && b.window_count == 0; }),
                     f.bins.end());
    finish_bins(f, ref.present + ref.missing, o.empty_bin_share);
    double slack = 0.0;  // how far D may exceed the exact value
    if (ref.has_distribution()) {
        f.ks = ks_against_steps(reference_steps(ref), values);
        f.ks_error_bound = ref.distinct.empty() ? 1.0 / static_cast<double>(ref.quantile_points.size() - 1) : 0.0;
        slack = f.ks_error_bound;
    } else {
        f.ks = ks_against_reference(ref, values);  // a summary from before section REFD: the ogive
        std::uint64_t largest = 0;
        for (auto h : ref.histogram) largest = std::max(largest, h);
        f.ks_error_bound = ref.present ? static_cast<double>(largest) / static_cast<double>(ref.present) : 0.0;
    }
    if (!values.empty() && ref.present > 0)
        f.ks_limit = o.ks_threshold > 0.0 ? o.ks_threshold : ks_critical_value(o.ks_significance, ref.present, values.size());
    f.ks_flag = std::isfinite(f.ks) && f.ks - slack > f.ks_limit;
    return f;
}

inline feature_drift categorical_drift(const feature_reference& ref, const column& c, const std::vector<std::size_t>& rows, const drift_options& o) {
    feature_drift f;
    f.column = ref.column;
    f.kind = ref.kind;
    f.reference_rows = ref.present + ref.missing;
    f.window_rows = rows.size();
    for (const auto& kv : ref.categories) {
        drift_bin b;
        b.label = kv.first;
        b.reference_count = kv.second;
        f.bins.push_back(std::move(b));
    }
    std::vector<std::pair<std::string, std::uint64_t>> unseen;
    std::uint64_t missing = 0;
    for (auto r : rows) {
        if (c.is_missing(r)) {
            ++missing;
            continue;
        }
        const std::string text = c.kind() == column_kind::categorical ? c.category(r) : number_to_text(c.number(r));
        const auto known = std::lower_bound(ref.categories.begin(), ref.categories.end(), text,
                                            [](const std::pair<std::string, std::uint64_t>& kv, const std::string& t) { return kv.first < t; });
        if (known != ref.categories.end() && known->first == text) {
            ++f.bins[static_cast<std::size_t>(known - ref.categories.begin())].window_count;
            continue;
        }
        auto u = std::find_if(unseen.begin(), unseen.end(), [&](const auto& kv) { return kv.first == text; });
        if (u == unseen.end())
            unseen.emplace_back(text, 1);
        else
            ++u->second;
    }
    std::sort(unseen.begin(), unseen.end());
    for (const auto& kv : unseen) {
        drift_bin b;
        b.label = kv.first + " (unseen)";
        b.window_count = kv.second;
        f.bins.push_back(std::move(b));
    }
    drift_bin m;
    m.label = "(missing)";
    m.reference_count = ref.missing;
    m.window_count = missing;
    f.bins.push_back(std::move(m));
    f.window_missing = missing;
    f.unseen_categories = std::move(unseen);
    finish_bins(f, ref.present + ref.missing, o.empty_bin_share);
    return f;
}

}  // namespace detail

/// Drift of every column in `references` between the training rows they
/// summarize and `rows` of `window` (raw rows holding at least those
/// columns; other columns are ignored). Raises deploy.drift.empty_window
/// for no rows, deploy.input.missing_column when the window lacks a column,
/// deploy.drift.option for options out of range.
inline drift_report measure_drift(const std::vector<feature_reference>& references, const table& window, const std::vector<std::size_t>& rows,
                                  const drift_options& options = {}) {
    detail::check_drift_options(options);
    if (rows.empty()) raise(codes::deploy_drift_empty_window, "measure_drift: the window has no rows");
    for (auto r : rows)
        if (r >= window.row_count())
            raise(codes::prep_rows_out_of_range,
                  "measure_drift: row " + std::to_string(r) + " is not below the window's " + std::to_string(window.row_count()) + " rows");
    drift_report report;
    report.window_rows = rows.size();
    report.options = options;
    std::uint64_t seed = 0x5EEDu;  // fixed: a report is reproducible
    for (const auto& ref : references) {
        if (!window.contains(ref.column))
            raise(codes::deploy_input_missing_column, "measure_drift: the window has no column '" + ref.column + "' (the model reads it)");
        const column& c = window.at(ref.column);
        feature_drift f =
            ref.kind == column_kind::categorical ? detail::categorical_drift(ref, c, rows, options) : detail::numeric_drift(ref, c, rows, options);
        detail::set_psi_noise(f, ref, options, seed++);
        const bool above_noise = f.psi > f.psi_noise;
        f.psi_flag = f.psi > options.psi_threshold && above_noise;
        f.status = f.psi_flag || f.ks_flag             ? drift_status::drifted
            : f.psi > options.psi_watch && above_noise ? drift_status::watch
                                                       : drift_status::stable;
        report.features.push_back(std::move(f));
    }
    return report;
}

/// All rows of `window`.
inline drift_report measure_drift(const std::vector<feature_reference>& references, const table& window, const drift_options& options = {}) {
    std::vector<std::size_t> rows(window.row_count());
    for (std::size_t i = 0; i < rows.size(); ++i) rows[i] = i;
    return measure_drift(references, window, rows, options);
}

/// A plain-text table, one line per column: PSI, its noise floor, D, D's
/// limit, status and notes (values outside the training range, unseen categories, unreadable
/// cells).
inline std::string drift_table(const drift_report& r) {
    std::string out;
    char line[256];
    std::snprintf(line, sizeof line, "%-18s %-11s %9s %9s %8s %8s  %-8s %s\n", "column", "kind", "PSI", "PSI noise", "KS D", "D limit", "status",
                  "notes");
    out += line;
    for (const auto& f : r.features) {
        std::string notes;
        if (f.below_range) notes += std::to_string(f.below_range) + " below range; ";
        if (f.above_range) notes += std::to_string(f.above_range) + " above range; ";
        for (const auto& u : f.unseen_categories) notes += "unseen '" + u.first + "' x" + std::to_string(u.second) + "; ";
        if (f.unreadable) notes += std::to_string(f.unreadable) + " unreadable; ";
        if (f.psi_flag) notes += "PSI > " + detail::short_number(r.options.psi_threshold) + "; ";
        if (f.psi > r.options.psi_watch && !(f.psi > f.psi_noise)) notes += "PSI within noise; ";
        if (f.ks_flag) notes += "D > limit; ";
        if (notes.size() >= 2) notes.resize(notes.size() - 2);
        const auto number = [](double v) { return std::isfinite(v) ? detail::short_number(v) : std::string("-"); };
        std::snprintf(line, sizeof line, "%-18s %-11s %9s %9s %8s %8s  %-8s %s\n", f.column.c_str(), to_string(f.kind), number(f.psi).c_str(),
                      number(f.psi_noise).c_str(), number(f.ks).c_str(), number(f.ks_limit).c_str(), drift_status_name(f.status), notes.c_str());
        out += line;
    }
    return out;
}

/// The report as a JSON object (NaN as null).
inline std::string to_json(const drift_report& r) {
    using detail::json_bool;
    using detail::json_number;
    using detail::json_string;
    std::string out = "{\"window_rows\": " + std::to_string(r.window_rows) + ", \"drifted_columns\": " + std::to_string(r.drifted_count()) +
        ", \"options\": {\"psi_watch\": " + json_number(r.options.psi_watch) + ", \"psi_threshold\": " + json_number(r.options.psi_threshold) +
        ", \"ks_threshold\": " + json_number(r.options.ks_threshold) + ", \"ks_significance\": " + json_number(r.options.ks_significance) +
        ", \"empty_bin_share\": " + json_number(r.options.empty_bin_share) +
        ", \"psi_noise_significance\": " + json_number(r.options.psi_noise_significance) +
        ", \"psi_noise_draws\": " + std::to_string(r.options.psi_noise_draws) + "}, \"columns\": [";
    for (std::size_t i = 0; i < r.features.size(); ++i) {
        const feature_drift& f = r.features[i];
        out += i ? ", " : "";
        out += "{\"column\": " + json_string(f.column) + ", \"kind\": " + json_string(to_string(f.kind)) +
            ", \"status\": " + json_string(drift_status_name(f.status)) + ", \"psi\": " + json_number(f.psi) +
            ", \"psi_noise\": " + json_number(f.psi_noise) + ", \"psi_flag\": " + json_bool(f.psi_flag) + ", \"ks\": " + json_number(f.ks) +
            ", \"ks_limit\": " + json_number(f.ks_limit) + ", \"ks_flag\": " + json_bool(f.ks_flag) +
            ", \"ks_error_bound\": " + json_number(f.ks_error_bound) + ", \"reference_rows\": " + std::to_string(f.reference_rows) +
            ", \"window_rows\": " + std::to_string(f.window_rows) + ", \"window_missing\": " + std::to_string(f.window_missing) +
            ", \"unreadable\": " + std::to_string(f.unreadable) + ", \"below_range\": " + std::to_string(f.below_range) +
            ", \"above_range\": " + std::to_string(f.above_range) + ", \"unseen_categories\": {";
        for (std::size_t k = 0; k < f.unseen_categories.size(); ++k)
            out += (k ? ", " : "") + json_string(f.unseen_categories[k].first) + ": " + std::to_string(f.unseen_categories[k].second);
        out += "}, \"bins\": [";
        for (std::size_t k = 0; k < f.bins.size(); ++k) {
            const drift_bin& b = f.bins[k];
            out += (k ? ", " : "") + std::string("{\"label\": ") + json_string(b.label) +
                ", \"reference_count\": " + std::to_string(b.reference_count) + ", \"window_count\": " + std::to_string(b.window_count) +
                ", \"reference_share\": " + json_number(b.reference_share) + ", \"window_share\": " + json_number(b.window_share) +
                ", \"contribution\": " + json_number(b.contribution) + "}";
        }
        out += "]}";
    }
    return out + "]}";
}

TENON_NAMESPACE_END
