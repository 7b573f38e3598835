// tenon: column statistics, single-pass where the statistic allows it.
//
// running_moments gathers count, minimum, maximum, mean and variance in one
// pass with Welford's update, and merges partial results (e.g. from chunks of
// a file or from threads) with the pairwise formula of Chan, Golub & LeVeque.
// Both avoid the catastrophic cancellation of the textbook sum-of-squares
// formula, so a stream like 1e9 + small variations keeps its variance.
//
// Quantiles (median, quartiles) have no exact single-pass form in bounded
// memory; tenon computes them exactly on the values in memory
// (exact_quantile), which is what a plan measured on a table uses.
#pragma once

#include <algorithm>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <limits>
#include <string>
#include <utility>
#include <vector>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"
#include "tenon/prep/table.hpp"

TENON_NAMESPACE_BEGIN

/// Count, extremes, mean and sum of squared deviations of a stream of values.
struct running_moments {
    std::size_t count = 0;
    double mean = 0.0;
    double squared_deviations = 0.0;  // sum of (x - mean)^2, "M2"
    double minimum = std::numeric_limits<double>::infinity();
    double maximum = -std::numeric_limits<double>::infinity();

    /// Welford (1962), "Note on a method for calculating corrected sums of
    /// squares and products", Technometrics 4(3); in the form of Knuth, TAOCP
    /// vol. 2, 3rd ed., section 4.2.2 (from memory):
    ///   delta = x - mean;  mean += delta / n;  M2 += delta * (x - mean).
    void add(double x) noexcept {
        ++count;
        const double delta = x - mean;
        mean += delta / static_cast<double>(count);
        squared_deviations += delta * (x - mean);
        if (x < minimum) minimum = x;
        if (x > maximum) maximum = x;
    }

    /// Chan, Golub & LeVeque (1979/1983), "Updating formulae and a pairwise
    /// algorithm for computing sample variances", eq. 2.1:
    ///   n = na + nb;  delta = mean_b - mean_a;
    ///   mean = mean_a + delta * nb / n;  M2 = M2a + M2b + delta^2 * na * nb / n.
    void merge(const running_moments& other) noexcept {
        if (other.count == 0) return;
        if (count == 0) {
            *this = other;
            return;
        }
        const double na = static_cast<double>(count), nb = static_cast<double>(other.count);
        const double n = na + nb;
        const double delta = other.mean - mean;
        mean += delta * nb / n;
        squared_deviations += other.squared_deviations + delta * delta * na * nb / n;
        count += other.count;
        minimum = std::min(minimum, other.minimum);
        maximum = std::max(maximum, other.maximum);
    }

    /// Variance with divisor n (the spread of the values themselves; what a
    /// z-score divides by).
    double population_variance() const noexcept { return count == 0 ? 0.0 : squared_deviations / static_cast<double>(count); }
    /// Variance with divisor n - 1 (unbiased estimate of a population's).
    double sample_variance() const noexcept { return count < 2 ? 0.0 : squared_deviations / static_cast<double>(count - 1); }
    double population_stddev() const noexcept { return std::sqrt(population_variance()); }
};

/// The q-quantile (0 <= q <= 1) of `values`, exact, by linear interpolation
/// between order statistics: Hyndman & Fan (1996), "Sample quantiles in
/// statistical packages", The American Statistician 50(4), definition 7:
///   h = (n - 1) q;  Q = x[floor h] + (h - floor h) (x[floor h + 1] - x[floor h]).
/// Reorders `values` (nth_element); raises prep.rows.empty when it is empty.
inline double exact_quantile(std::vector<double>& values, double q) {
    if (values.empty()) raise(codes::prep_rows_empty, "exact_quantile: no values");
    if (!(q >= 0.0 && q <= 1.0)) raise(codes::core_argument_invalid, "exact_quantile: q must lie in [0, 1], got " + std::to_string(q));
    const double h = static_cast<double>(values.size() - 1) * q;
    const auto lower = static_cast<std::size_t>(std::floor(h));
    auto lower_it = values.begin() + static_cast<std::ptrdiff_t>(lower);
    std::nth_element(values.begin(), lower_it, values.end());
    const double low = *lower_it;
    if (lower + 1 >= values.size()) return low;
    const double high = *std::min_element(lower_it + 1, values.end());
    return low + (h - static_cast<double>(lower)) * (high - low);
}

namespace detail {
inline void require_rows_in_range(const column& c, const std::vector<std::size_t>& rows) {
    for (auto r : rows)
        if (r >= c.size())
            raise(codes::prep_rows_out_of_range,
                  "column '" + c.name() + "': row " + std::to_string(r) + " is not below the row count " + std::to_string(c.size()));
}
inline void require_number_column(const column& c, const char* what) {
    if (c.kind() == column_kind::categorical) raise(codes::prep_column_kind, std::string(what) + ": column '" + c.name() + "' is categorical");
}
}  // namespace detail

