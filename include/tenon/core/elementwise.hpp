// tenon: the elementwise loops of a training step, vectorized for the
// running CPU.
//
// Each function has a plain loop (any CPU, any compiler) and, on x86, AVX-512F
// and AVX2 versions chosen at run time (core/simd.hpp explains why the
// host's flags need not enable them); on aarch64 a NEON version. 32-bit
// ARM's NEON flushes subnormals to zero, so there the plain loops run. Every version performs the same IEEE
// operations on each element in the same order as the plain loop, so the
// results are bit-identical whichever version runs (up to which payload a
// NaN result carries); only the speed differs.
#pragma once

#include <cmath>
#include <cstddef>

#include "tenon/core/simd.hpp"

TENON_NAMESPACE_BEGIN
namespace detail {

#if TENON_SIMD_X86 || TENON_SIMD_NEON64
// A block of this many elements is scanned before the accumulator is looked at.
inline constexpr std::size_t finite_scan_block = 4096;

#define TENON_ELEMENTWISE_KERNELS(SUFFIX, TARGET, OPS)                                                                                               \
    /* Index of the first block of finite_scan_block elements holding a non-finite value, */                                                         \
    /* times the block size (n when none): x * 0 is 0 for finite x and NaN otherwise. */                                                             \
    template <class T>                                                                                                                               \
    TARGET std::size_t finite_blocks_##SUFFIX(const T* p, std::size_t n) noexcept {                                                                  \
        using ops = OPS<T>;                                                                                                                          \
        const auto zero = ops::zero();                                                                                                               \
        std::size_t first = 0;                                                                                                                       \
        for (; first + finite_scan_block <= n; first += finite_scan_block) {                                                                         \
            auto acc = ops::zero();                                                                                                                  \
            for (std::size_t k = first; k < first + finite_scan_block; k += ops::lanes) acc = ops::add(acc, ops::mul(ops::load(p + k), zero));       \
            T lanes[ops::lanes];                                                                                                                     \
            ops::store(lanes, acc);                                                                                                                  \
            for (std::size_t l = 0; l < ops::lanes; ++l)                                                                                             \
                if (lanes[l] != lanes[l]) return first;                                                                                              \
        }                                                                                                                                            \
        return first;                                                                                                                                \
    }                                                                                                                                                \
    /* d[k] = g[k] * (y[k] > 0 ? 1 : 0) for the whole vectors; returns the count done. */                                                            \
    template <class T>                                                                                                                               \
    TARGET std::size_t relu_gradient_##SUFFIX(const T* y, const T* g, T* d, std::size_t n) noexcept {                                                \
        using ops = OPS<T>;                                                                                                                          \
        const auto one = ops::broadcast(T(1));                                                                                                       \
        std::size_t k = 0;                                                                                                                           \
        for (; k + ops::lanes <= n; k += ops::lanes) ops::store(d + k, ops::mul(ops::load(g + k), ops::select_positive(ops::load(y + k), one)));     \
        return k;                                                                                                                                    \
    }                                                                                                                                                \
    /* o[j] = relu(o[j] + b[j]) (z > 0 ? z : 0) for the whole vectors of one row. */                                                                 \
    template <class T>                                                                                                                               \
    TARGET std::size_t bias_relu_row_##SUFFIX(const T* b, T* o, std::size_t n) noexcept {                                                            \
        using ops = OPS<T>;                                                                                                                          \
        std::size_t k = 0;                                                                                                                           \
        for (; k + ops::lanes <= n; k += ops::lanes) {                                                                                               \
            const auto z = b ? ops::add(ops::load(o + k), ops::load(b + k)) : ops::load(o + k);                                                      \
            ops::store(o + k, ops::select_positive(z, z));                                                                                           \
        }                                                                                                                                            \
        return k;                                                                                                                                    \
    }                                                                                                                                                \
    /* sum[j] += row[j] for the whole vectors of row[0, n). */                                                                                       \
    template <class T>                                                                                                                               \
    TARGET std::size_t add_row_##SUFFIX(const T* row, T* sum, std::size_t n) noexcept {                                                              \
        using ops = OPS<T>;                                                                                                                          \
        std::size_t k = 0;                                                                                                                           \
        for (; k + ops::lanes <= n; k += ops::lanes) ops::store(sum + k, ops::add(ops::load(sum + k), ops::load(row + k)));                          \
        return k;                                                                                                                                    \
    }                                                                                                                                                \
    /* x[k] = T(low[k] + (double(x[k]) - center[k]) * factor[k]) for the whole vectors, in double, */                                                \
    /* each operation rounded on its own; returns the count done. */                                                                                 \
    template <class T>                                                                                                                               \
    TARGET TENON_NO_CONTRACTION std::size_t affine_span_##SUFFIX(T* x, std::size_t n, const double* low, const double* center,                       \
                                                                 const double* factor) noexcept {                                                    \
        using dops = OPS<double>;                                                                                                                    \
        std::size_t k = 0;                                                                                                                           \
        for (; k + dops::lanes <= n; k += dops::lanes) {                                                                                             \
            const auto shifted = dops::sub(dops::load(x + k), dops::load(center + k));                                                               \
            dops::store(x + k, dops::add(dops::load(low + k), dops::mul(shifted, dops::load(factor + k))));                                          \
        }                                                                                                                                            \
        return k;                                                                                                                                    \
    }
