// tenon: scaling a numeric column, and undoing it.
//
// Every method (min-max, z-score, median-IQR) is an affine map learned from
// the training rows; moments come from running_moments (Welford 1962),
// quantiles from exact_quantile (Hyndman & Fan 1996, def. 7). A column whose
// spread is zero or not finite takes the spread as 1, so it maps to 0 (or to
// `low`) without a division by zero and the inverse returns the constant.
// The formulas: docs/design/prep.md.
#pragma once

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <numeric>
#include <string>
#include <vector>

#include "tenon/core/elementwise.hpp"
#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"
#include "tenon/core/matrix.hpp"
#include "tenon/prep/statistics.hpp"
#include "tenon/prep/table.hpp"

TENON_NAMESPACE_BEGIN

enum class scaling_method : std::uint8_t { none = 0, min_max = 1, z_score = 2, median_iqr = 3 };

inline const char* to_string(scaling_method m) noexcept {
    switch (m) {
    case scaling_method::none: return "none";
    case scaling_method::min_max: return "min-max";
    case scaling_method::z_score: return "z-score";
    case scaling_method::median_iqr: return "median-iqr";
    }
    return "unknown";
}

/// The learned affine map of one column: y = low + (x - center) / spread * (high - low).
/// For z-score and median-IQR scaling low = 0 and high = 1; for none center = 0,
/// spread = 1, low = 0, high = 1 (the identity).
struct scaling {
    scaling_method method = scaling_method::none;
    double center = 0.0;
    double spread = 1.0;
    double low = 0.0;
    double high = 1.0;

    // Each operation rounded on its own, as apply_scalings's vector loops do.
    TENON_NO_CONTRACTION double forward(double x) const noexcept {
        TENON_NO_CONTRACTION_IN_BODY
        return low + (x - center) * ((high - low) / spread);
    }
    double inverse(double y) const noexcept { return center + (y - low) / (high - low) * spread; }

    friend bool operator==(const scaling& a, const scaling& b) noexcept {
        return a.method == b.method && a.center == b.center && a.spread == b.spread && a.low == b.low && a.high == b.high;
    }
};

namespace detail {
inline double usable_spread(double spread) noexcept { return spread > 0.0 && std::isfinite(spread) ? spread : 1.0; }

inline void require_range(double low, double high) {
    if (!(low < high) || !std::isfinite(low) || !std::isfinite(high))
        raise(codes::core_argument_invalid,
              "min-max scaling: the target range must satisfy low < high, got [" + std::to_string(low) + ", " + std::to_string(high) + "]");
}
}  // namespace detail

/// Min-max or z-score scaling from single-pass moments. (Median-IQR scaling needs
/// quartiles: use median_iqr_scaling.)
inline scaling scaling_from_moments(scaling_method method, const running_moments& m, double low = 0.0, double high = 1.0) {
    scaling s;
    s.method = method;
    switch (method) {
    case scaling_method::none: break;
    case scaling_method::min_max:
        detail::require_range(low, high);
        if (m.count == 0) raise(codes::prep_rows_empty, "min-max scaling: no values to measure");
        s.center = m.minimum;
        s.spread = detail::usable_spread(m.maximum - m.minimum);
        s.low = low;
        s.high = high;
        break;
    case scaling_method::z_score:
        if (m.count == 0) raise(codes::prep_rows_empty, "z-score scaling: no values to measure");
        s.center = m.mean;
        s.spread = detail::usable_spread(m.population_stddev());
        break;
    case scaling_method::median_iqr:
        raise(codes::core_argument_invalid, "scaling_from_moments: median-IQR scaling needs quartiles, use median_iqr_scaling");
    }
    return s;
}

inline scaling median_iqr_scaling(const quartile_summary& q) {
    scaling s;
    s.method = scaling_method::median_iqr;
    s.center = q.median;
    s.spread = detail::usable_spread(q.interquartile_range);
    return s;
}

