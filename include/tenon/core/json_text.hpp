// tenon: small helpers that write JSON text for the deploy reports
// (RFC 8259: strings with escapes, numbers, null for values JSON cannot hold).
#pragma once

#include <charconv>
#include <cmath>
#include <cstdio>
#include <string>

#include "tenon/version.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {

inline std::string json_string(const std::string& s) {
    std::string out = "\"";
    for (const char ch : s) {
        const auto c = static_cast<unsigned char>(ch);
        switch (c) {
            case '"': out += "\\\""; break;
            case '\\': out += "\\\\"; break;
            case '\n': out += "\\n"; break;
            case '\r': out += "\\r"; break;
            case '\t': out += "\\t"; break;
            default:
                if (c < 0x20) {
                    char buffer[8];
                    std::snprintf(buffer, sizeof buffer, "\\u%04x", c);
                    out += buffer;
                } else {
                    out += ch;
                }
        }
    }
    return out + "\"";
}

// JSON has no NaN or infinity: they become null.
inline std::string json_number(double v) {
    if (!std::isfinite(v)) return "null";
    char buffer[32];
    const auto r = std::to_chars(buffer, buffer + sizeof buffer, v);  // shortest text that reads back exactly
    return std::string(buffer, r.ptr);
}

inline std::string json_bool(bool v) { return v ? "true" : "false"; }

// Four significant digits, for tables and messages.
inline std::string short_number(double v) {
    char buffer[32];
    std::snprintf(buffer, sizeof buffer, "%.4g", v);
    return buffer;
}

}  // namespace detail

TENON_NAMESPACE_END
