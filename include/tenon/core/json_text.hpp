// tenon: small helpers that write JSON text (the library's reports and the tool's files)
// (RFC 8259: strings with escapes, numbers, null for values JSON cannot hold).
#pragma once

#include <charconv>
#include <cmath>
#include <cstdio>
#include <string>

#include "tenon/version.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {

// The length of the well-formed UTF-8 sequence starting at s[i] (RFC 3629,
// section 4: no overlong forms, no surrogates, nothing above U+10FFFF), or 0.
inline std::size_t utf8_length(const std::string& s, std::size_t i) noexcept {
    const auto b = [&](std::size_t k) { return i + k < s.size() ? static_cast<unsigned char>(s[i + k]) : 0u; };
    const unsigned c = b(0);
    const auto tail = [&](std::size_t k) { return (b(k) & 0xC0u) == 0x80u; };
    if (c < 0x80) return 1;
    if (c >= 0xC2 && c <= 0xDF) return tail(1) ? 2 : 0;
    if (c >= 0xE0 && c <= 0xEF) {
        const unsigned lo = c == 0xE0 ? 0xA0 : 0x80, hi = c == 0xED ? 0x9F : 0xBF;
        return b(1) >= lo && b(1) <= hi && tail(2) ? 3 : 0;
    }
    if (c >= 0xF0 && c <= 0xF4) {
        const unsigned lo = c == 0xF0 ? 0x90 : 0x80, hi = c == 0xF4 ? 0x8F : 0xBF;
        return b(1) >= lo && b(1) <= hi && tail(2) && tail(3) ? 4 : 0;
    }
    return 0;
}

// The contents of a JSON string for `s`, without the quotes: the short
// escapes of RFC 8259 section 7 where there is one, \u00XX for the other
// control characters, and U+FFFD for each byte that does not start a
// well-formed UTF-8 sequence (JSON text is UTF-8, section 8.1).
inline std::string json_escape(const std::string& s) {
    std::string out;
    out.reserve(s.size());
    for (std::size_t i = 0; i < s.size(); ++i) {
        const char ch = s[i];
        const auto c = static_cast<unsigned char>(ch);
        if (c >= 0x80) {
            const std::size_t n = utf8_length(s, i);
            if (n == 0) {
                out += "\\ufffd";
            } else {
                out.append(s, i, n);
                i += n - 1;
            }
            continue;
        }
        switch (c) {
        case '"': out += "\\\""; break;
        case '\\': out += "\\\\"; break;
        case '\b': out += "\\b"; break;
        case '\f': out += "\\f"; break;
        case '\n': out += "\\n"; break;
        case '\r': out += "\\r"; break;
        case '\t': out += "\\t"; break;
        default:
            if (c < 0x20) {
                char u[8];
                std::snprintf(u, sizeof u, "\\u%04x", static_cast<unsigned>(c));
                out += u;
            } else {
                out += ch;
            }
        }
    }
    return out;
}

// `s` as a JSON string, quotes included.
inline std::string json_string(const std::string& s) { return "\"" + json_escape(s) + "\""; }

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
