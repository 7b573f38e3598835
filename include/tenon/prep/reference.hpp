// tenon: reference summaries of the training rows, per input column.
//
// A model file keeps, for every column the plan reads, what the training
// rows looked like: for numeric and date/time columns the range, the
// deciles, a histogram and the distribution itself (every value and its
// count, or quantile points); for categorical columns the count of every
// training category. The predictor flags inputs outside the range (or
// categories never seen); drift monitoring compares new rows with them.
// The quantile definition and the Kolmogorov-Smirnov error bound of the
// quantile points (below 1/1024): docs/design/drift.md.
#pragma once

#include <algorithm>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <string>
#include <vector>

#include "tenon/prep/plan.hpp"
#include "tenon/prep/statistics.hpp"
#include "tenon/prep/table.hpp"

TENON_NAMESPACE_BEGIN

/// What the training rows held in one input column.
struct feature_reference {
    std::string column;
    column_kind kind = column_kind::numeric;
    std::uint64_t present = 0;  // training rows with a value
    std::uint64_t missing = 0;  // training rows without one
    // numeric and date/time columns
    double minimum = 0.0;
    double maximum = 0.0;
    std::vector<double> deciles;  // 11 values: q = 0, 0.1, ..., 1
    std::vector<std::uint64_t> histogram;  // equal-width bins over [minimum, maximum]
    // categorical columns, sorted by category text
    std::vector<std::pair<std::string, std::uint64_t>> categories;
    // numeric and date/time columns, the distribution (empty in files written
    // before section REFD; see docs/design/drift.md)
    bool whole_numbers = false;  // every present value is a whole number
    std::vector<std::pair<double, std::uint64_t>> distinct;  // ascending values and counts, at most 256
    std::vector<double> quantile_points;  // q_0 .. q_K when there are more distinct values

    /// True when the summary carries the distribution (distinct values or quantiles).
    bool has_distribution() const noexcept { return !distinct.empty() || !quantile_points.empty(); }

    /// The histogram bin of a value inside [minimum, maximum].
    std::size_t bin_of(double value) const noexcept {
        const std::size_t bins = histogram.size();
        if (bins == 0 || !(maximum > minimum)) return 0;
        const double f = (value - minimum) / (maximum - minimum) * static_cast<double>(bins);
        if (!(f > 0.0)) return 0;
        const auto b = static_cast<std::size_t>(f);
        return b >= bins ? bins - 1 : b;
    }

    friend bool operator==(const feature_reference& a, const feature_reference& b) {
        return a.column == b.column && a.kind == b.kind && a.present == b.present && a.missing == b.missing && a.minimum == b.minimum &&
            a.maximum == b.maximum && a.deciles == b.deciles && a.histogram == b.histogram && a.categories == b.categories &&
            a.whole_numbers == b.whole_numbers && a.distinct == b.distinct && a.quantile_points == b.quantile_points;
    }
};

/// Distinct values kept exactly up to this count (see docs/design/drift.md).
inline constexpr std::size_t reference_distinct_limit = 256;
/// K of the quantile points q_0 .. q_K kept beyond it: D's error is below 1/K.
inline constexpr std::size_t reference_quantile_steps = 1024;

namespace detail {
// Fills whole_numbers, distinct or quantile_points from the present values.
inline void measure_distribution(feature_reference& f, std::vector<double> values) {
    std::sort(values.begin(), values.end());
    f.whole_numbers = true;
    for (double v : values) f.whole_numbers = f.whole_numbers && std::floor(v) == v;
    std::size_t distinct = 0;
    for (std::size_t i = 0; i < values.size(); ++i) distinct += i == 0 || values[i] != values[i - 1] ? 1 : 0;
    if (distinct <= reference_distinct_limit) {
        for (std::size_t i = 0; i < values.size(); ++i) {
            if (i == 0 || values[i] != values[i - 1]) f.distinct.emplace_back(values[i], 0);
            ++f.distinct.back().second;
        }
        return;
    }
    // q_k = the smallest x with F(x) >= k/K: the value of rank ceil(k n / K) (1-based).
    const std::size_t n = values.size(), steps = reference_quantile_steps;
    f.quantile_points.reserve(steps + 1);
    f.quantile_points.push_back(values.front());
    for (std::size_t k = 1; k <= steps; ++k) f.quantile_points.push_back(values[(k * n + steps - 1) / steps - 1]);
}
}  // namespace detail

/// Summaries of every column `plan` reads (plan.input_columns(), in that
/// order) over `rows` of `t`.
inline std::vector<feature_reference> measure_references(const table& t, const std::vector<std::size_t>& rows, const measured_plan& plan,
                                                         std::size_t histogram_bins = 10) {
    if (histogram_bins == 0) raise(codes::core_argument_invalid, "measure_references: histogram_bins must be positive");
    std::vector<feature_reference> out;
    for (const auto& name : plan.input_columns()) {
        const column& c = t.at(name);
        detail::require_rows_in_range(c, rows);
        feature_reference f;
        f.column = name;
        f.kind = c.kind();
        for (auto r : rows) (c.is_missing(r) ? f.missing : f.present) += 1;
        if (c.kind() == column_kind::categorical) {
            const auto counts = category_counts(c, rows);
            for (std::size_t k = 0; k < counts.size(); ++k)
                if (counts[k] > 0) f.categories.emplace_back(c.categories()[k], counts[k]);
            std::sort(f.categories.begin(), f.categories.end());
        } else if (f.present > 0) {
            std::vector<double> values = present_values(c, rows);
            const auto mm = std::minmax_element(values.begin(), values.end());
            f.minimum = *mm.first;
            f.maximum = *mm.second;
            f.histogram.assign(histogram_bins, 0);
            for (double v : values) ++f.histogram[f.bin_of(v)];
            for (int d = 0; d <= 10; ++d) f.deciles.push_back(exact_quantile(values, d / 10.0));
            detail::measure_distribution(f, std::move(values));
        }
        out.push_back(std::move(f));
    }
    return out;
}

TENON_NAMESPACE_END
