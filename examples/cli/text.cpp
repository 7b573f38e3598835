// Numbers, durations, dates and failures as the tool prints them.
#include <algorithm>
#include <chrono>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <exception>
#include <new>
#include <string>

#include "tool_parts.hpp"

namespace tenon_cli {
namespace detail {

// A number for a table cell or a summary line, at most about a dozen
// characters wide: fixed-point below a million in magnitude, scientific
// notation above (a value near 3.4e38 would otherwise print 39 digits and
// run into the next column).
std::string fixed(double v, int decimals) {
    if (!std::isfinite(v)) return "-";
    char buffer[64];
    if (std::fabs(v) >= 1e6)
        std::snprintf(buffer, sizeof buffer, "%.*e", std::min(decimals, 3), v);
    else
        std::snprintf(buffer, sizeof buffer, "%.*f", decimals, v);
    return buffer;
}

std::string duration_text(double seconds) {
    if (!std::isfinite(seconds) || seconds < 0) return "?";
    if (seconds < 60) return fixed(seconds, 1) + "s";
    const auto whole = static_cast<long long>(seconds + 0.5);
    if (whole < 3600) return std::to_string(whole / 60) + "m" + (whole % 60 < 10 ? "0" : "") + std::to_string(whole % 60) + "s";
    return std::to_string(whole / 3600) + "h" + (whole / 60 % 60 < 10 ? "0" : "") + std::to_string(whole / 60 % 60) + "m";
}

double steady_seconds() { return std::chrono::duration<double>(std::chrono::steady_clock::now().time_since_epoch()).count(); }

// A message on one line: control characters (a CR, LF, tab, NUL or other
// byte below 0x20, or DEL, e.g. from a cell's text) are written as escapes
// (\n, \r, \t, \0, \xNN), so the line stays one line and shows what was there.
std::string one_line(const std::string& s) { return tenon::escape_control_characters(s); }

std::string without_code(const std::string& what) {
    if (!what.empty() && what[0] == '[') {
        const auto end = what.find("] ");
        if (end != std::string::npos) return what.substr(end + 2);
    }
    return what;
}

// The one line the tool prints for a failure of `command`, and its exit status.
std::string failure_text(const std::string& command, const std::exception_ptr& failure, int& status) {
    try {
        std::rethrow_exception(failure);
    } catch (const cli_failure& e) {
        status = e.exit_status();
        return command + ": error: " + one_line(e.what());
    } catch (const tenon::error& e) {
        status = exit_bad_input;
        return command + ": error: " + one_line(e.what());
    } catch (const std::bad_alloc& e) {  // also std::bad_array_new_length
        status = exit_unexpected;
        return command + ": error: out of memory (" + one_line(e.what()) +
            "): the run needs more memory than the system allows it; a smaller network (--hidden) or fewer rows or columns needs less";
    } catch (const std::exception& e) {
        status = exit_unexpected;
        return command + ": unexpected failure: " + one_line(e.what());
    } catch (...) {
        status = exit_unexpected;
        return command + ": unexpected failure";
    }
}

// Seconds since 1970 as "YYYY-MM-DD HH:MM:SS UTC", by the days-to-civil
// algorithm of Hinnant 2013, "chrono-Compatible Low-Level Date Algorithms",
// civil_from_days (proleptic Gregorian calendar).
std::string utc_text(std::int64_t seconds) {
    std::int64_t days = seconds / 86400, rest = seconds % 86400;
    if (rest < 0) {
        rest += 86400;
        days -= 1;
    }
    const std::int64_t z = days + 719468;
    const std::int64_t era = (z >= 0 ? z : z - 146096) / 146097;
    const std::int64_t doe = z - era * 146097;
    const std::int64_t yoe = (doe - doe / 1460 + doe / 36524 - doe / 146096) / 365;
    const std::int64_t doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    const std::int64_t mp = (5 * doy + 2) / 153;
    const std::int64_t day = doy - (153 * mp + 2) / 5 + 1;
    const std::int64_t month = mp < 10 ? mp + 3 : mp - 9;
    const std::int64_t year = yoe + era * 400 + (month <= 2 ? 1 : 0);
    char buffer[64];
    std::snprintf(buffer, sizeof buffer, "%04lld-%02lld-%02lld %02lld:%02lld:%02lld UTC", static_cast<long long>(year), static_cast<long long>(month),
                  static_cast<long long>(day), static_cast<long long>(rest / 3600), static_cast<long long>(rest / 60 % 60),
                  static_cast<long long>(rest % 60));
    return buffer;
}

std::string significant(double v, int digits) {
    if (!std::isfinite(v)) return "-";
    char buffer[64];
    std::snprintf(buffer, sizeof buffer, "%.*g", digits, v);
    return buffer;
}

}  // namespace detail
}  // namespace tenon_cli
