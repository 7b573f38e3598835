// tenon: what the running CPU offers, and vector operations compiled for it.
//
// tenon is header-only, so the host's compiler flags decide which
// instructions ordinary code may use (SSE2 alone with default x86-64 flags).
// Hot kernels therefore come in extra versions compiled with a function
// attribute for AVX2 + FMA or AVX-512F, and are called only after the
// checks below confirm the CPU (and operating system) support them. The
// attribute is a plain target attribute on inline functions, not
// target_clones, so the functions can be defined in a header included by
// many translation units.
#pragma once

#include <cstddef>

#include "tenon/version.hpp"

#if (defined(__GNUC__) || defined(__clang__)) && (defined(__x86_64__) || defined(__i386__))
#include <immintrin.h>
#define TENON_SIMD_X86 1
#define TENON_TARGET_AVX2 __attribute__((target("avx2,fma")))
#define TENON_TARGET_AVX512 __attribute__((target("avx512f")))
#else
#define TENON_SIMD_X86 0
#endif

// GCC implements the add and multiply intrinsics as plain vector arithmetic,
// which its default -ffp-contract=fast may fuse into multiply-adds. Kernels
// that promise the bits of a plain loop (each operation rounded on its own)
// carry this attribute.
#if defined(__GNUC__) && !defined(__clang__)
#define TENON_NO_CONTRACTION __attribute__((optimize("fp-contract=off")))
#else
#define TENON_NO_CONTRACTION
#endif
// Clang fuses a * b + c written in one expression (its default
// -ffp-contract=on) wherever the target has FMA, as in a function compiled
// for AVX2 or AVX-512; such kernels and the plain loops whose bits they
// promise start their bodies with this.
#if defined(__clang__)
#define TENON_NO_CONTRACTION_IN_BODY _Pragma("clang fp contract(off)")
#else
#define TENON_NO_CONTRACTION_IN_BODY
#endif

TENON_NAMESPACE_BEGIN

/// Whether the running CPU has AVX2 and FMA3 (false off x86 or with other compilers).
inline bool cpu_has_avx2_fma() noexcept {
#if TENON_SIMD_X86
    __builtin_cpu_init();
    return __builtin_cpu_supports("avx2") && __builtin_cpu_supports("fma");
#else
    return false;
#endif
}

/// Whether the running CPU has AVX-512F.
inline bool cpu_has_avx512f() noexcept {
#if TENON_SIMD_X86
    __builtin_cpu_init();
    return __builtin_cpu_supports("avx512f");
#else
    return false;
#endif
}

namespace detail {
// Which vector width the run-time dispatched loops take on the running CPU:
// 2 = AVX-512F, 1 = AVX2 + FMA, 0 = none (plain loops).
inline int vector_level() noexcept {
    static const int level = cpu_has_avx512f() ? 2 : (cpu_has_avx2_fma() ? 1 : 0);
    return level;
}
}  // namespace detail

/// While alive, the calling thread computes with subnormal numbers flushed to
/// zero: subnormal operands read as zero and subnormal results become zero
/// (the FTZ and DAZ bits of x86's MXCSR; elsewhere this does nothing). The
/// thread's previous mode is restored at the end of the scope. On x86 every
/// operation that reads or produces a subnormal value costs a microcode
/// assist of the order of a hundred cycles, and quantities that decay
/// geometrically (Adam's moments of a weight whose gradient stays 0) spend
/// long stretches there.
class flush_subnormals_scope {
public:
#if TENON_SIMD_X86
    flush_subnormals_scope() noexcept : saved_(_mm_getcsr()) { _mm_setcsr(saved_ | flush_bits); }
    ~flush_subnormals_scope() { _mm_setcsr(saved_); }
#else
    flush_subnormals_scope() noexcept {}
#endif
    flush_subnormals_scope(const flush_subnormals_scope&) = delete;
    flush_subnormals_scope& operator=(const flush_subnormals_scope&) = delete;

private:
#if TENON_SIMD_X86
    static constexpr unsigned flush_bits = 0x8040u;  // FTZ (bit 15) | DAZ (bit 6)
    unsigned saved_;
#endif
};

