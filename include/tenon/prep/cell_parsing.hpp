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
    return {"", "NA", "N/A", "NaN", "null", "NULL", "?", "n/a", "na", "nan", "NAN", "none", "None", "NONE", "-", "--", "#N/A", "missing"};
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

/// How a column writes its time stamps. One form per column: detected when
/// the file is read (csv_options) or given by the host, and kept in the plan
/// so that new rows are read the same way.
enum class time_format : std::uint8_t {
    /// Any of the unambiguous text forms (YYYY-MM-DD..., YYYY/MM/DD...,
    /// DD.MM.YYYY...): what a plan written before forms were stored reads.
    detect = 0,
    /// ISO 8601 calendar date, optionally a time after 'T' or a space, and
    /// 'Z' or an offset: YYYY-MM-DD[(T| )HH:MM[:SS[.fff]][Z|(+|-)HH[:]MM]].
    iso = 1,
    /// YYYY/MM/DD[ HH:MM[:SS[.fff]]], as many historians write it.
    year_slash = 2,
    /// DD.MM.YYYY[ HH:MM[:SS[.fff]]], common in German-speaking plants.
    day_dot = 3,
    /// DD/MM/YYYY[ HH:MM[:SS[.fff]]], day first.
    day_slash = 4,
    /// MM/DD/YYYY[ HH:MM[:SS[.fff]]], month first.
    month_slash = 5,
    /// A number of seconds since 1970-01-01T00:00:00Z (only when asked for).
    epoch_seconds = 6,
    /// A number of milliseconds since 1970-01-01T00:00:00Z (only when asked for).
    epoch_milliseconds = 7,
};

/// The form's name as reports, plans and the tool's --time-format spell it.
inline const char* to_string(time_format form) noexcept {
    switch (form) {
    case time_format::detect: return "detect";
    case time_format::iso: return "YYYY-MM-DD";
    case time_format::year_slash: return "YYYY/MM/DD";
    case time_format::day_dot: return "DD.MM.YYYY";
    case time_format::day_slash: return "DD/MM/YYYY";
    case time_format::month_slash: return "MM/DD/YYYY";
    case time_format::epoch_seconds: return "epoch-seconds";
    case time_format::epoch_milliseconds: return "epoch-milliseconds";
    }
    return "unknown";
}

/// The form named `text` (to_string's spelling); false for any other text.
inline bool time_format_from_text(std::string_view text, time_format& out) noexcept {
    for (std::uint8_t k = 0; k <= static_cast<std::uint8_t>(time_format::epoch_milliseconds); ++k)
        if (text == to_string(static_cast<time_format>(k))) {
            out = static_cast<time_format>(k);
            return true;
        }
    return false;
}

