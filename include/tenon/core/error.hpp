// tenon: the one error type, carrying a stable code.
//
// Every failure a host can cause (bad shapes, bad files, bad options) throws
// tenon::error. Its code() is a stable identifier such as "core.shape.mismatch"
// that hosts may switch on and that the README's bad-input table lists; its
// what() reads "[code] message", where the message says what, where and which
// value. The registry of all codes lives in core/error_codes.hpp. A message
// is one line whatever it quotes: control characters from a cell, a column
// name or a path (CR, LF, NUL, ...) are written as escapes.
#pragma once

#include <cstdio>
#include <cstdlib>
#include <stdexcept>
#include <string>
#include <utility>

#include "tenon/version.hpp"

TENON_NAMESPACE_BEGIN

/// `text` with every control character (a byte below 0x20, or DEL) written
/// as an escape: \n, \r, \t, \0 or \xNN. Other bytes are kept as they are.
inline std::string escape_control_characters(const std::string& text) {
    std::string o;
    o.reserve(text.size());
    for (const char c : text) {
        const auto u = static_cast<unsigned char>(c);
        if (c == '\n') o += "\\n";
        else if (c == '\r') o += "\\r";
        else if (c == '\t') o += "\\t";
        else if (c == '\0') o += "\\0";
        else if (u < 0x20 || u == 0x7f) {
            const char digits[] = "0123456789abcdef";
            o += "\\x";
            o += digits[u >> 4];
            o += digits[u & 15];
        } else {
            o += c;
        }
    }
    return o;
}

class error : public std::runtime_error {
public:
    error(std::string code, const std::string& message)
        : std::runtime_error("[" + code + "] " + escape_control_characters(message)), code_(std::move(code)) {}

    /// Stable identifier of the failure, e.g. "core.shape.mismatch".
    const std::string& code() const noexcept { return code_; }

private:
    std::string code_;
};

/// Throws tenon::error with the given code and message.
/// In a host built without exceptions (-fno-exceptions) it prints the
/// message to stderr and aborts instead; such hosts use the non-throwing
/// entry points (e.g. predictor::try_predict_named in deploy/), which check
/// their input before any call that could raise.
[[noreturn]] inline void raise(const char* code, const std::string& message) {
#if defined(__cpp_exceptions) || defined(__EXCEPTIONS) || defined(_CPPUNWIND)
    throw error(code, message);
#else
    std::fprintf(stderr, "tenon: [%s] %s\n", code, escape_control_characters(message).c_str());
    std::abort();
#endif
}

TENON_NAMESPACE_END
