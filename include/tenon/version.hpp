// tenon: version macros and the versioned inline namespace.
//
// Every tenon symbol lives in tenon::TENON_ABI_NAMESPACE (an inline namespace,
// tenon::v0 for the 0.x series). Two parts of one host program that embed
// different tenon versions therefore get distinct mangled names and do not
// break the one-definition rule, while user code still writes tenon::xyz.
#pragma once

#define TENON_VERSION_MAJOR 0
#define TENON_VERSION_MINOR 1
#define TENON_VERSION_PATCH 0

#define TENON_VERSION_STRING "0.1.0"
#define TENON_VERSION_NUMBER (TENON_VERSION_MAJOR * 10000 + TENON_VERSION_MINOR * 100 + TENON_VERSION_PATCH)

// Bumped with every release whose binary layout or inline definitions may change.
#define TENON_ABI_NAMESPACE v0_1

// 1 when the host is built with exceptions, 0 with -fno-exceptions. A host
// may define it itself (to 0, to keep tenon's throws out of a build whose
// compiler still allows them).
#ifndef TENON_HAS_EXCEPTIONS
#if defined(__cpp_exceptions) || defined(__EXCEPTIONS) || defined(_CPPUNWIND)
#define TENON_HAS_EXCEPTIONS 1
#else
#define TENON_HAS_EXCEPTIONS 0
#endif
#endif

#define TENON_NAMESPACE_BEGIN                                                                                                                        \
    namespace tenon {                                                                                                                                \
    inline namespace TENON_ABI_NAMESPACE {
#define TENON_NAMESPACE_END                                                                                                                          \
    }                                                                                                                                                \
    }

TENON_NAMESPACE_BEGIN
/// The library version as "major.minor.patch".
inline constexpr const char* version_string() noexcept { return TENON_VERSION_STRING; }
/// The library version as major*10000 + minor*100 + patch.
inline constexpr int version_number() noexcept { return TENON_VERSION_NUMBER; }
TENON_NAMESPACE_END