namespace detail {

// Reads "HH:MM[:SS[.fff]]" at pos into seconds of the day; checks the ranges
// (hours 0-23, minutes 0-59, seconds 0-60 for a leap second).
inline bool read_clock(std::string_view s, std::size_t& pos, double& seconds) noexcept {
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
    seconds = hour * 3600.0 + minute * 60.0 + second + fraction;
    return true;
}

inline bool civil_seconds(int year, int month, int day, double& out) noexcept {
    if (month < 1 || month > 12 || day < 1 || day > days_in_month(year, month)) return false;
    out = static_cast<double>(days_from_civil(year, static_cast<unsigned>(month), static_cast<unsigned>(day))) * 86400.0;
    return true;
}

// ISO 8601:2004 section 4.1.2.2 calendar dates, 4.2.2.2 times of day, 4.2.5.1
// UTC offsets ('T' may be a space, common practice). Offsets may be written
// +HH:MM, +HHMM or +HH (4.2.5.1 basic and extended formats).
inline bool parse_iso(std::string_view s, double& out) noexcept {
    std::size_t pos = 0;
    int year = 0, month = 0, day = 0;
    if (!read_digits(s, pos, 4, year) || pos >= s.size() || s[pos] != '-') return false;
    ++pos;
    if (!read_digits(s, pos, 2, month) || pos >= s.size() || s[pos] != '-') return false;
    ++pos;
    if (!read_digits(s, pos, 2, day)) return false;
    double seconds = 0;
    if (!civil_seconds(year, month, day, seconds)) return false;
    if (pos == s.size()) {
        out = seconds;
        return true;
    }
    if (s[pos] != 'T' && s[pos] != ' ') return false;
    ++pos;
    double clock = 0;
    if (!read_clock(s, pos, clock)) return false;
    seconds += clock;
    if (pos < s.size()) {
        if (s[pos] == 'Z') {
            ++pos;
        } else if (s[pos] == '+' || s[pos] == '-') {
            const double sign = s[pos] == '+' ? 1.0 : -1.0;
            ++pos;
            int offset_hours = 0, offset_minutes = 0;
            if (!read_digits(s, pos, 2, offset_hours)) return false;
            const bool colon = pos < s.size() && s[pos] == ':';
            if (colon) ++pos;
            if ((colon || pos < s.size()) && !read_digits(s, pos, 2, offset_minutes)) return false;
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

// Three numbers separated by `separator` in the order given by `order`
// ("ymd", "dmy" or "mdy", the year with four digits, day and month with two),
// then optionally a space and a clock time. No offset: read as written.
inline bool parse_ordered(std::string_view s, char separator, const char (&order)[4], double& out) noexcept {
    std::size_t pos = 0;
    int year = 0, month = 0, day = 0;
    for (int part = 0; part < 3; ++part) {
        if (part > 0) {
            if (pos >= s.size() || s[pos] != separator) return false;
            ++pos;
        }
        const char which = order[part];
        if (!read_digits(s, pos, which == 'y' ? 4 : 2, which == 'y' ? year : which == 'm' ? month : day)) return false;
    }
    double seconds = 0;
    if (!civil_seconds(year, month, day, seconds)) return false;
    if (pos < s.size()) {
        if (s[pos] != ' ') return false;
        ++pos;
        double clock = 0;
        if (!read_clock(s, pos, clock)) return false;
        seconds += clock;
    }
    if (pos != s.size()) return false;
    out = seconds;
    return true;
}

}  // namespace detail

/// Reads a time stamp written in `form` into seconds since
/// 1970-01-01T00:00:00Z (a double, fractions of a second kept). Blanks
/// around the cell are ignored. Dates are checked (month 1-12, day within
/// the month, leap years), hours 0-23, minutes 0-59, seconds 0-60. A time
/// without an offset is read as UTC, that is, as written. Epoch forms take a
/// finite number (parse_number). time_format::detect accepts the three
/// unambiguous text forms (iso, year_slash, day_dot).
inline bool parse_datetime(std::string_view cell, time_format form, double& out) noexcept {
    const std::string_view s = detail::trim_blanks(cell);
    switch (form) {
    case time_format::detect:
        return detail::parse_iso(s, out) || detail::parse_ordered(s, '/', "ymd", out) || detail::parse_ordered(s, '.', "dmy", out);
    case time_format::iso: return detail::parse_iso(s, out);
    case time_format::year_slash: return detail::parse_ordered(s, '/', "ymd", out);
    case time_format::day_dot: return detail::parse_ordered(s, '.', "dmy", out);
    case time_format::day_slash: return detail::parse_ordered(s, '/', "dmy", out);
    case time_format::month_slash: return detail::parse_ordered(s, '/', "mdy", out);
    case time_format::epoch_seconds:
    case time_format::epoch_milliseconds: {
        double v = 0;
        if (!parse_number(s, v)) return false;
        out = form == time_format::epoch_seconds ? v : v / 1000.0;
        return true;
    }
    }
    return false;
}

/// parse_datetime with time_format::detect.
inline bool parse_datetime(std::string_view cell, double& out) noexcept { return parse_datetime(cell, time_format::detect, out); }

/// The shortest text that reads back as exactly `value` (used for class
/// names of numeric label columns, e.g. 3.0 -> "3").
inline std::string number_to_text(double value) {
    char buffer[64];
    const auto result = std::to_chars(buffer, buffer + sizeof(buffer), value);
    return std::string(buffer, result.ptr);
}

TENON_NAMESPACE_END
