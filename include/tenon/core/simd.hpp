// tenon: what the running CPU offers, and vector operations compiled for it.
//
// tenon is header-only, so the host's compiler flags decide which
// instructions ordinary code may use (SSE2 alone with default x86-64 flags).
// Hot kernels therefore come in extra versions compiled with a function
// attribute for AVX2 + FMA or AVX-512F (NEON on 32-bit ARM), and are called
// only after the checks below confirm the CPU (and operating system) support
// them; aarch64 has NEON in its baseline. The
// attribute is a plain target attribute on inline functions, not
// target_clones, so the functions can be defined in a header included by
// many translation units.
#pragma once

#include <cstddef>
#include <limits>

#include "tenon/version.hpp"

#if (defined(__GNUC__) || defined(__clang__)) && (defined(__x86_64__) || defined(__i386__))
#include <immintrin.h>
#define TENON_SIMD_X86 1
#define TENON_TARGET_AVX2 __attribute__((target("avx2,fma")))
#define TENON_TARGET_AVX512 __attribute__((target("avx512f")))
#else
#define TENON_SIMD_X86 0
#endif

// ARM's vector unit (NEON, Advanced SIMD). On aarch64 it is part of the
// baseline: every kernel may use it, with float and double lanes. On 32-bit
// ARM (armhf: ARMv7, whose Debian baseline has no NEON) the kernels carry a
// target attribute for NEON with VFPv4 (for the fused multiply-add) and run
// only after cpu_has_neon() checked the CPU; ARMv7 NEON has float lanes only.
#if (defined(__GNUC__) || defined(__clang__)) && defined(__aarch64__)
#include <arm_neon.h>
#define TENON_SIMD_NEON 1
#define TENON_SIMD_NEON64 1
#define TENON_TARGET_NEON
#elif defined(__GNUC__) && !defined(__clang__) && defined(__arm__) && defined(__linux__)
#include <arm_neon.h>
#include <sys/auxv.h>
#define TENON_SIMD_NEON 1
#define TENON_SIMD_NEON64 0
#define TENON_TARGET_NEON __attribute__((target("fpu=neon-vfpv4")))
#else
#define TENON_SIMD_NEON 0
#define TENON_SIMD_NEON64 0
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

