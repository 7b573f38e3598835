// tenon: one dense layer of a few rows with what follows it, in one pass.
//
// y = finish(x W), x rows x k, W k x n, both row-major, where finish applies,
// in this order and each rounded on its own: + bias[j]; zero if tiny; then
// optionally relu (y > 0 ? y : +0); then optionally a + y for a given
// row-major a (rows x n), zero if tiny. "Zero if tiny" is +0 where |y| is
// below the smallest normal number (subnormals and -0), as the predictor's
// flush_subnormal (deploy/predictor.hpp). These are the predictor's dense,
// activation and sum steps run one after another, with the value kept in a
// register between them instead of being written out and read back per step.
//
// Bits. The sum x W is gemm's (core/gemm.hpp) for the same m, n and k, so a
// predictor keeps the trainer's results to the last bit:
//   - where gemm takes the unpacked loops (is_thin_product: fewer rows than
//     the active path's tile, or fewer than thin_columns columns), each
//     element is summed as those loops sum it: with n >= thin_columns as the
//     row loop (0 + x_0 w_0j + x_1 w_1j + ... in order, each product and
//     sum rounded, never fused), below that as split_dot (its eight partial
//     sums), read from a transposed copy of W so that each column is
//     contiguous;
//   - otherwise, on the fused paths (avx512, avx2, neon on aarch64) and for
//     k <= kc, the packed tile sums each element as one chain of fused
//     multiply-adds from 0, p = 0..k-1, then adds 1 x the chain to C's 0;
//     dense_fused_rows computes that same chain without packing, several
//     rows at a time (8 rows x 2 vectors with AVX-512F and NEON, 4 with
//     AVX2);
//   - otherwise (the portable and blas paths, k > kc) gemm itself computes
//     x W and the finish runs as a second pass over y.
// The row loop's vector versions (AVX-512F, AVX2, aarch64 NEON) keep up to
// four vectors of y in registers over the k terms and apply the finish
// before storing them; the vector width changes no bit.
#pragma once

#include <cmath>
#include <cstddef>
#include <cstdint>
#include <limits>

#include "tenon/core/gemm.hpp"
#include "tenon/core/simd.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {

// What follows the sum (see the top of this file).
template <class T>
struct dense_finish {
    const T* bias = nullptr;    // n values, or none
    bool relu = false;
    const T* addend = nullptr;  // rows x n (row stride n), or none
};

template <class T>
inline T zero_if_tiny(T v) noexcept {
    return std::abs(v) < std::numeric_limits<T>::min() ? T(0) : v;
}

// The finish of element j of a row whose addend row is `addend` (or null).
template <class T>
inline T finish_value(T v, const dense_finish<T>& f, std::size_t j, const T* addend) noexcept {
    if (f.bias) v = v + f.bias[j];
    v = zero_if_tiny(v);
    if (f.relu) v = v > T(0) ? v : T(0);
    if (addend) v = zero_if_tiny(addend[j] + v);
    return v;
}

// The finish over rows x n values of y, in place (after gemm's packed product).
template <class T>
void finish_rows(std::size_t rows, std::size_t n, const dense_finish<T>& f, T* y) noexcept {
    for (std::size_t i = 0; i < rows; ++i) {
        T* yi = y + i * n;
        const T* ai = f.addend ? f.addend + i * n : nullptr;
        for (std::size_t j = 0; j < n; ++j) yi[j] = finish_value(yi[j], f, j, ai);
    }
}

// One row, n >= thin_columns: gemm_unpacked's row loop, plain C++.
template <class T>
TENON_NO_CONTRACTION void dense_row_portable(const T* x, const T* w, std::size_t k, std::size_t n, const dense_finish<T>& f,
                                             const T* addend, T* y) noexcept {
    TENON_NO_CONTRACTION_IN_BODY
    for (std::size_t j = 0; j < n; ++j) y[j] = T(0);
    for (std::size_t p = 0; p < k; ++p) {
        const T s = T(1) * x[p];
        const T* wp = w + p * n;
        for (std::size_t j = 0; j < n; ++j) y[j] += s * wp[j];
    }
    for (std::size_t j = 0; j < n; ++j) y[j] = finish_value(y[j], f, j, addend);
}

