// tenon: reading one cell of text as a number, a date/time or a missing value.
//
// Every parser here is locale-independent (std::from_chars, never strtod with
// the host's locale), takes a std::string_view and allocates nothing, so the
// same code serves the CSV reader, type inference and a deployed plan that
// prepares raw rows one at a time.
#pragma once

#include <charconv>
#include <cmath>
#include <cstdint>
#include <string>
#include <string_view>
#include <system_error>
#include <vector>

#include "tenon/version.hpp"

TENON_NAMESPACE_BEGIN

/// Cell texts that read as "missing" unless a host chooses its own list:
/// the empty cell and the spellings that spreadsheet and plant exports
/// commonly write for one (common practice, not a standard). The tool reads
/// with this list too, so a host's plan and `tenon train`'s are the same.
inline std::vector<std::string> default_missing_tokens() {
    return {"",     "NA",   "N/A",  "NaN", "null", "NULL", "?",  "n/a",  "na",
            "nan",  "NAN",  "none", "None", "NONE", "-",   "--", "#N/A", "missing"};
}

namespace detail {

inline bool is_blank(char c) noexcept { return c == ' ' || c == '\t'; }

inline std::string_view trim_blanks(std::string_view s) noexcept {
    while (!s.empty() && is_blank(s.front())) s.remove_prefix(1);
    while (!s.empty() && is_blank(s.back())) s.remove_suffix(1);
    return s;
}

inline bool read_digits(std::string_view s, std::size_t& pos, std::size_t count, int& value) noexcept {
    if (pos + count > s.size()) return false;
    int v = 0;
    for (std::size_t k = 0; k < count; ++k) {
        const char c = s[pos + k];
        if (c < '0' || c > '9') return false;
        v = v * 10 + (c - '0');
    }
    value = v;
    pos += count;
    return true;
}

/// Days since 1970-01-01 of a proleptic Gregorian date: H. Hinnant,
/// "chrono-Compatible Low-Level Date Algorithms" (2013), days_from_civil.
inline std::int64_t days_from_civil(std::int64_t y, unsigned m, unsigned d) noexcept {
    y -= m <= 2 ? 1 : 0;
    const std::int64_t era = (y >= 0 ? y : y - 399) / 400;
    const auto yoe = static_cast<unsigned>(y - era * 400);
    const unsigned doy = (153 * (m + (m > 2 ? static_cast<unsigned>(-3) : 9u)) + 2) / 5 + d - 1;
    const unsigned doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    return era * 146097 + static_cast<std::int64_t>(doe) - 719468;
}

inline bool is_leap_year(int y) noexcept { return (y % 4 == 0 && y % 100 != 0) || y % 400 == 0; }

inline int days_in_month(int y, int m) noexcept {
    static constexpr int days[12] = {31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31};
    return m == 2 && is_leap_year(y) ? 29 : days[m - 1];
}

}  // namespace detail

/// True when `cell` (blanks around it ignored) equals one of `tokens`.
inline bool is_missing_cell(std::string_view cell, const std::vector<std::string>& tokens) noexcept {
    const std::string_view t = detail::trim_blanks(cell);
    for (const auto& token : tokens)
        if (t == token) return true;
    return false;
}

/// Parses the whole cell (blanks around it ignored, one leading '+' allowed)
/// as a finite decimal or scientific number. Returns false for anything else,
/// including "inf", "nan", hexadecimal and trailing characters.
inline bool parse_number(std::string_view cell, double& out) noexcept {
    std::string_view s = detail::trim_blanks(cell);
    if (!s.empty() && s.front() == '+') {
        s.remove_prefix(1);
        if (!s.empty() && (s.front() == '+' || s.front() == '-')) return false;
    }
    if (s.empty()) return false;
    double v = 0;
    const auto result = std::from_chars(s.data(), s.data() + s.size(), v, std::chars_format::general);
    if (result.ec != std::errc() || result.ptr != s.data() + s.size()) return false;
    if (!std::isfinite(v)) return false;
    out = v;
    return true;
}

