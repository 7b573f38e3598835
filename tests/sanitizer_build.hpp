// Which sanitizer runtime a test executable is built with. GCC defines
// __SANITIZE_ADDRESS__ / __SANITIZE_THREAD__; clang reports the same through
// __has_feature (clang documentation, "AddressSanitizer", "Conditional
// compilation"), and defines neither GCC macro.
#pragma once

#if defined(__SANITIZE_ADDRESS__)
#define TENON_TEST_ASAN 1
#endif
#if defined(__SANITIZE_THREAD__)
#define TENON_TEST_TSAN 1
#endif
#if defined(__has_feature)
#if __has_feature(address_sanitizer) && !defined(TENON_TEST_ASAN)
#define TENON_TEST_ASAN 1
#endif
#if __has_feature(thread_sanitizer) && !defined(TENON_TEST_TSAN)
#define TENON_TEST_TSAN 1
#endif
#endif
#if defined(TENON_TEST_ASAN) || defined(TENON_TEST_TSAN)
#define TENON_TEST_SANITIZER 1
#endif
