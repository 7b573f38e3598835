// tenon: the one error type, carrying a stable code.
//
// Every failure a host can cause (bad shapes, bad files, bad options) throws
// tenon::error. Its code() is a stable identifier such as "core.shape.mismatch"
// that hosts may switch on and that the README's bad-input table lists; its
// what() reads "[code] message", where the message says what, where and which
// value. The registry of all codes lives in core/error_codes.hpp.
#pragma once

#include <cstdio>
#include <cstdlib>
#include <stdexcept>
#include <string>
#include <utility>

#include "tenon/version.hpp"

TENON_NAMESPACE_BEGIN

class error : public std::runtime_error {
public:
    error(std::string code, const std::string& message)
        : std::runtime_error("[" + code + "] " + message), code_(std::move(code)) {}

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
    std::fprintf(stderr, "tenon: [%s] %s\n", code, message.c_str());
    std::abort();
#endif
}

TENON_NAMESPACE_END
