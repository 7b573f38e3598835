// The tool's JSON writer (tool.hpp): indented members, strings escaped
// with malformed UTF-8 replaced, numbers by the library's json_number.
#include <cstdint>
#include <cstdio>
#include <string>

#include <tenon/deploy/detail/json_text.hpp>

#include "tool.hpp"

namespace tenon_cli {

json_writer& json_writer::open_object(const char* key) { return open(key, '{'); }
json_writer& json_writer::open_array(const char* key) { return open(key, '['); }
json_writer& json_writer::close_object() { return close('}'); }
json_writer& json_writer::close_array() { return close(']'); }

json_writer& json_writer::text(const char* key, const std::string& value) {
    member(key);
    quoted(value);
    return *this;
}

// The shortest text that reads back exactly; null for NaN and infinities.
json_writer& json_writer::number(const char* key, double value) {
    member(key);
    out_ += tenon::detail::json_number(value);
    return *this;
}

json_writer& json_writer::count(const char* key, std::uint64_t value) {
    member(key);
    out_ += std::to_string(value);
    return *this;
}

json_writer& json_writer::boolean(const char* key, bool value) {
    member(key);
    out_ += tenon::detail::json_bool(value);
    return *this;
}

json_writer& json_writer::null(const char* key) {
    member(key);
    out_ += "null";
    return *this;
}

std::string json_writer::finish() {
    out_ += '\n';
    return out_;
}

std::size_t json_writer::utf8_length(const std::string& s, std::size_t i) {
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

// Not the library's json_string: that one copies bytes above 0x7F as they
// are (malformed UTF-8 included) and writes backspace and form feed as
// six-character escapes; the tool's files keep valid UTF-8 and the short
// escapes they always had.
std::string json_writer::escape(const std::string& s) {
    std::string out;
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

json_writer& json_writer::open(const char* key, char bracket) {
    member(key);
    out_ += bracket;
    first_.push_back(true);
    return *this;
}

json_writer& json_writer::close(char bracket) {
    const bool empty = first_.back();
    first_.pop_back();
    if (!empty) newline();
    out_ += bracket;
    return *this;
}

void json_writer::newline() {
    out_ += '\n';
    out_.append(2 * first_.size(), ' ');
}

void json_writer::member(const char* key) {
    if (!first_.empty()) {
        if (!first_.back()) out_ += ',';
        first_.back() = false;
        newline();
    }
    if (key) {
        quoted(key);
        out_ += ": ";
    }
}

void json_writer::quoted(const std::string& s) {
    out_ += '"';
    out_ += escape(s);
    out_ += '"';
}

}  // namespace tenon_cli