// One row, n < thin_columns: one split_dot per output over W's transposed
// copy wt (n x k), as gemm_unpacked's dot loop computes 0 + 1 * dot.
template <class T>
TENON_NO_CONTRACTION void dense_dots(const T* x, const T* wt, std::size_t k, std::size_t n, const dense_finish<T>& f, const T* addend,
                                     T* y) noexcept {
    TENON_NO_CONTRACTION_IN_BODY
    for (std::size_t j = 0; j < n; ++j) {
        T c = T(0);
        c += T(1) * split_dot(x, 1, wt + j * k, 1, k);
        y[j] = finish_value(c, f, j, addend);
    }
}

#if TENON_GEMM_X86 || TENON_SIMD_NEON64
// The row loop with up to four vectors of y held over the k terms, then the
// finish applied to them in registers. Written out per instruction set (the
// target attribute cannot be a template argument).
#define TENON_SMALL_DENSE_STORE(SUFFIX, C, AT)                                                                                 \
    {                                                                                                                          \
        const std::size_t at = (AT);                                                                                           \
        ops::store(y + at, finish_vector_##SUFFIX<T>(C, bias ? bias + at : nullptr, relu, addend ? addend + at : nullptr));    \
    }
#define TENON_SMALL_DENSE_FINISH(SUFFIX, TARGET, OPS)                                                                     \
    template <class T>                                                                                                    \
    TARGET inline typename OPS<T>::vector finish_vector_##SUFFIX(typename OPS<T>::vector c, const T* bias, bool relu,      \
                                                                 const T* addend) noexcept {                              \
        using ops = OPS<T>;                                                                                               \
        if (bias) c = ops::add(c, ops::load(bias));                                                                       \
        c = ops::zero_tiny(c);                                                                                            \
        if (relu) c = ops::select_positive(c, c);                                                                         \
        if (addend) c = ops::zero_tiny(ops::add(ops::load(addend), c));                                                   \
        return c;                                                                                                         \
    }
// One vector of row i + R, columns from J on, of a fused product: scaled
// by 1 and added to C's zero as the packed tile does, then finished.
#define TENON_SMALL_DENSE_FUSED_STORE(SUFFIX, C, R, J)                                                                         \
    {                                                                                                                          \
        const std::size_t at = (i + (R)) * n + (J);                                                                            \
        ops::store(y + at, finish_vector_##SUFFIX<T>(ops::fma(one, C, zero), bias ? bias + (J) : nullptr, relu,                \
                                                     f.addend ? f.addend + at : nullptr));                                     \
    }
// Rows [row0, row0 + rows) from column j0 on, one row and one vector at a
// time (the edges of dense_fused_rows), the tail columns with std::fma.
#define TENON_SMALL_DENSE_FUSED_COLS(SUFFIX, TARGET, OPS)                                                                      \
    template <class T>                                                                                                         \
    TARGET void dense_fused_cols_##SUFFIX(std::size_t rows, const T* x, const T* w, std::size_t k, std::size_t n,              \
                                          std::size_t j0, const dense_finish<T>& f, std::size_t row0, T* y) noexcept {         \
        using ops = OPS<T>;                                                                                                    \
        constexpr std::size_t lanes = ops::lanes;                                                                              \
        const auto one = ops::broadcast(T(1)), zero = ops::zero();                                                             \
        for (std::size_t r = 0; r < rows; ++r) {                                                                               \
            const T* xr = x + r * k;                                                                                           \
            T* yr = y + (row0 + r) * n;                                                                                        \
            const T* addend = f.addend ? f.addend + (row0 + r) * n : nullptr;                                                  \
            std::size_t j = j0;                                                                                                \
            for (; j + lanes <= n; j += lanes) {                                                                               \
                auto c = zero;                                                                                                 \
                for (std::size_t p = 0; p < k; ++p) c = ops::fma(ops::broadcast(xr[p]), ops::load(w + p * n + j), c);          \
                ops::store(yr + j, finish_vector_##SUFFIX<T>(ops::fma(one, c, zero), f.bias ? f.bias + j : nullptr, f.relu,     \
                                                             addend ? addend + j : nullptr));                                  \
            }                                                                                                                  \
            for (; j < n; ++j) {                                                                                               \
                T c = T(0);                                                                                                    \
                for (std::size_t p = 0; p < k; ++p) c = std::fma(xr[p], w[p * n + j], c);                                      \
                yr[j] = finish_value(std::fma(T(1), c, T(0)), f, j, addend);                                                   \
            }                                                                                                                  \
        }                                                                                                                      \
    }
