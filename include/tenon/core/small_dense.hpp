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
//   - otherwise gemm itself computes x W and the finish runs as a second
//     pass over y.
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
#define TENON_SMALL_DENSE_ROW(SUFFIX, TARGET, OPS)                                                                        \
    template <class T>                                                                                                    \
    TARGET typename OPS<T>::vector finish_vector_##SUFFIX(typename OPS<T>::vector c, const T* bias, bool relu,             \
                                                          const T* addend) noexcept {                                     \
        using ops = OPS<T>;                                                                                               \
        if (bias) c = ops::add(c, ops::load(bias));                                                                       \
        c = ops::zero_tiny(c);                                                                                            \
        if (relu) c = ops::select_positive(c, c);                                                                         \
        if (addend) c = ops::zero_tiny(ops::add(ops::load(addend), c));                                                   \
        return c;                                                                                                         \
    }                                                                                                                     \
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
    }
#if TENON_GEMM_X86
TENON_SMALL_DENSE_ROW(avx512, TENON_TARGET_AVX512, avx512_ops)
TENON_SMALL_DENSE_ROW(avx2, TENON_TARGET_AVX2, avx2_ops)
#else
TENON_SMALL_DENSE_ROW(neon, TENON_TARGET_NEON, neon_ops)
#endif
#undef TENON_SMALL_DENSE_ROW
#undef TENON_SMALL_DENSE_STORE
#endif

// Which version of the row loop small_dense runs.
enum class small_dense_version : std::uint8_t { portable, avx2, avx512, neon };

// The widest version the running CPU offers (the vector level gemm's
// unpacked loops use as well).
inline small_dense_version best_small_dense_version() noexcept {
#if TENON_GEMM_X86
    const int level = vector_level();
    return level == 2 ? small_dense_version::avx512 : level == 1 ? small_dense_version::avx2 : small_dense_version::portable;
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
    if (is_thin_product<T>(rows, n, product_path(rows, n, k, k, n, n))) {
        small_dense(rows, k, n, x, w, wt, f, y, best_small_dense_version());
        return;
    }
    gemm<T>(false, false, rows, n, k, T(1), x, k, w, n, T(0), y, n);
    finish_rows(rows, n, f, y);
}

}  // namespace detail

TENON_NAMESPACE_END