#if TENON_SIMD_X86
namespace detail {

// Vector operations for AVX-512F and AVX2. (The AVX-512 square root,
// minimum and maximum are spelled as their all-lanes masked forms: GCC 12's
// unmasked ones start from an "undefined" register that -Wmaybe-uninitialized
// reports in the host's build.) select_positive(y, a) is a where y > 0 and
// +0 elsewhere (NaN y included), lane by lane. Each is compiled for its
// instruction set alone, so the host's flags need not enable it; they are
// only called after kernel_path_available() said yes.
template <class T>
struct avx512_ops;
template <>
struct avx512_ops<float> {
    using vector = __m512;
    static constexpr std::size_t lanes = 16;
    TENON_TARGET_AVX512 static vector zero() noexcept { return _mm512_setzero_ps(); }
    TENON_TARGET_AVX512 static vector load(const float* p) noexcept { return _mm512_loadu_ps(p); }
    TENON_TARGET_AVX512 static vector broadcast(float v) noexcept { return _mm512_set1_ps(v); }
    TENON_TARGET_AVX512 static vector fma(vector a, vector b, vector c) noexcept { return _mm512_fmadd_ps(a, b, c); }
    TENON_TARGET_AVX512 static void store(float* p, vector v) noexcept { _mm512_storeu_ps(p, v); }
    TENON_TARGET_AVX512 static vector add(vector a, vector b) noexcept { return _mm512_add_ps(a, b); }
    TENON_TARGET_AVX512 static vector sub(vector a, vector b) noexcept { return _mm512_sub_ps(a, b); }
    TENON_TARGET_AVX512 static vector mul(vector a, vector b) noexcept { return _mm512_mul_ps(a, b); }
    TENON_TARGET_AVX512 static vector div(vector a, vector b) noexcept { return _mm512_div_ps(a, b); }
    TENON_TARGET_AVX512 static vector sqrt(vector a) noexcept { return _mm512_mask_sqrt_ps(a, static_cast<__mmask16>(0xFFFF), a); }
    TENON_TARGET_AVX512 static vector max(vector a, vector b) noexcept { return _mm512_mask_max_ps(a, static_cast<__mmask16>(0xFFFF), a, b); }
    TENON_TARGET_AVX512 static vector min(vector a, vector b) noexcept { return _mm512_mask_min_ps(a, static_cast<__mmask16>(0xFFFF), a, b); }
    TENON_TARGET_AVX512 static vector select_positive(vector y, vector a) noexcept {
        return _mm512_maskz_mov_ps(_mm512_cmp_ps_mask(y, _mm512_setzero_ps(), _CMP_GT_OQ), a);
    }
};
template <>
struct avx512_ops<double> {
    using vector = __m512d;
    static constexpr std::size_t lanes = 8;
    TENON_TARGET_AVX512 static vector zero() noexcept { return _mm512_setzero_pd(); }
    TENON_TARGET_AVX512 static vector load(const double* p) noexcept { return _mm512_loadu_pd(p); }
    TENON_TARGET_AVX512 static vector broadcast(double v) noexcept { return _mm512_set1_pd(v); }
    TENON_TARGET_AVX512 static vector fma(vector a, vector b, vector c) noexcept { return _mm512_fmadd_pd(a, b, c); }
    TENON_TARGET_AVX512 static void store(double* p, vector v) noexcept { _mm512_storeu_pd(p, v); }
    TENON_TARGET_AVX512 static vector add(vector a, vector b) noexcept { return _mm512_add_pd(a, b); }
    TENON_TARGET_AVX512 static vector sub(vector a, vector b) noexcept { return _mm512_sub_pd(a, b); }
    TENON_TARGET_AVX512 static vector mul(vector a, vector b) noexcept { return _mm512_mul_pd(a, b); }
    TENON_TARGET_AVX512 static vector div(vector a, vector b) noexcept { return _mm512_div_pd(a, b); }
    TENON_TARGET_AVX512 static vector sqrt(vector a) noexcept { return _mm512_mask_sqrt_pd(a, static_cast<__mmask8>(0xFF), a); }
    TENON_TARGET_AVX512 static vector max(vector a, vector b) noexcept { return _mm512_mask_max_pd(a, static_cast<__mmask8>(0xFF), a, b); }
    TENON_TARGET_AVX512 static vector min(vector a, vector b) noexcept { return _mm512_mask_min_pd(a, static_cast<__mmask8>(0xFF), a, b); }
    // Eight floats widened to doubles, and eight doubles rounded to floats
    // (all-lanes masked forms, as above).
    TENON_TARGET_AVX512 static vector load(const float* p) noexcept { return _mm512_maskz_cvtps_pd(static_cast<__mmask8>(0xFF), _mm256_loadu_ps(p)); }
    TENON_TARGET_AVX512 static void store(float* p, vector v) noexcept { _mm256_storeu_ps(p, _mm512_maskz_cvtpd_ps(static_cast<__mmask8>(0xFF), v)); }
    TENON_TARGET_AVX512 static vector select_positive(vector y, vector a) noexcept {
        return _mm512_maskz_mov_pd(_mm512_cmp_pd_mask(y, _mm512_setzero_pd(), _CMP_GT_OQ), a);
    }
};
template <class T>
struct avx2_ops;
template <>
struct avx2_ops<float> {
    using vector = __m256;
    static constexpr std::size_t lanes = 8;
    TENON_TARGET_AVX2 static vector zero() noexcept { return _mm256_setzero_ps(); }
    TENON_TARGET_AVX2 static vector load(const float* p) noexcept { return _mm256_loadu_ps(p); }
    TENON_TARGET_AVX2 static vector broadcast(float v) noexcept { return _mm256_set1_ps(v); }
    TENON_TARGET_AVX2 static vector fma(vector a, vector b, vector c) noexcept { return _mm256_fmadd_ps(a, b, c); }
    TENON_TARGET_AVX2 static void store(float* p, vector v) noexcept { _mm256_storeu_ps(p, v); }
    TENON_TARGET_AVX2 static vector add(vector a, vector b) noexcept { return _mm256_add_ps(a, b); }
    TENON_TARGET_AVX2 static vector sub(vector a, vector b) noexcept { return _mm256_sub_ps(a, b); }
    TENON_TARGET_AVX2 static vector mul(vector a, vector b) noexcept { return _mm256_mul_ps(a, b); }
    TENON_TARGET_AVX2 static vector div(vector a, vector b) noexcept { return _mm256_div_ps(a, b); }
    TENON_TARGET_AVX2 static vector sqrt(vector a) noexcept { return _mm256_sqrt_ps(a); }
    TENON_TARGET_AVX2 static vector max(vector a, vector b) noexcept { return _mm256_max_ps(a, b); }
    TENON_TARGET_AVX2 static vector min(vector a, vector b) noexcept { return _mm256_min_ps(a, b); }
    TENON_TARGET_AVX2 static vector select_positive(vector y, vector a) noexcept {
        return _mm256_and_ps(_mm256_cmp_ps(y, _mm256_setzero_ps(), _CMP_GT_OQ), a);
    }
};
template <>
struct avx2_ops<double> {
    using vector = __m256d;
    static constexpr std::size_t lanes = 4;
    TENON_TARGET_AVX2 static vector zero() noexcept { return _mm256_setzero_pd(); }
    TENON_TARGET_AVX2 static vector load(const double* p) noexcept { return _mm256_loadu_pd(p); }
    TENON_TARGET_AVX2 static vector broadcast(double v) noexcept { return _mm256_set1_pd(v); }
    TENON_TARGET_AVX2 static vector fma(vector a, vector b, vector c) noexcept { return _mm256_fmadd_pd(a, b, c); }
    TENON_TARGET_AVX2 static void store(double* p, vector v) noexcept { _mm256_storeu_pd(p, v); }
    TENON_TARGET_AVX2 static vector add(vector a, vector b) noexcept { return _mm256_add_pd(a, b); }
    TENON_TARGET_AVX2 static vector sub(vector a, vector b) noexcept { return _mm256_sub_pd(a, b); }
    TENON_TARGET_AVX2 static vector mul(vector a, vector b) noexcept { return _mm256_mul_pd(a, b); }
    TENON_TARGET_AVX2 static vector div(vector a, vector b) noexcept { return _mm256_div_pd(a, b); }
    TENON_TARGET_AVX2 static vector sqrt(vector a) noexcept { return _mm256_sqrt_pd(a); }
    TENON_TARGET_AVX2 static vector max(vector a, vector b) noexcept { return _mm256_max_pd(a, b); }
    TENON_TARGET_AVX2 static vector min(vector a, vector b) noexcept { return _mm256_min_pd(a, b); }
    // Four floats widened to doubles, and four doubles rounded to floats.
    TENON_TARGET_AVX2 static vector load(const float* p) noexcept { return _mm256_cvtps_pd(_mm_loadu_ps(p)); }
    TENON_TARGET_AVX2 static void store(float* p, vector v) noexcept { _mm_storeu_ps(p, _mm256_cvtpd_ps(v)); }
    TENON_TARGET_AVX2 static vector select_positive(vector y, vector a) noexcept {
        return _mm256_and_pd(_mm256_cmp_pd(y, _mm256_setzero_pd(), _CMP_GT_OQ), a);
    }
};

}  // namespace detail
#endif  // TENON_SIMD_X86

TENON_NAMESPACE_END