/// Moments of the present (non-missing) cells of a numeric or date/time
/// column over the given rows.
inline running_moments column_moments(const column& c, const std::vector<std::size_t>& rows) {
    detail::require_number_column(c, "column_moments");
    detail::require_rows_in_range(c, rows);
    running_moments m;
    for (auto r : rows)
        if (!c.is_missing(r)) m.add(c.number(r));
    return m;
}

/// The present values of a numeric or date/time column over the given rows.
inline std::vector<double> present_values(const column& c, const std::vector<std::size_t>& rows) {
    detail::require_number_column(c, "present_values");
    detail::require_rows_in_range(c, rows);
    std::vector<double> v;
    v.reserve(rows.size());
    for (auto r : rows)
        if (!c.is_missing(r)) v.push_back(c.number(r));
    return v;
}

/// Median and interquartile range (Q3 - Q1), exact, of the present values.
struct quartile_summary {
    double median = 0.0;
    double interquartile_range = 0.0;
};

inline quartile_summary column_quartiles(const column& c, const std::vector<std::size_t>& rows) {
    auto v = present_values(c, rows);
    if (v.empty()) raise(codes::prep_rows_empty, "column '" + c.name() + "': no present values for quartiles");
    quartile_summary s;
    s.median = exact_quantile(v, 0.5);
    const double q1 = exact_quantile(v, 0.25);
    const double q3 = exact_quantile(v, 0.75);
    s.interquartile_range = q3 - q1;
    return s;
}

/// Per-category counts of the present cells of a categorical column over the
/// given rows, indexed by the column's category code.
inline std::vector<std::size_t> category_counts(const column& c, const std::vector<std::size_t>& rows) {
    if (c.kind() != column_kind::categorical) raise(codes::prep_column_kind, "category_counts: column '" + c.name() + "' is " + to_string(c.kind()));
    detail::require_rows_in_range(c, rows);
    std::vector<std::size_t> counts(c.categories().size(), 0);
    for (auto r : rows)
        if (!c.is_missing(r)) ++counts[c.code(r)];
    return counts;
}

/// Combines statistics measured by several participants on their own rows
/// (e.g. the processes of a distributed training run, each holding a
/// shard), so that a plan measured by each (plan::measure with an exchange)
/// learns the statistics of all their rows together. Every call is
/// collective: all participants make the same calls in the same order, and
/// every participant receives the same result. prep/ defines only the
/// interface; distributed/plan_merge.hpp implements it over MPI.
class statistics_exchange {
public:
    virtual ~statistics_exchange() = default;
    /// Elementwise sums over the participants, in place.
    virtual void sum_counts(std::vector<std::uint64_t>& counts) = 0;
    /// The participants' moments merged with running_moments::merge (Chan,
    /// Golub & LeVeque) in participant order.
    virtual running_moments merge_moments(const running_moments& local) = 0;
    /// Every participant's values, concatenated in participant order (for
    /// exact quantiles and modes: memory grows with all participants' rows).
    virtual std::vector<double> gather_values(const std::vector<double>& local) = 0;
    /// The union of the participants' names, sorted, each with its counts summed.
    virtual std::vector<std::pair<std::string, std::uint64_t>>
    merge_named_counts(const std::vector<std::pair<std::string, std::uint64_t>>& local) = 0;
};

/// Collective over `exchange`: every participant's table must have the same
/// columns with the same kinds before they measure one plan together (their
/// collective calls follow the columns). Raises distributed.plan.mismatch on
/// every participant, naming a column that not all of them hold; `who`
/// names the caller in the message.
inline void require_same_columns(const table& t, statistics_exchange& exchange, const std::string& who) {
    std::vector<std::pair<std::string, std::uint64_t>> schema;
    for (std::size_t k = 0; k < t.column_count(); ++k) schema.emplace_back(t[k].name() + " (" + to_string(t[k].kind()) + ")", 1);
    std::vector<std::uint64_t> participants = {1};
    exchange.sum_counts(participants);
    for (const auto& kv : exchange.merge_named_counts(schema)) {
        if (kv.second != participants[0])
            raise(codes::distributed_plan_mismatch,
                  who + ": the column " + kv.first + " is held by " + std::to_string(kv.second) + " of " + std::to_string(participants[0]) +
                      " ranks; every rank's table needs the same columns and kinds");
    }
}

/// 0, 1, ..., n-1: all rows of a table.
inline std::vector<std::size_t> all_rows(std::size_t n) {
    std::vector<std::size_t> rows(n);
    for (std::size_t i = 0; i < n; ++i) rows[i] = i;
    return rows;
}

TENON_NAMESPACE_END