#if TENON_SIMD_X86
TENON_ELEMENTWISE_KERNELS(avx512, TENON_TARGET_AVX512, avx512_ops)
TENON_ELEMENTWISE_KERNELS(avx2, TENON_TARGET_AVX2, avx2_ops)
#else
TENON_ELEMENTWISE_KERNELS(neon, TENON_TARGET_NEON, neon_ops)
#endif
#undef TENON_ELEMENTWISE_KERNELS
#endif

#if TENON_SIMD_X86

#define TENON_ELEMENTWISE_DISPATCH(done, NAME, ...)                                                                                                  \
    do {                                                                                                                                             \
        const int level_ = ::tenon::detail::vector_level();                                                                                          \
        if (level_ == 2)                                                                                                                             \
            done = ::tenon::detail::NAME##_avx512(__VA_ARGS__);                                                                                      \
        else if (level_ == 1)                                                                                                                        \
            done = ::tenon::detail::NAME##_avx2(__VA_ARGS__);                                                                                        \
    } while (false)
#elif TENON_SIMD_NEON64
#define TENON_ELEMENTWISE_DISPATCH(done, NAME, ...)                                                                                                  \
    do {                                                                                                                                             \
        done = ::tenon::detail::NAME##_neon(__VA_ARGS__);                                                                                            \
    } while (false)
#else
#define TENON_ELEMENTWISE_DISPATCH(done, NAME, ...)                                                                                                  \
    do {                                                                                                                                             \
    } while (false)
#endif

/// A hint that the cache line holding `p` will be read soon (no effect on
/// results; nothing where the compiler offers no such hint).
inline void prefetch_for_reading(const void* p) noexcept {
#if defined(__GNUC__) || defined(__clang__)
    __builtin_prefetch(p, 0, 3);
#else
    (void)p;
#endif
}

/// Index of the first element of p[0, n) that is NaN or infinite; n if none.
template <class T>
std::size_t first_non_finite(const T* p, std::size_t n) noexcept {
    std::size_t k = 0;
    TENON_ELEMENTWISE_DISPATCH(k, finite_blocks, p, n);
    for (; k < n; ++k)
        if (!std::isfinite(p[k])) return k;
    return n;
}

/// d = g * relu'(y), written with the output y: g * (y > 0 ? 1 : 0).
template <class T>
void relu_gradient(const T* y, const T* g, T* d, std::size_t n) noexcept {
    std::size_t k = 0;
    TENON_ELEMENTWISE_DISPATCH(k, relu_gradient, y, g, d, n);
    for (; k < n; ++k) d[k] = g[k] * (y[k] > T(0) ? T(1) : T(0));
}

/// Each row of o (rows x cols) becomes relu(row + b) (z > 0 ? z : 0); b may be null.
template <class T>
void bias_relu_rows(const T* b, T* o, std::size_t rows, std::size_t cols) noexcept {
    for (std::size_t i = 0; i < rows; ++i) {
        T* oi = o + i * cols;
        std::size_t k = 0;
        TENON_ELEMENTWISE_DISPATCH(k, bias_relu_row, b, oi, cols);
        for (; k < cols; ++k) {
            const T z = b ? oi[k] + b[k] : oi[k];
            oi[k] = z > T(0) ? z : T(0);
        }
    }
}

/// x[k] = T(low[k] + (double(x[k]) - center[k]) * factor[k]) for k < n, in
/// double (an affine map per element, e.g. a column scaling; the tables hold
/// one entry per element of x). Every version rounds each operation on its
/// own, the plain loop included (GCC and Clang would otherwise fuse the
/// multiply and add where the target has a fused multiply-add, as aarch64 has).
template <class T>
TENON_NO_CONTRACTION void affine_span(T* x, std::size_t n, const double* low, const double* center, const double* factor) noexcept {
    TENON_NO_CONTRACTION_IN_BODY
    std::size_t k = 0;
    TENON_ELEMENTWISE_DISPATCH(k, affine_span, x, n, low, center, factor);
    for (; k < n; ++k) x[k] = static_cast<T>(low[k] + (static_cast<double>(x[k]) - center[k]) * factor[k]);
}

/// sum[k] += x[k] for k < n.
template <class T>
void add_into(const T* x, T* sum, std::size_t n) noexcept {
    std::size_t k = 0;
    TENON_ELEMENTWISE_DISPATCH(k, add_row, x, sum, n);
    for (; k < n; ++k) sum[k] += x[k];
}

/// sum[j] += d[i][j] for i = 0, 1, ..., rows - 1 in that order (the column
/// sums of d added to sum, e.g. a bias gradient).
template <class T>
void add_column_sums(const T* d, std::size_t rows, std::size_t cols, T* sum) noexcept {
    for (std::size_t i = 0; i < rows; ++i) add_into(d + i * cols, sum, cols);
}

#undef TENON_ELEMENTWISE_DISPATCH

}  // namespace detail
TENON_NAMESPACE_END
