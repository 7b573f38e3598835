// The tool's JSON writer (tool.hpp): indented members, strings escaped
// with malformed UTF-8 replaced, numbers by the library's json_number.
#include <cstdint>
#include <cstdio>
#include <string>

#include <tenon/core/json_text.hpp>

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

std::string json_writer::escape(const std::string& s) { return tenon::detail::json_escape(s); }

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
