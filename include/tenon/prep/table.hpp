// tenon: a table of named columns, each numeric, categorical or date/time,
// with a missing mask.
//
// Numbers and date/times are stored as double (date/times as seconds since
// 1970-01-01T00:00:00Z), categories as a code per row plus the texts in order
// of first appearance. A table read from CSV keeps each row's line in the
// file, so messages name the line a person opens the file at (row_place).
// Storage details: docs/design/prep.md.
#pragma once

#include <cstddef>
#include <cstdint>
#include <limits>
#include <memory>
#include <string>
#include <string_view>
#include <unordered_map>
#include <utility>
#include <vector>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"
#include "tenon/prep/cell_parsing.hpp"

TENON_NAMESPACE_BEGIN

enum class column_kind : std::uint8_t { numeric = 0, categorical = 1, datetime = 2 };

inline const char* to_string(column_kind kind) noexcept {
    switch (kind) {
    case column_kind::numeric: return "numeric";
    case column_kind::categorical: return "categorical";
    case column_kind::datetime: return "datetime";
    }
    return "unknown";
}

/// Where rows came from: the source (a file name) and the file line of each
/// row. Shared by a table's columns, so a column alone can name a row's line.
struct row_origin {
    std::string source;
    std::vector<std::size_t> lines;
};

namespace detail {
// "press_log.csv line 11" when the row's line is known, else "press_log.csv
// row 9" (or "table row 9" without a source).
inline std::string row_place(const row_origin* origin, const std::string& source, std::size_t row) {
    const std::string where = source.empty() ? std::string("table") : source;
    if (origin && row < origin->lines.size()) return where + " line " + std::to_string(origin->lines[row]);
    return where + " row " + std::to_string(row);
}
}  // namespace detail

/// One named column of a table.
class column {
public:
    column(std::string name, column_kind kind) : name_(std::move(name)), kind_(kind) {}

    const std::string& name() const noexcept { return name_; }
    column_kind kind() const noexcept { return kind_; }
    /// How a date/time column's cells were written (read_csv sets it; a plan
    /// measured on the column keeps it for new rows).
    time_format time_form() const noexcept { return time_form_; }
    void set_time_form(time_format form) noexcept { time_form_ = form; }
    std::size_t size() const noexcept { return missing_.size(); }
    bool is_missing(std::size_t row) const noexcept { return missing_[row] != 0; }
    std::size_t missing_count() const noexcept {
        std::size_t n = 0;
        for (auto m : missing_) n += m;
        return n;
    }

    /// Value of a numeric or date/time cell (seconds since the epoch).
    double number(std::size_t row) const noexcept { return numbers_[row]; }
    /// Category code of a categorical cell: an index into categories().
    std::uint32_t code(std::size_t row) const noexcept { return codes_[row]; }
    const std::string& category(std::size_t row) const noexcept { return categories_[codes_[row]]; }
    /// Category texts in order of first appearance.
    const std::vector<std::string>& categories() const noexcept { return categories_; }

    void reserve(std::size_t rows) {
        missing_.reserve(rows);
        if (kind_ == column_kind::categorical)
            codes_.reserve(rows);
        else
            numbers_.reserve(rows);
    }

    /// Appends a value to a numeric or date/time column.
    void push_number(double value) {
        require_kind(kind_ != column_kind::categorical, "push_number");
        numbers_.push_back(value);
        missing_.push_back(0);
    }

    /// Appends a category to a categorical column (new texts get the next code).
    void push_category(std::string_view text) {
        require_kind(kind_ == column_kind::categorical, "push_category");
        key_.assign(text.data(), text.size());
        auto found = lookup_.find(key_);
        std::uint32_t c;
        if (found == lookup_.end()) {
            c = static_cast<std::uint32_t>(categories_.size());
            categories_.push_back(key_);
            lookup_.emplace(key_, c);
        } else {
            c = found->second;
        }
        codes_.push_back(c);
        missing_.push_back(0);
    }

    void push_missing() {
        if (kind_ == column_kind::categorical)
            codes_.push_back(0);
        else
            numbers_.push_back(0.0);
        missing_.push_back(1);
    }

    /// Names a row for messages: "press_log.csv line 11" for a column of a
    /// table read from a file, "table row 9" otherwise.
    std::string row_place(std::size_t row) const { return detail::row_place(origin_.get(), origin_ ? origin_->source : std::string(), row); }
    void set_origin(std::shared_ptr<const row_origin> origin) noexcept { origin_ = std::move(origin); }

    /// Code of a category text, or -1 when the column never saw it.
    std::int64_t find_category(std::string_view text) const {
        key_.assign(text.data(), text.size());
        auto found = lookup_.find(key_);
        return found == lookup_.end() ? -1 : static_cast<std::int64_t>(found->second);
    }

private:
    void require_kind(bool ok, const char* what) const {
        if (!ok) raise(codes::prep_column_kind, std::string("column '") + name_ + "' is " + to_string(kind_) + ", cannot " + what);
    }

