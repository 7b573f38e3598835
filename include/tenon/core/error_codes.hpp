// tenon: the registry of error codes, in one place.
//
// Each entry is X(identifier, "stable.code", "what it means"). The identifier
// becomes tenon::codes::identifier (a const char*), and error_registry() lists
// every entry so that tests can walk it (each code needs a test that triggers
// it and a row in the README's bad-input table). Codes are never renamed or
// reused once released; add new ones at the end of their area's list.
#pragma once

#include <cstddef>

#include "tenon/version.hpp"

// core/: shapes, scalar types, random numbers.
#define TENON_ERROR_CODES_CORE(X)                                                              \
    X(shape_mismatch, "core.shape.mismatch", "operand shapes do not fit the operation")        \
    X(invalid_argument, "core.argument.invalid", "an argument is outside its documented range")

// autodiff/: the tape and its operations.
#define TENON_ERROR_CODES_AUTODIFF(X)                                                          \
    X(backward_not_scalar, "autodiff.backward.not_scalar",                                     \
      "backward() was started from a value that is not 1x1")                                   \
    X(foreign_value, "autodiff.value.foreign",                                                 \
      "a value recorded on one tape was used on another, or after the tape was cleared")       \
    X(non_finite, "autodiff.non_finite",                                                       \
      "with finite checking on, an operation produced a NaN or an infinity")                   \
    X(too_many_inputs, "autodiff.custom.too_many_inputs",                                      \
      "a custom operation was given more inputs than a tape node holds")

// prep/: reading tables, encoding, scaling, imputation, splitting, plans.
#define TENON_ERROR_CODES_PREP(X)

// layers/, losses/, update/: model components.
#define TENON_ERROR_CODES_MODEL(X)

// train/: the trainer, metrics, cross-validation.
#define TENON_ERROR_CODES_TRAIN(X)

// deploy/: model files, the predictor, retraining, drift.
#define TENON_ERROR_CODES_DEPLOY(X)

#define TENON_ERROR_CODES(X)                                                                   \
    TENON_ERROR_CODES_CORE(X)                                                                  \
    TENON_ERROR_CODES_AUTODIFF(X)                                                              \
    TENON_ERROR_CODES_PREP(X)                                                                  \
    TENON_ERROR_CODES_MODEL(X)                                                                 \
    TENON_ERROR_CODES_TRAIN(X)                                                                 \
    TENON_ERROR_CODES_DEPLOY(X)

TENON_NAMESPACE_BEGIN

namespace codes {
#define TENON_DETAIL_DECLARE_CODE(identifier, code, meaning) inline constexpr const char* identifier = code;
TENON_ERROR_CODES(TENON_DETAIL_DECLARE_CODE)
#undef TENON_DETAIL_DECLARE_CODE
}  // namespace codes

struct error_code_entry {
    const char* code;
    const char* meaning;
};

namespace detail {
#define TENON_DETAIL_REGISTRY_ENTRY(identifier, code, meaning) error_code_entry{code, meaning},
inline constexpr error_code_entry error_code_table[] = {TENON_ERROR_CODES(TENON_DETAIL_REGISTRY_ENTRY)};
#undef TENON_DETAIL_REGISTRY_ENTRY
}  // namespace detail

/// Every error code tenon can raise, with its meaning.
inline constexpr const error_code_entry* error_registry_begin() noexcept { return detail::error_code_table; }
inline constexpr const error_code_entry* error_registry_end() noexcept {
    return detail::error_code_table + sizeof(detail::error_code_table) / sizeof(detail::error_code_table[0]);
}

TENON_NAMESPACE_END