#define TENON_SMALL_DENSE_ROW(SUFFIX, TARGET, OPS, ROWS)                                                                     \
    template <class T>                                                                                                    \
    TARGET TENON_NO_CONTRACTION void dense_row_##SUFFIX(const T* x, const T* w, std::size_t k, std::size_t n,             \
                                                        const dense_finish<T>& f, const T* addend, T* y) noexcept {       \
        TENON_NO_CONTRACTION_IN_BODY                                                                                      \
        using ops = OPS<T>;                                                                                               \
        constexpr std::size_t lanes = ops::lanes;                                                                         \
        const T* bias = f.bias;                                                                                           \
        const bool relu = f.relu;                                                                                         \
        std::size_t j = 0;                                                                                                \
        for (; j + 4 * lanes <= n; j += 4 * lanes) {                                                                      \
            auto c0 = ops::zero(), c1 = ops::zero(), c2 = ops::zero(), c3 = ops::zero();                                  \
            for (std::size_t p = 0; p < k; ++p) {                                                                         \
                const auto s = ops::broadcast(T(1) * x[p]);                                                               \
                const T* wp = w + p * n + j;                                                                              \
                c0 = ops::add(c0, ops::mul(s, ops::load(wp)));                                                            \
                c1 = ops::add(c1, ops::mul(s, ops::load(wp + lanes)));                                                    \
                c2 = ops::add(c2, ops::mul(s, ops::load(wp + 2 * lanes)));                                                \
                c3 = ops::add(c3, ops::mul(s, ops::load(wp + 3 * lanes)));                                                \
            }                                                                                                             \
            TENON_SMALL_DENSE_STORE(SUFFIX, c0, j)                                                                        \
            TENON_SMALL_DENSE_STORE(SUFFIX, c1, j + lanes)                                                                \
            TENON_SMALL_DENSE_STORE(SUFFIX, c2, j + 2 * lanes)                                                            \
            TENON_SMALL_DENSE_STORE(SUFFIX, c3, j + 3 * lanes)                                                            \
        }                                                                                                                 \
        for (; j + 2 * lanes <= n; j += 2 * lanes) {                                                                      \
            auto c0 = ops::zero(), c1 = ops::zero();                                                                      \
            for (std::size_t p = 0; p < k; ++p) {                                                                         \
                const auto s = ops::broadcast(T(1) * x[p]);                                                               \
                const T* wp = w + p * n + j;                                                                              \
                c0 = ops::add(c0, ops::mul(s, ops::load(wp)));                                                            \
                c1 = ops::add(c1, ops::mul(s, ops::load(wp + lanes)));                                                    \
            }                                                                                                             \
            TENON_SMALL_DENSE_STORE(SUFFIX, c0, j)                                                                        \
            TENON_SMALL_DENSE_STORE(SUFFIX, c1, j + lanes)                                                                \
        }                                                                                                                 \
        for (; j + lanes <= n; j += lanes) {                                                                              \
            auto c0 = ops::zero();                                                                                        \
            for (std::size_t p = 0; p < k; ++p) c0 = ops::add(c0, ops::mul(ops::broadcast(T(1) * x[p]), ops::load(w + p * n + j))); \
            TENON_SMALL_DENSE_STORE(SUFFIX, c0, j)                                                                        \
        }                                                                                                                 \
        for (; j < n; ++j) {                                                                                              \
            T c = T(0);                                                                                                   \
            for (std::size_t p = 0; p < k; ++p) c += (T(1) * x[p]) * w[p * n + j];                                        \
            y[j] = finish_value(c, f, j, addend);                                                                         \
        }                                                                                                                 \
    }                                                                                                                     \
    template <class T>                                                                                                    \
    TARGET void dense_fused_rows_##SUFFIX(std::size_t rows, const T* x, const T* w, std::size_t k, std::size_t n,         \
                                          const dense_finish<T>& f, T* y) noexcept {                                      \
        using ops = OPS<T>;                                                                                               \
        constexpr std::size_t lanes = ops::lanes;                                                                         \
        const T* bias = f.bias;                                                                                           \
        const bool relu = f.relu;                                                                                         \
        const auto one = ops::broadcast(T(1)), zero = ops::zero();                                                        \
        constexpr std::size_t R = ROWS;                                                                               \
        std::size_t i = 0;                                                                                            \
        for (; i + R <= rows; i += R) {                                                                               \
            const T* x0 = x + i * k;                                                                                  \
            std::size_t j = 0;                                                                                        \
            for (; j + 2 * lanes <= n; j += 2 * lanes) {                                                              \
                typename ops::vector acc0[R], acc1[R];                                                                \
                _Pragma("GCC unroll 16") for (std::size_t r = 0; r < R; ++r) acc0[r] = acc1[r] = zero;                \
                for (std::size_t p = 0; p < k; ++p) {                                                                 \
                    const auto w0 = ops::load(w + p * n + j), w1 = ops::load(w + p * n + j + lanes);                  \
                    _Pragma("GCC unroll 16") for (std::size_t r = 0; r < R; ++r) {                                    \
                        const auto s = ops::broadcast(x0[r * k + p]);                                                 \
                        acc0[r] = ops::fma(s, w0, acc0[r]);                                                           \
                        acc1[r] = ops::fma(s, w1, acc1[r]);                                                           \
                    }                                                                                                 \
                }                                                                                                     \
                _Pragma("GCC unroll 16") for (std::size_t r = 0; r < R; ++r) {                                        \
                    TENON_SMALL_DENSE_FUSED_STORE(SUFFIX, acc0[r], r, j)                                              \
                    TENON_SMALL_DENSE_FUSED_STORE(SUFFIX, acc1[r], r, j + lanes)                                      \
                }                                                                                                     \
            }                                                                                                         \
            if (j < n) dense_fused_cols_##SUFFIX<T>(R, x0, w, k, n, j, f, i, y);                                      \
        }                                                                                                             \
        if (i < rows) dense_fused_cols_##SUFFIX<T>(rows - i, x + i * k, w, k, n, 0, f, i, y);                             \
    }