    std::string name_;
    column_kind kind_;
    time_format time_form_ = time_format::detect;
    std::vector<double> numbers_;
    std::vector<std::uint32_t> codes_;
    std::vector<std::string> categories_;
    std::unordered_map<std::string, std::uint32_t> lookup_;
    std::vector<std::uint8_t> missing_;
    std::shared_ptr<const row_origin> origin_;  // the rows' file lines, when read from a file
    mutable std::string key_;  // reused lookup key, so appending does not allocate per cell
};

/// Named columns of equal length. `source()` names where the rows came from
/// (a file name) for error messages.
class table {
public:
    table() = default;
    explicit table(std::string source) : source_(std::move(source)) {}

    const std::string& source() const noexcept { return source_; }
    std::size_t column_count() const noexcept { return columns_.size(); }
    std::size_t row_count() const noexcept { return columns_.empty() ? 0 : columns_.front().size(); }

    column& add_column(std::string name, column_kind kind) {
        for (const auto& c : columns_)
            if (c.name() == name) raise(codes::prep_csv_duplicate_column, source_ + ": two columns are named '" + name + "'");
        columns_.emplace_back(std::move(name), kind);
        columns_.back().set_origin(origin_);
        return columns_.back();
    }

    /// Records each row's line in the source file (read_csv does), 1-based.
    void set_row_lines(std::vector<std::size_t> lines) {
        auto origin = std::make_shared<row_origin>();
        origin->source = source_;
        origin->lines = std::move(lines);
        origin_ = std::move(origin);
        for (auto& c : columns_) c.set_origin(origin_);
    }
    /// Each row's line in the source file; empty for a table built in code.
    const std::vector<std::size_t>& row_lines() const noexcept {
        static const std::vector<std::size_t> none;
        return origin_ ? origin_->lines : none;
    }
    /// Names a row for messages: "press_log.csv line 11" when the table was
    /// read from a file, "press_log.csv row 9" or "table row 9" otherwise.
    std::string row_place(std::size_t row) const { return detail::row_place(origin_.get(), source_, row); }

    bool contains(std::string_view name) const noexcept {
        for (const auto& c : columns_)
            if (c.name() == name) return true;
        return false;
    }

    std::size_t index_of(std::string_view name) const {
        for (std::size_t k = 0; k < columns_.size(); ++k)
            if (columns_[k].name() == name) return k;
        raise(codes::prep_column_unknown, (source_.empty() ? std::string("table") : source_) + ": no column named '" + std::string(name) + "'");
    }

    const column& operator[](std::size_t index) const noexcept { return columns_[index]; }
    column& operator[](std::size_t index) noexcept { return columns_[index]; }
    const column& at(std::string_view name) const { return columns_[index_of(name)]; }
    column& at(std::string_view name) { return columns_[index_of(name)]; }

    std::vector<std::string> column_names() const {
        std::vector<std::string> names;
        names.reserve(columns_.size());
        for (const auto& c : columns_) names.push_back(c.name());
        return names;
    }

private:
    std::string source_;
    std::vector<column> columns_;
    std::shared_ptr<const row_origin> origin_;
};

/// Dense integer codes 0..k-1 for the distinct values of a column (in order
/// of first appearance), e.g. to pass a group or class column to a split.
/// Missing cells get their own code (after the others) by default, as the
/// tool does: a stratified split then spreads rows without a target over the
/// subsets like a class of their own, and fit_model and evaluate_model drop
/// them and count them. With `missing_is_value` false a missing cell raises
/// prep.value.missing naming its file line.
inline std::vector<std::uint32_t> dense_codes(const column& c, bool missing_is_value = true) {
    std::vector<std::uint32_t> out(c.size());
    if (c.kind() == column_kind::categorical) {
        const auto missing_code = static_cast<std::uint32_t>(c.categories().size());
        for (std::size_t i = 0; i < c.size(); ++i) {
            if (c.is_missing(i)) {
                if (!missing_is_value) raise(codes::prep_value_missing, c.row_place(i) + ", column '" + c.name() + "': the cell is missing");
                out[i] = missing_code;
            } else {
                out[i] = c.code(i);
            }
        }
        return out;
    }
    std::unordered_map<double, std::uint32_t> seen;
    std::uint32_t missing_code = 0;
    bool has_missing_code = false;
    for (std::size_t i = 0; i < c.size(); ++i) {
        if (c.is_missing(i)) {
            if (!missing_is_value) raise(codes::prep_value_missing, c.row_place(i) + ", column '" + c.name() + "': the cell is missing");
            if (!has_missing_code) {
                missing_code = static_cast<std::uint32_t>(seen.size());
                seen.emplace(std::numeric_limits<double>::quiet_NaN(), missing_code);  // placeholder slot
                has_missing_code = true;
            }
            out[i] = missing_code;
            continue;
        }
        auto it = seen.find(c.number(i));
        if (it == seen.end()) it = seen.emplace(c.number(i), static_cast<std::uint32_t>(seen.size())).first;
        out[i] = it->second;
    }
    return out;
}

TENON_NAMESPACE_END