/// Parses an ISO 8601 date or date-time, or a YYYY/MM/DD date, into seconds
/// since 1970-01-01T00:00:00Z (a double, fractions of a second kept).
/// Accepted forms (ISO 8601:2004, section 4.1.2.2 calendar dates, 4.2.2.2
/// times of day, 4.2.5.1 UTC offsets; the 'T' may be a space, common practice):
///   YYYY-MM-DD, YYYY/MM/DD,
///   YYYY-MM-DDTHH:MM, ...THH:MM:SS, ...THH:MM:SS.fff (any number of digits),
///   each time optionally followed by 'Z' or +HH:MM / -HH:MM.
/// A time without an offset is read as UTC. Dates are checked (month 1-12,
/// day within the month, leap years), hours 0-23, minutes 0-59, seconds 0-60.
inline bool parse_datetime(std::string_view cell, double& out) noexcept {
    using detail::read_digits;
    const std::string_view s = detail::trim_blanks(cell);
    std::size_t pos = 0;
    int year = 0, month = 0, day = 0;
    if (!read_digits(s, pos, 4, year)) return false;
    if (pos >= s.size() || (s[pos] != '-' && s[pos] != '/')) return false;
    const char separator = s[pos++];
    if (!read_digits(s, pos, 2, month)) return false;
    if (pos >= s.size() || s[pos] != separator) return false;
    ++pos;
    if (!read_digits(s, pos, 2, day)) return false;
    if (month < 1 || month > 12 || day < 1 || day > detail::days_in_month(year, month)) return false;
    double seconds = static_cast<double>(detail::days_from_civil(year, static_cast<unsigned>(month),
                                                                 static_cast<unsigned>(day))) * 86400.0;
    if (pos == s.size()) {
        out = seconds;
        return true;
    }
    if (separator != '-') return false;  // YYYY/MM/DD carries no time here
    if (s[pos] != 'T' && s[pos] != ' ') return false;
    ++pos;
    int hour = 0, minute = 0, second = 0;
    if (!read_digits(s, pos, 2, hour)) return false;
    if (pos >= s.size() || s[pos] != ':') return false;
    ++pos;
    if (!read_digits(s, pos, 2, minute)) return false;
    double fraction = 0;
    if (pos < s.size() && s[pos] == ':') {
        ++pos;
        if (!read_digits(s, pos, 2, second)) return false;
        if (pos < s.size() && s[pos] == '.') {
            ++pos;
            double weight = 0.1;
            std::size_t digits = 0;
            while (pos < s.size() && s[pos] >= '0' && s[pos] <= '9') {
                fraction += weight * (s[pos] - '0');
                weight *= 0.1;
                ++pos;
                ++digits;
            }
            if (digits == 0) return false;
        }
    }
    if (hour > 23 || minute > 59 || second > 60) return false;
    seconds += hour * 3600.0 + minute * 60.0 + second + fraction;
    if (pos < s.size()) {
        if (s[pos] == 'Z') {
            ++pos;
        } else if (s[pos] == '+' || s[pos] == '-') {
            const double sign = s[pos] == '+' ? 1.0 : -1.0;
            ++pos;
            int offset_hours = 0, offset_minutes = 0;
            if (!read_digits(s, pos, 2, offset_hours)) return false;
            if (pos >= s.size() || s[pos] != ':') return false;
            ++pos;
            if (!read_digits(s, pos, 2, offset_minutes)) return false;
            if (offset_hours > 23 || offset_minutes > 59) return false;
            // Local time = UTC + offset, so UTC = local - offset.
            seconds -= sign * (offset_hours * 3600.0 + offset_minutes * 60.0);
        } else {
            return false;
        }
    }
    if (pos != s.size()) return false;
    out = seconds;
    return true;
}

/// The shortest text that reads back as exactly `value` (used for class
/// names of numeric label columns, e.g. 3.0 -> "3").
inline std::string number_to_text(double value) {
    char buffer[64];
    const auto result = std::to_chars(buffer, buffer + sizeof(buffer), value);
    return std::string(buffer, result.ptr);
}

TENON_NAMESPACE_END