#if TENON_GEMM_X86
TENON_SMALL_DENSE_FINISH(avx512, TENON_TARGET_AVX512, avx512_ops)
TENON_SMALL_DENSE_FINISH(avx2, TENON_TARGET_AVX2, avx2_ops)
TENON_SMALL_DENSE_FUSED_COLS(avx512, TENON_TARGET_AVX512, avx512_ops)
TENON_SMALL_DENSE_FUSED_COLS(avx2, TENON_TARGET_AVX2, avx2_ops)
TENON_SMALL_DENSE_ROW(avx512, TENON_TARGET_AVX512, avx512_ops, 8)
TENON_SMALL_DENSE_ROW(avx2, TENON_TARGET_AVX2, avx2_ops, 4)
#else
TENON_SMALL_DENSE_FINISH(neon, TENON_TARGET_NEON, neon_ops)
TENON_SMALL_DENSE_FUSED_COLS(neon, TENON_TARGET_NEON, neon_ops)
TENON_SMALL_DENSE_ROW(neon, TENON_TARGET_NEON, neon_ops, 8)
#endif
#undef TENON_SMALL_DENSE_ROW
#undef TENON_SMALL_DENSE_STORE
#undef TENON_SMALL_DENSE_FUSED_STORE
#undef TENON_SMALL_DENSE_FUSED_COLS
#undef TENON_SMALL_DENSE_FINISH
#endif

// Which version of the row loop small_dense runs.
enum class small_dense_version : std::uint8_t { portable, avx2, avx512, neon };

// The version for calls of few rows on the running CPU.
inline small_dense_version best_small_dense_version() noexcept {
#if TENON_GEMM_X86
    // AVX2 even where AVX-512F is offered: a call of few rows is bound by
    // the latency of each output's chain of additions, which a wider vector
    // does not shorten, and 512-bit instructions occupy more of a core's
    // vector ports (on Intel's server cores port 1 stops taking vector
    // work while they run); on the development machine (Xeon, Sapphire
    // Rapids) one row of 8-32-32-1 took 115 ns with AVX2 against 137 ns
    // with AVX-512. Batches (dense_fused_rows) are bound by throughput and
    // take the widest vectors.
    const int level = vector_level();
    return level >= 1 ? small_dense_version::avx2 : small_dense_version::portable;
#elif TENON_SIMD_NEON64
    return small_dense_version::neon;
#else
    return small_dense_version::portable;
#endif
}

