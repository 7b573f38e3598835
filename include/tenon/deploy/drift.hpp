// tenon: drift monitoring, comparing recent rows with the training rows.
//
// measure_drift() compares, per input column, the reference summary a model
// file keeps of its training rows (deploy/reference.hpp) with a window of
// recent raw rows, and gives two numbers per column:
//
// Population stability index (PSI) over bins:
//     PSI = sum_i (a_i - e_i) ln(a_i / e_i)
// with e_i the reference share and a_i the window share of bin i (Siddiqi
// 2006, "Credit Risk Scorecards", Wiley, chapter on scorecard monitoring;
// its statistical properties: Yurdakul 2018, "Statistical Properties of
// Population Stability Index", PhD thesis, Western Michigan University;
// both from memory). It is the symmetrised Kullback-Leibler divergence
// KL(a||e) + KL(e||a) (Jeffreys 1946) of the two binned distributions.
// A share of 0 makes a term infinite, so every share below
// `empty_bin_share` (default 1e-4, common practice) is raised to it before
// the sum; the shares are not renormalised afterwards.
//   numeric and date/time columns: the reference histogram's equal-width
//     bins over [minimum, maximum], plus a bin below the minimum, one above
//     the maximum and one for missing cells (the reference has no rows in
//     the first two, so window rows there count fully against it);
//   categorical columns: one bin per training category, one per category
//     the training rows never held (listed as unseen), and one for missing
//     cells.
// The common rule of thumb reads PSI < 0.1 as no significant change, 0.1 to
// 0.25 as a moderate one and > 0.25 as a significant one (common practice;
// the cut points appear in Siddiqi 2006, from memory): these are the
// defaults of psi_watch and psi_threshold, both configurable.
//
// Kolmogorov-Smirnov statistic D = sup_x |F_ref(x) - F_window(x)| over the
// present values of numeric and date/time columns (Kolmogorov 1933, Smirnov
// 1939). ks_two_sample() computes it exactly for two raw samples. A model
// file keeps a summary, not the training values, so measure_drift()
// replaces the reference's empirical CDF by its ogive: the piecewise-linear
// CDF through the cumulative histogram at the bin edges, i.e. values spread
// evenly within each bin. The ogive equals the empirical CDF at every bin
// edge, and within a bin both rise monotonically by the bin's share, so the
// reported D differs from the exact two-sample D by at most the largest bin
// share of the reference (0.1 or less for 10 bins holding equal counts; the
// tests check the bound). With one distinct training value the reference
// CDF is a step at that value.
// A column is flagged when D exceeds `ks_threshold`, or, when that is 0
// (the default), the large-sample two-sample critical value at level
// `ks_significance`, c(alpha) sqrt((n + m) / (n m)) with
// c(alpha) = sqrt(-ln(alpha / 2) / 2) (Smirnov 1948, from memory; c(0.05)
// = 1.358, c(0.01) = 1.628), n training and m window values.
//
// Window cells that cannot be read as the reference's kind (text in a
// numeric column) are counted as unreadable and binned as missing.
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
#include "tenon/deploy/detail/json_text.hpp"
#include "tenon/deploy/reference.hpp"
#include "tenon/prep/cell_parsing.hpp"
#include "tenon/prep/table.hpp"

TENON_NAMESPACE_BEGIN

/// A column's drift verdict.
enum class drift_status : std::uint8_t { stable, watch, drifted };

inline const char* drift_status_name(drift_status s) noexcept {
    switch (s) {
        case drift_status::stable: return "stable";
        case drift_status::watch: return "watch";
        case drift_status::drifted: return "drifted";
    }
    return "unknown";
}

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
};

/// One bin of a column's PSI.
struct drift_bin {
    std::string label;           // "[20, 30)", "< 20", "> 120", "(missing)", a category, "x (unseen)"
    std::uint64_t reference_count = 0;
    std::uint64_t window_count = 0;
    double reference_share = 0.0;  // before the floor
    double window_share = 0.0;
    double contribution = 0.0;     // (a - e) ln(a / e) with floored shares
};