/// Whether the running CPU has NEON (always on aarch64; on 32-bit ARM, NEON
/// and VFPv4 as the kernel reports them; false elsewhere).
inline bool cpu_has_neon() noexcept {
#if TENON_SIMD_NEON64
    return true;
#elif TENON_SIMD_NEON
    // HWCAP_NEON and HWCAP_VFPv4 of the Linux kernel's arch/arm/include/uapi/asm/hwcap.h.
    constexpr unsigned long neon = 1ul << 12, vfpv4 = 1ul << 16;
    static const bool has = (getauxval(AT_HWCAP) & (neon | vfpv4)) == (neon | vfpv4);
    return has;
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

namespace detail {
// MXCSR's flush-to-zero (bit 15) and denormals-are-zero (bit 6) bits.
inline constexpr unsigned mxcsr_flush_bits = 0x8040u;

// How many flush_subnormals_scope the calling thread holds: while
// one is held, the predictor's calls leave the mode as it is instead of
// saving and restoring it.
inline unsigned& flush_scopes_held() noexcept {
    static thread_local unsigned held = 0;
    return held;
}
}  // namespace detail

/// While alive, the calling thread computes with subnormal numbers flushed to
/// zero: subnormal operands read as zero and subnormal results become zero
/// (the FTZ and DAZ bits of x86's MXCSR; elsewhere this does nothing). The
/// thread's previous mode is restored at the end of the scope. On x86 every
/// operation that reads or produces a subnormal value costs a microcode
/// assist of the order of a hundred cycles, and quantities that decay
/// geometrically (Adam's moments of a weight whose gradient stays 0) spend
/// long stretches there. A serving loop that holds one spares each
/// predictor call its own save and restore of the mode (predictor.hpp).
class flush_subnormals_scope {
public:
#if TENON_SIMD_X86
    flush_subnormals_scope() noexcept : saved_(_mm_getcsr()) {
        _mm_setcsr(saved_ | detail::mxcsr_flush_bits);
        ++detail::flush_scopes_held();
    }
    ~flush_subnormals_scope() {
        --detail::flush_scopes_held();
        _mm_setcsr(saved_);
    }
#else
    flush_subnormals_scope() noexcept { ++detail::flush_scopes_held(); }
    ~flush_subnormals_scope() { --detail::flush_scopes_held(); }
#endif
    flush_subnormals_scope(const flush_subnormals_scope&) = delete;
    flush_subnormals_scope& operator=(const flush_subnormals_scope&) = delete;

private:
#if TENON_SIMD_X86
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
// only called after kernel_path_available() said yes. zero_tiny(v) is +0
// where |v| is below the smallest normal number (subnormals and -0) and v
// elsewhere (NaN included), as detail::flush_subnormal in deploy/predictor.hpp.
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
    TENON_TARGET_AVX512 static vector zero_tiny(vector v) noexcept {
        const vector magnitude = _mm512_castsi512_ps(_mm512_and_si512(_mm512_castps_si512(v), _mm512_set1_epi32(0x7fffffff)));
        return _mm512_maskz_mov_ps(_mm512_cmp_ps_mask(magnitude, _mm512_set1_ps(std::numeric_limits<float>::min()), _CMP_NLT_UQ), v);
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
    TENON_TARGET_AVX512 static vector zero_tiny(vector v) noexcept {
        const vector magnitude = _mm512_castsi512_pd(_mm512_and_si512(_mm512_castpd_si512(v), _mm512_set1_epi64(0x7fffffffffffffffLL)));
        return _mm512_maskz_mov_pd(_mm512_cmp_pd_mask(magnitude, _mm512_set1_pd(std::numeric_limits<double>::min()), _CMP_NLT_UQ), v);
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
    TENON_TARGET_AVX2 static vector zero_tiny(vector v) noexcept {
        const vector magnitude = _mm256_andnot_ps(_mm256_set1_ps(-0.0f), v);
        return _mm256_and_ps(_mm256_cmp_ps(magnitude, _mm256_set1_ps(std::numeric_limits<float>::min()), _CMP_NLT_UQ), v);
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
    TENON_TARGET_AVX2 static vector zero_tiny(vector v) noexcept {
        const vector magnitude = _mm256_andnot_pd(_mm256_set1_pd(-0.0), v);
        return _mm256_and_pd(_mm256_cmp_pd(magnitude, _mm256_set1_pd(std::numeric_limits<double>::min()), _CMP_NLT_UQ), v);
    }
};

}  // namespace detail
#endif  // TENON_SIMD_X86

#if TENON_SIMD_NEON
namespace detail {

// Vector operations for NEON, as avx2_ops (double lanes on aarch64 only).
// On aarch64 they are IEEE operations; 32-bit ARM's NEON arithmetic flushes
// subnormal inputs and results to zero whatever the FPSCR says (ARM
// Architecture Reference Manual, ARMv7-A and ARMv7-R edition, on Advanced
// SIMD floating-point; from memory), so there only the packed matrix
// product, which promises no particular bits, uses them.
template <class T>
struct neon_ops;
template <>
struct neon_ops<float> {
    using vector = float32x4_t;
    static constexpr std::size_t lanes = 4;
    TENON_TARGET_NEON static vector zero() noexcept { return vdupq_n_f32(0.0f); }
    TENON_TARGET_NEON static vector load(const float* p) noexcept { return vld1q_f32(p); }
    TENON_TARGET_NEON static vector broadcast(float v) noexcept { return vdupq_n_f32(v); }
    TENON_TARGET_NEON static vector fma(vector a, vector b, vector c) noexcept { return vfmaq_f32(c, a, b); }
    TENON_TARGET_NEON static void store(float* p, vector v) noexcept { vst1q_f32(p, v); }
    TENON_TARGET_NEON static vector add(vector a, vector b) noexcept { return vaddq_f32(a, b); }
    TENON_TARGET_NEON static vector sub(vector a, vector b) noexcept { return vsubq_f32(a, b); }
    TENON_TARGET_NEON static vector mul(vector a, vector b) noexcept { return vmulq_f32(a, b); }
#if TENON_SIMD_NEON64
    static vector div(vector a, vector b) noexcept { return vdivq_f32(a, b); }
    static vector sqrt(vector a) noexcept { return vsqrtq_f32(a); }
#endif
    // NaN in either operand gives NaN (x86's max and min return the second
    // operand then); tenon's callers clip with a NaN-free bound, where both agree.
    TENON_TARGET_NEON static vector max(vector a, vector b) noexcept { return vmaxq_f32(a, b); }
    TENON_TARGET_NEON static vector min(vector a, vector b) noexcept { return vminq_f32(a, b); }
    TENON_TARGET_NEON static vector select_positive(vector y, vector a) noexcept {
        return vreinterpretq_f32_u32(vandq_u32(vcgtq_f32(y, vdupq_n_f32(0.0f)), vreinterpretq_u32_f32(a)));
    }
    TENON_TARGET_NEON static vector zero_tiny(vector v) noexcept {
        const uint32x4_t tiny = vcltq_f32(vabsq_f32(v), vdupq_n_f32(std::numeric_limits<float>::min()));
        return vreinterpretq_f32_u32(vbicq_u32(vreinterpretq_u32_f32(v), tiny));
    }
};
#if TENON_SIMD_NEON64
template <>
struct neon_ops<double> {
    using vector = float64x2_t;
    static constexpr std::size_t lanes = 2;
    static vector zero() noexcept { return vdupq_n_f64(0.0); }
    static vector load(const double* p) noexcept { return vld1q_f64(p); }
    static vector broadcast(double v) noexcept { return vdupq_n_f64(v); }
    static vector fma(vector a, vector b, vector c) noexcept { return vfmaq_f64(c, a, b); }
    static void store(double* p, vector v) noexcept { vst1q_f64(p, v); }
    static vector add(vector a, vector b) noexcept { return vaddq_f64(a, b); }
    static vector sub(vector a, vector b) noexcept { return vsubq_f64(a, b); }
    static vector mul(vector a, vector b) noexcept { return vmulq_f64(a, b); }
    static vector div(vector a, vector b) noexcept { return vdivq_f64(a, b); }
    static vector sqrt(vector a) noexcept { return vsqrtq_f64(a); }
    static vector max(vector a, vector b) noexcept { return vmaxq_f64(a, b); }
    static vector min(vector a, vector b) noexcept { return vminq_f64(a, b); }
    // Two floats widened to doubles, and two doubles rounded to floats.
    static vector load(const float* p) noexcept { return vcvt_f64_f32(vld1_f32(p)); }
    static void store(float* p, vector v) noexcept { vst1_f32(p, vcvt_f32_f64(v)); }
    static vector select_positive(vector y, vector a) noexcept {
        return vreinterpretq_f64_u64(vandq_u64(vcgtq_f64(y, vdupq_n_f64(0.0)), vreinterpretq_u64_f64(a)));
    }
    static vector zero_tiny(vector v) noexcept {
        const uint64x2_t tiny = vcltq_f64(vabsq_f64(v), vdupq_n_f64(std::numeric_limits<double>::min()));
        return vreinterpretq_f64_u64(vbicq_u64(vreinterpretq_u64_f64(v), tiny));
    }
};
#endif

// Whether the NEON kernels have lanes of T on this target.
template <class T>
inline constexpr bool neon_has_lanes = TENON_SIMD_NEON64 || sizeof(T) == sizeof(float);

}  // namespace detail
#endif  // TENON_SIMD_NEON

TENON_NAMESPACE_END
