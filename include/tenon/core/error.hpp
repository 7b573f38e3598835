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
        if (c == '\n')
            o += "\\n";
        else if (c == '\r')
            o += "\\r";
        else if (c == '\t')
            o += "\\t";
        else if (c == '\0')
            o += "\\0";
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

/// What a host built without exceptions is told of a failure before the
/// process ends: the code and the one-line message. It may log them (to a
/// device log, a fault register); the process aborts when it returns.
using failure_handler = void (*)(const char* code, const char* message) noexcept;

namespace detail {
inline failure_handler& current_failure_handler() noexcept {
    static failure_handler handler = nullptr;
    return handler;
}
}  // namespace detail

/// Installs the handler raise() calls in a build without exceptions (null:
/// print to stderr, the default); returns the previous one. With exceptions
/// it is never called: raise() throws.
inline failure_handler set_failure_handler(failure_handler h) noexcept {
    failure_handler previous = detail::current_failure_handler();
    detail::current_failure_handler() = h;
    return previous;
}

/// Throws tenon::error with the given code and message.
/// In a host built without exceptions (TENON_HAS_EXCEPTIONS 0, see
/// version.hpp) it calls the failure handler, or prints the message to
/// stderr, and aborts instead; such hosts use the non-throwing entry points
/// (try_load_model_file, predictor::try_predict_named), which check their
/// input before any call that could raise.
[[noreturn]] inline void raise(const char* code, const std::string& message) {
#if TENON_HAS_EXCEPTIONS
    throw error(code, message);
#else
    const std::string text = escape_control_characters(message);
    if (failure_handler h = detail::current_failure_handler())
        h(code, text.c_str());
    else
        std::fprintf(stderr, "tenon: [%s] %s\n", code, text.c_str());
    std::abort();
#endif
}

TENON_NAMESPACE_END