inline bool small_dense_version_available(small_dense_version v) noexcept {
    switch (v) {
        case small_dense_version::portable: return true;
        case small_dense_version::avx2: return TENON_GEMM_X86 && cpu_has_avx2_fma();
        case small_dense_version::avx512: return TENON_GEMM_X86 && cpu_has_avx512f();
        case small_dense_version::neon: return TENON_SIMD_NEON64 != 0;
    }
    return false;
}

// Fewer rows than this take gemm's unpacked loops on every path (the
// smallest register tile has 4 rows), so a call of so few rows can go to
// small_dense without asking which path is active.
template <class T>
inline constexpr std::size_t always_thin_rows = portable_kernel<T>::mr;
#if TENON_GEMM_X86
static_assert(avx512_kernel<float>::mr >= always_thin_rows<float> && avx2_kernel<float>::mr >= always_thin_rows<float> &&
                  avx512_kernel<double>::mr >= always_thin_rows<double> && avx2_kernel<double>::mr >= always_thin_rows<double>,
              "a tile has fewer rows than always_thin_rows");
#endif
#if TENON_SIMD_NEON
static_assert(neon_path_kernel<float>::mr >= always_thin_rows<float> && neon_path_kernel<double>::mr >= always_thin_rows<double>,
              "a tile has fewer rows than always_thin_rows");
#endif

// rows rows of y = finish(x W) by the unpacked loops (whatever gemm would
// choose; the caller checks is_thin_product where the bits must be gemm's).
// wt: W transposed (n x k), needed when n < thin_columns (W itself when n == 1).
template <class T>
void small_dense(std::size_t rows, std::size_t k, std::size_t n, const T* x, const T* w, const T* wt, const dense_finish<T>& f, T* y,
                 small_dense_version version) noexcept {
    for (std::size_t i = 0; i < rows; ++i) {
        const T* xi = x + i * k;
        T* yi = y + i * n;
        const T* ai = f.addend ? f.addend + i * n : nullptr;
        if (n < thin_columns<T>) {
            dense_dots(xi, wt, k, n, f, ai, yi);
            continue;
        }
        switch (version) {
#if TENON_GEMM_X86
            case small_dense_version::avx512: dense_row_avx512(xi, w, k, n, f, ai, yi); break;
            case small_dense_version::avx2: dense_row_avx2(xi, w, k, n, f, ai, yi); break;
#elif TENON_SIMD_NEON64
            case small_dense_version::neon: dense_row_neon(xi, w, k, n, f, ai, yi); break;
#endif
            default: dense_row_portable(xi, w, k, n, f, ai, yi); break;
        }
    }
}

// y = finish(x W) for rows x k inputs x and a k x n weight W (see the top of
// this file), with gemm's bits for the sum: the fused unpacked loops where
// gemm would take them, else gemm followed by the finish. `wt` is W
// transposed (n x k); it is read only when n < thin_columns and may then
// be W itself for n == 1. y must not overlap x, W or the addend.
template <class T>
void dense_rows(std::size_t rows, std::size_t k, std::size_t n, const T* x, const T* w, const T* wt, const dense_finish<T>& f,
                T* y) noexcept {
    if (rows == 0 || n == 0) return;
    const kernel_path path = product_path(rows, n, k, k, n, n);
    if (is_thin_product<T>(rows, n, path)) {
        small_dense(rows, k, n, x, w, wt, f, y, best_small_dense_version());
        return;
    }
    // The packed tiles of the fused paths sum each element as one chain of
    // fused multiply-adds from 0 over k <= kc terms, then add 1 x the sum to
    // C's zero: the same chain, without packing, four rows at a time.
#if TENON_GEMM_X86
    if ((path == kernel_path::avx512 || path == kernel_path::avx2) && k <= avx512_kernel<T>::kc && k <= avx2_kernel<T>::kc) {
        if (vector_level() == 2) dense_fused_rows_avx512(rows, x, w, k, n, f, y);
        else dense_fused_rows_avx2(rows, x, w, k, n, f, y);
        return;
    }
#elif TENON_SIMD_NEON64
    if (path == kernel_path::neon && k <= neon_path_kernel<T>::kc) {
        dense_fused_rows_neon(rows, x, w, k, n, f, y);
        return;
    }
#endif
    gemm<T>(false, false, rows, n, k, T(1), x, k, w, n, T(0), y, n);
    finish_rows(rows, n, f, y);
}

}  // namespace detail

TENON_NAMESPACE_END