/// Drift of one input column.
struct feature_drift {
    std::string column;
    column_kind kind = column_kind::numeric;
    std::uint64_t reference_rows = 0;  // training rows summarized (present + missing)
    std::uint64_t window_rows = 0;
    std::uint64_t window_missing = 0;  // missing in the window (unreadable included)
    std::uint64_t unreadable = 0;      // cells not readable as the column's kind
    std::uint64_t below_range = 0;     // numeric: window values below the training minimum
    std::uint64_t above_range = 0;     // numeric: window values above the training maximum
    double psi = 0.0;
    double ks = std::numeric_limits<double>::quiet_NaN();        // NaN for categorical columns or no values
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
/// every share floored at `empty_bin_share` (see the top of this file).
inline double population_stability_index(const std::vector<double>& reference_shares, const std::vector<double>& window_shares,
                                         double empty_bin_share = 1e-4) {
    if (reference_shares.size() != window_shares.size())
        raise(codes::shape_mismatch, "population_stability_index: " + std::to_string(reference_shares.size()) + " reference bins but " +
                                         std::to_string(window_shares.size()) + " window bins");
    if (!(empty_bin_share > 0.0 && empty_bin_share <= 0.01))
        raise(codes::deploy_drift_option, "population_stability_index: empty_bin_share must be in (0, 0.01], got " +
                                              std::to_string(empty_bin_share));
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
    if (a.empty() || b.empty()) raise(codes::invalid_argument, "ks_two_sample: both samples need at least one value");
    for (const auto* s : {&a, &b})
        for (double v : *s)
            if (std::isnan(v)) raise(codes::invalid_argument, "ks_two_sample: a sample holds NaN");
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

namespace detail {

inline void check_drift_options(const drift_options& o) {
    const auto fail = [](const std::string& what) { raise(codes::deploy_drift_option, "drift options: " + what); };
    if (!(o.psi_threshold > 0.0 && std::isfinite(o.psi_threshold)))
        fail("psi_threshold must be positive and finite, got " + std::to_string(o.psi_threshold));
    if (!(o.psi_watch >= 0.0 && o.psi_watch <= o.psi_threshold))
        fail("psi_watch must be in [0, psi_threshold = " + std::to_string(o.psi_threshold) + "], got " + std::to_string(o.psi_watch));
    if (!(o.ks_threshold >= 0.0 && o.ks_threshold <= 1.0)) fail("ks_threshold must be in [0, 1], got " + std::to_string(o.ks_threshold));
    if (!(o.ks_significance > 0.0 && o.ks_significance < 1.0))
        fail("ks_significance must be in (0, 1), got " + std::to_string(o.ks_significance));
    if (!(o.empty_bin_share > 0.0 && o.empty_bin_share <= 0.01))
        fail("empty_bin_share must be in (0, 0.01], got " + std::to_string(o.empty_bin_share));
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

inline feature_drift numeric_drift(const feature_reference& ref, const column& c, const std::vector<std::size_t>& rows,
                                   const drift_options& o) {
    feature_drift f;
    f.column = ref.column;
    f.kind = ref.kind;
    f.reference_rows = ref.present + ref.missing;
    f.window_rows = rows.size();
    const std::size_t bins = ref.histogram.size();
    // bins: histogram..., below, above, missing
    f.bins.resize(bins + 3);
    const double width = bins ? (ref.maximum - ref.minimum) / static_cast<double>(bins) : 0.0;
    for (std::size_t k = 0; k < bins; ++k) {
        const double low = ref.minimum + width * static_cast<double>(k);
        const double high = k + 1 == bins ? ref.maximum : ref.minimum + width * static_cast<double>(k + 1);
        f.bins[k].label = "[" + short_number(low) + ", " + short_number(high) + (k + 1 == bins ? "]" : ")");
        f.bins[k].reference_count = ref.histogram[k];
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
        } else {
            ++f.bins[ref.bin_of(v)].window_count;
        }
    }
    finish_bins(f, ref.present + ref.missing, o.empty_bin_share);
    f.ks = ks_against_reference(ref, values);
    if (!values.empty() && ref.present > 0)
        f.ks_limit = o.ks_threshold > 0.0 ? o.ks_threshold : ks_critical_value(o.ks_significance, ref.present, values.size());
    f.ks_flag = std::isfinite(f.ks) && f.ks > f.ks_limit;
    return f;
}

inline feature_drift categorical_drift(const feature_reference& ref, const column& c, const std::vector<std::size_t>& rows,
                                       const drift_options& o) {
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
        if (u == unseen.end()) unseen.emplace_back(text, 1);
        else ++u->second;
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
inline drift_report measure_drift(const std::vector<feature_reference>& references, const table& window,
                                  const std::vector<std::size_t>& rows, const drift_options& options = {}) {
    detail::check_drift_options(options);
    if (rows.empty()) raise(codes::deploy_drift_empty_window, "measure_drift: the window has no rows");
    for (auto r : rows)
        if (r >= window.row_count())
            raise(codes::prep_row_out_of_range, "measure_drift: row " + std::to_string(r) + " is not below the window's " +
                                                    std::to_string(window.row_count()) + " rows");
    drift_report report;
    report.window_rows = rows.size();
    report.options = options;
    for (const auto& ref : references) {
        if (!window.contains(ref.column))
            raise(codes::deploy_missing_column, "measure_drift: the window has no column '" + ref.column + "' (the model reads it)");
        const column& c = window.at(ref.column);
        feature_drift f = ref.kind == column_kind::categorical ? detail::categorical_drift(ref, c, rows, options)
                                                               : detail::numeric_drift(ref, c, rows, options);
        f.psi_flag = f.psi > options.psi_threshold;
        f.status = f.psi_flag || f.ks_flag ? drift_status::drifted : f.psi > options.psi_watch ? drift_status::watch : drift_status::stable;
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

/// A plain-text table, one line per column: PSI, D, D's limit, status and
/// notes (values outside the training range, unseen categories, unreadable
/// cells).
inline std::string drift_table(const drift_report& r) {
    std::string out;
    char line[256];
    std::snprintf(line, sizeof line, "%-18s %-11s %9s %8s %8s  %-8s %s\n", "column", "kind", "PSI", "KS D", "D limit", "status", "notes");
    out += line;
    for (const auto& f : r.features) {
        std::string notes;
        if (f.below_range) notes += std::to_string(f.below_range) + " below range; ";
        if (f.above_range) notes += std::to_string(f.above_range) + " above range; ";
        for (const auto& u : f.unseen_categories) notes += "unseen '" + u.first + "' x" + std::to_string(u.second) + "; ";
        if (f.unreadable) notes += std::to_string(f.unreadable) + " unreadable; ";
        if (f.psi_flag) notes += "PSI > " + detail::short_number(r.options.psi_threshold) + "; ";
        if (f.ks_flag) notes += "D > limit; ";
        if (notes.size() >= 2) notes.resize(notes.size() - 2);
        const auto number = [](double v) { return std::isfinite(v) ? detail::short_number(v) : std::string("-"); };
        std::snprintf(line, sizeof line, "%-18s %-11s %9s %8s %8s  %-8s %s\n", f.column.c_str(), to_string(f.kind),
                      number(f.psi).c_str(), number(f.ks).c_str(), number(f.ks_limit).c_str(), drift_status_name(f.status),
                      notes.c_str());
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
                      ", \"options\": {\"psi_watch\": " + json_number(r.options.psi_watch) + ", \"psi_threshold\": " +
                      json_number(r.options.psi_threshold) + ", \"ks_threshold\": " + json_number(r.options.ks_threshold) +
                      ", \"ks_significance\": " + json_number(r.options.ks_significance) + ", \"empty_bin_share\": " +
                      json_number(r.options.empty_bin_share) + "}, \"columns\": [";
    for (std::size_t i = 0; i < r.features.size(); ++i) {
        const feature_drift& f = r.features[i];
        out += i ? ", " : "";
        out += "{\"column\": " + json_string(f.column) + ", \"kind\": " + json_string(to_string(f.kind)) +
               ", \"status\": " + json_string(drift_status_name(f.status)) + ", \"psi\": " + json_number(f.psi) +
               ", \"psi_flag\": " + json_bool(f.psi_flag) + ", \"ks\": " + json_number(f.ks) + ", \"ks_limit\": " +
               json_number(f.ks_limit) + ", \"ks_flag\": " + json_bool(f.ks_flag) + ", \"reference_rows\": " +
               std::to_string(f.reference_rows) + ", \"window_rows\": " + std::to_string(f.window_rows) + ", \"window_missing\": " +
               std::to_string(f.window_missing) + ", \"unreadable\": " + std::to_string(f.unreadable) + ", \"below_range\": " +
               std::to_string(f.below_range) + ", \"above_range\": " + std::to_string(f.above_range) + ", \"unseen_categories\": {";
        for (std::size_t k = 0; k < f.unseen_categories.size(); ++k)
            out += (k ? ", " : "") + json_string(f.unseen_categories[k].first) + ": " + std::to_string(f.unseen_categories[k].second);
        out += "}, \"bins\": [";
        for (std::size_t k = 0; k < f.bins.size(); ++k) {
            const drift_bin& b = f.bins[k];
            out += (k ? ", " : "") + std::string("{\"label\": ") + json_string(b.label) + ", \"reference_count\": " +
                   std::to_string(b.reference_count) + ", \"window_count\": " + std::to_string(b.window_count) +
                   ", \"reference_share\": " + json_number(b.reference_share) + ", \"window_share\": " + json_number(b.window_share) +
                   ", \"contribution\": " + json_number(b.contribution) + "}";
        }
        out += "]}";
    }
    return out + "]}";
}

TENON_NAMESPACE_END