/// Measures a scaling on the present cells of a numeric or date/time column
/// over the given (training) rows.
inline scaling measure_scaling(const column& c, const std::vector<std::size_t>& rows, scaling_method method, double low = 0.0, double high = 1.0) {
    if (method == scaling_method::median_iqr) return median_iqr_scaling(column_quartiles(c, rows));
    if (method == scaling_method::none) return scaling{};
    const auto m = column_moments(c, rows);
    if (m.count == 0) raise(codes::prep_rows_empty, "column '" + c.name() + "': no present values to measure a scaling on");
    return scaling_from_moments(method, m, low, high);
}

/// Per-column scalings of a row-major matrix (min-max or z-score), measured
/// in one pass over the rows.
template <class T>
std::vector<scaling> measure_matrix_scalings(const matrix<T>& x, scaling_method method, double low = 0.0, double high = 1.0) {
    TENON_REQUIRE_SCALAR(T);
    const std::size_t rows = x.shape()[0], cols = x.shape()[1];
    std::vector<running_moments> m(cols);
    const T* p = x.data();
    for (std::size_t i = 0; i < rows; ++i)
        for (std::size_t j = 0; j < cols; ++j) m[j].add(static_cast<double>(p[i * cols + j]));
    std::vector<scaling> out;
    out.reserve(cols);
    for (const auto& mj : m) out.push_back(scaling_from_moments(method, mj, low, high));
    return out;
}

/// Applies per-column scalings to a matrix in place (no allocation).
template <class T>
void apply_scalings(matrix<T>& x, const std::vector<scaling>& s) {
    TENON_REQUIRE_SCALAR(T);
    const std::size_t rows = x.shape()[0], cols = x.shape()[1];
    if (s.size() != cols)
        raise(codes::core_shape_mismatch, "apply_scalings: " + std::to_string(s.size()) + " scalings for " + std::to_string(cols) + " columns");
    // scaling::forward with its per-column factor (high - low) / spread
    // computed once per column instead of once per value: the same
    // operations on the same values, so the same bits. The per-element
    // tables repeat the columns' parameters so that one call covers many
    // rows when rows are short (a whole number of rows whose length is a
    // multiple of 8, the widest vector of doubles), and one block of a
    // row's columns otherwise.
    constexpr std::size_t span = 256;  // 3 tables of 2 KB on the stack
    double low[span], center[span], factor[span];
    const auto fill = [&](std::size_t count, std::size_t first_column) {
        for (std::size_t k = 0; k < count; ++k) {
            const scaling& c = s[(first_column + k) % cols];
            low[k] = c.low;
            center[k] = c.center;
            factor[k] = (c.high - c.low) / c.spread;
        }
    };
    T* p = x.data();
    const std::size_t total = rows * cols;
    if (total == 0) return;
    const std::size_t period = cols * (8 / std::gcd(cols, std::size_t{8}));  // a multiple of cols and of 8
    if (period <= span) {
        const std::size_t length = span / period * period;
        fill(length, 0);
        std::size_t k = 0;
        for (; k + length <= total; k += length) detail::affine_span(p + k, length, low, center, factor);
        detail::affine_span(p + k, total - k, low, center, factor);
        return;
    }
    for (std::size_t j0 = 0; j0 < cols; j0 += span) {
        const std::size_t width = std::min(span, cols - j0);
        fill(width, j0);
        for (std::size_t i = 0; i < rows; ++i) detail::affine_span(p + i * cols + j0, width, low, center, factor);
    }
}

/// Undoes per-column scalings in place, e.g. to bring predicted regression
/// targets back to their original units.
template <class T>
void invert_scalings(matrix<T>& y, const std::vector<scaling>& s) {
    TENON_REQUIRE_SCALAR(T);
    const std::size_t rows = y.shape()[0], cols = y.shape()[1];
    if (s.size() != cols)
        raise(codes::core_shape_mismatch, "invert_scalings: " + std::to_string(s.size()) + " scalings for " + std::to_string(cols) + " columns");
    T* p = y.data();
    for (std::size_t i = 0; i < rows; ++i)
        for (std::size_t j = 0; j < cols; ++j) p[i * cols + j] = static_cast<T>(s[j].inverse(static_cast<double>(p[i * cols + j])));
}

TENON_NAMESPACE_END
