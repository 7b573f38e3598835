// tenon: screening a table's columns before they become features.
//
// Plant logs carry columns that identify a row rather than describe it: a
// serial number, a part UUID, a cycle counter. One-hot encoding a serial
// gives one input per row, the training loss falls to nearly zero and the
// model says nothing about a new serial; a counter lets the model read the
// row's position, which new rows lie beyond. screen_columns() finds them,
// and categorical columns with so many categories that each is learned from
// a handful of rows. It only reports; the host decides (the tool leaves
// identifiers out and says so). The thresholds are common practice in data
// preparation, not published values; screening_rules holds them.
#pragma once

#include <cmath>
#include <cstddef>
#include <cstdint>
#include <string>
#include <string_view>
#include <unordered_set>
#include <vector>

#include "tenon/prep/table.hpp"

TENON_NAMESPACE_BEGIN

/// Why a column was reported.
enum class screening_reason : std::uint8_t {
    distinct_values = 0,  // a categorical column whose values are nearly all distinct
    identifier_name = 1,  // the name reads as an identifier and the column holds many values
    counter = 2,  // whole numbers rising (or falling) on every row
    many_categories = 3,  // more categories than a share of the rows (a warning only)
};

inline const char* to_string(screening_reason reason) noexcept {
    switch (reason) {
    case screening_reason::distinct_values: return "distinct_values";
    case screening_reason::identifier_name: return "identifier_name";
    case screening_reason::counter: return "counter";
    case screening_reason::many_categories: return "many_categories";
    }
    return "unknown";
}

struct screening_rules {
    /// Rows with a value needed before any rule speaks: below it, distinct
    /// values and rising numbers happen by chance.
    std::size_t minimum_rows = 20;
    /// distinct_values: distinct texts / present cells at least this.
    double distinct_share = 0.95;
    /// identifier_name: words of a name (split at '_', '-', '.', blanks,
    /// digits and lower-to-upper case changes; compared in lower case).
    std::vector<std::string> identifier_words = {"id", "serial", "uuid", "guid", "sn"};
    /// identifier_name: more distinct values than this. A handful of machines
    /// or lines named "line_id" is a real feature; hundreds of parts are not.
    std::size_t identifier_name_distinct = 20;
    /// many_categories: more categories than this share of the present
    /// cells, i.e. fewer than 10 rows per category on average, too few to
    /// learn a one-hot input's weight from (common practice groups or drops
    /// categories below about ten rows).
    double category_share = 0.1;
};

struct screening_finding {
    std::string column;
    screening_reason reason;
    std::size_t distinct = 0;  // distinct present values
    std::size_t present = 0;  // cells that are not missing
    /// True for the identifier reasons: the column should not be a feature.
    bool identifier() const noexcept { return reason != screening_reason::many_categories; }
    /// One sentence for a person, without the column's name.
    std::string explanation() const {
        const std::string counts = std::to_string(distinct) + " distinct values in " + std::to_string(present) + " rows";
        switch (reason) {
        case screening_reason::distinct_values: return counts + ": nearly every value is distinct, as in an identifier";
        case screening_reason::identifier_name: return "its name reads as an identifier, and it holds " + counts;
        case screening_reason::counter: return "whole numbers that rise (or fall) on every row, as a counter does";
        case screening_reason::many_categories:
            return std::to_string(distinct) + " categories in " + std::to_string(present) + " rows, about " +
                std::to_string(present / (distinct ? distinct : 1)) + " rows per category: each one-hot input is learned from few rows";
        }
        return counts;
    }
};

namespace detail {

// Lower-case words of a column name: "PartSerialNo" -> part, serial, no.
inline std::vector<std::string> name_words(std::string_view name) {
    std::vector<std::string> words;
    std::string current;
    char previous = 0;
    for (char c : name) {
        const bool lower = c >= 'a' && c <= 'z', upper = c >= 'A' && c <= 'Z';
        const bool boundary = !(lower || upper) || (upper && previous >= 'a' && previous <= 'z');
        if (boundary && !current.empty()) {
            words.push_back(current);
            current.clear();
        }
        if (lower || upper) current += static_cast<char>(upper ? c - 'A' + 'a' : c);
        previous = c;
    }
    if (!current.empty()) words.push_back(current);
    return words;
}

}  // namespace detail

/// Screens the columns of `t` not named in `skip` (the target, the time and
/// group columns, columns the host already decided on). For each column at
/// most one finding: the first identifier reason that holds (distinct
/// values, name, counter), else many_categories.
inline std::vector<screening_finding> screen_columns(const table& t, const screening_rules& rules = {}, const std::vector<std::string>& skip = {}) {
    std::vector<screening_finding> findings;
    for (std::size_t k = 0; k < t.column_count(); ++k) {
        const column& c = t[k];
        bool skipped = false;
        for (const auto& s : skip) skipped = skipped || s == c.name();
        if (skipped || c.kind() == column_kind::datetime) continue;
        screening_finding f{c.name(), screening_reason::distinct_values};
        bool whole_rising = true, whole_falling = true, have_previous = false;
        double previous = 0;
        if (c.kind() == column_kind::categorical) {
            std::vector<std::uint8_t> seen(c.categories().size());
            for (std::size_t r = 0; r < c.size(); ++r) {
                if (c.is_missing(r)) continue;
                ++f.present;
                if (!seen[c.code(r)]) {
                    seen[c.code(r)] = 1;
                    ++f.distinct;
                }
            }
        } else {
            std::unordered_set<double> values;
            for (std::size_t r = 0; r < c.size(); ++r) {
                if (c.is_missing(r)) continue;
                ++f.present;
                const double v = c.number(r);
                values.insert(v);
                if (v != std::floor(v)) whole_rising = whole_falling = false;
                if (have_previous) {
                    whole_rising = whole_rising && v > previous;
                    whole_falling = whole_falling && v < previous;
                }
                previous = v;
                have_previous = true;
            }
            f.distinct = values.size();
        }
        if (f.present < rules.minimum_rows) continue;
        const bool categorical = c.kind() == column_kind::categorical;
        bool named = false;
        for (const auto& word : detail::name_words(c.name()))
            for (const auto& id : rules.identifier_words) named = named || word == id;
        if (categorical && static_cast<double>(f.distinct) >= rules.distinct_share * static_cast<double>(f.present)) {
            f.reason = screening_reason::distinct_values;
        } else if (named && f.distinct > rules.identifier_name_distinct) {
            f.reason = screening_reason::identifier_name;
        } else if (!categorical && (whole_rising || whole_falling)) {
            f.reason = screening_reason::counter;
        } else if (categorical && static_cast<double>(f.distinct) > rules.category_share * static_cast<double>(f.present)) {
            f.reason = screening_reason::many_categories;
        } else {
            continue;
        }
        findings.push_back(std::move(f));
    }
    return findings;
}

TENON_NAMESPACE_END
