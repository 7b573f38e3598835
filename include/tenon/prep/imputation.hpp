// tenon: filling missing cells with a value learned from the training rows.
//
// mean and median apply to numeric and date/time columns; mode (the most
// frequent value) to
// every kind (ties go to the smallest number, or to the category text that
// sorts first, so the choice does not depend on row order); constant uses a
// value the host gives; automatic (the plan's default, and the tool's) is the
// median for numeric and date/time columns and the most frequent category
// for categorical ones. The learned value is kept in the measured plan and
// used unchanged on validation, test and new rows.
#pragma once

#include <cstdint>
#include <map>
#include <string>
#include <vector>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"
#include "tenon/prep/statistics.hpp"
#include "tenon/prep/table.hpp"

TENON_NAMESPACE_BEGIN

enum class fill_method : std::uint8_t { none = 0, mean = 1, median = 2, mode = 3, constant = 4, automatic = 5 };

inline const char* to_string(fill_method m) noexcept {
    switch (m) {
    case fill_method::none: return "none";
    case fill_method::mean: return "mean";
    case fill_method::median: return "median";
    case fill_method::mode: return "mode";
    case fill_method::constant: return "constant";
    case fill_method::automatic: return "automatic";
    }
    return "unknown";
}

/// The method `automatic` stands for on a column of this kind: the median
/// for numbers and date/times, the most frequent category for categories.
/// Other methods are returned as they are. A measured fill never holds
/// `automatic`: it is resolved when the plan is measured.
inline fill_method resolve_fill(fill_method method, column_kind kind) noexcept {
    if (method != fill_method::automatic) return method;
    return kind == column_kind::categorical ? fill_method::mode : fill_method::median;
}

/// The value that replaces a missing cell: `number` for numeric and
/// date/time columns, `text` for categorical ones.
struct fill_value {
    fill_method method = fill_method::none;
    double number = 0.0;
    std::string text;
};

/// Learns the fill value of column `c` from the given (training) rows.
/// `constant_number` / `constant_text` are used by fill_method::constant.
inline fill_value measure_fill(const column& c, const std::vector<std::size_t>& rows, fill_method method, double constant_number = 0.0,
                               const std::string& constant_text = {}) {
    method = resolve_fill(method, c.kind());
    fill_value f;
    f.method = method;
    const bool categorical = c.kind() == column_kind::categorical;
    switch (method) {
    case fill_method::none:
    case fill_method::automatic: return f;  // resolved above
    case fill_method::constant:
        f.number = constant_number;
        f.text = constant_text;
        return f;
    case fill_method::mean:
    case fill_method::median: {
        if (categorical)
            raise(codes::prep_column_kind,
                  "column '" + c.name() + "' is categorical: it cannot be filled with the " + to_string(method) + "; use mode or constant");
        auto v = present_values(c, rows);
        if (v.empty()) raise(codes::prep_rows_empty, "column '" + c.name() + "': no present values to learn a fill value from");
        if (method == fill_method::median) {
            f.number = exact_quantile(v, 0.5);
        } else {
            running_moments m;
            for (double x : v) m.add(x);
            f.number = m.mean;
        }
        return f;
    }
    case fill_method::mode: {
        detail::require_rows_in_range(c, rows);
        if (categorical) {
            const auto counts = category_counts(c, rows);
            std::size_t best = 0;
            bool found = false;
            for (std::size_t k = 0; k < counts.size(); ++k) {
                if (counts[k] == 0) continue;
                if (!found || counts[k] > counts[best] || (counts[k] == counts[best] && c.categories()[k] < c.categories()[best])) {
                    best = k;
                    found = true;
                }
            }
            if (!found) raise(codes::prep_rows_empty, "column '" + c.name() + "': no present values to learn a fill value from");
            f.text = c.categories()[best];
        } else {
            std::map<double, std::size_t> counts;
            for (auto r : rows)
                if (!c.is_missing(r)) ++counts[c.number(r)];
            if (counts.empty()) raise(codes::prep_rows_empty, "column '" + c.name() + "': no present values to learn a fill value from");
            std::size_t best_count = 0;
            for (const auto& kv : counts)
                if (kv.second > best_count) {  // strict: the smallest value wins ties
                    best_count = kv.second;
                    f.number = kv.first;
                }
        }
        return f;
    }
    }
    return f;
}

TENON_NAMESPACE_END
