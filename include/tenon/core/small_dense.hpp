// tenon: one dense layer of a few rows with what follows it, in one pass.
//
// y = finish(x W) for x rows x k and W k x n (row-major), where finish adds
// the bias, zeroes tiny values, optionally applies relu and adds a given
// addend, each rounded on its own: the predictor's dense, activation and
// sum steps with the value kept in a register between them. The sum x W has
// gemm's bits for the same m, n and k (core/gemm.hpp), so a predictor keeps
// the trainer's results to the last bit; which loop matches which gemm path
// is in docs/design/predictor.md.
#pragma once

#include <cmath>
#include <cstddef>
#include <cstdint>
#include <limits>
#include <type_traits>

#include "tenon/core/gemm.hpp"
#include "tenon/core/simd.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {

// What follows the sum (see the top of this file).
template <class T>
struct dense_finish {
    const T* bias = nullptr;  // n values, or none
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
TENON_NO_CONTRACTION void dense_row_portable(const T* x, const T* w, std::size_t k, std::size_t n, const dense_finish<T>& f, const T* addend,
                                             T* y) noexcept {
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
#define TENON_SMALL_DENSE_STORE(SUFFIX, C, AT)                                                                                                       \
    {                                                                                                                                                \
        const std::size_t at = (AT);                                                                                                                 \
        ops::store(y + at, finish_vector_##SUFFIX<T>(C, bias ? bias + at : nullptr, relu, addend ? addend + at : nullptr));                          \
    }
#define TENON_SMALL_DENSE_FINISH(SUFFIX, TARGET, OPS)                                                                                                \
    template <class T>                                                                                                                               \
    TARGET inline typename OPS<T>::vector finish_vector_##SUFFIX(typename OPS<T>::vector c, const T* bias, bool relu, const T* addend) noexcept {    \
        using ops = OPS<T>;                                                                                                                          \
        if (bias) c = ops::add(c, ops::load(bias));                                                                                                  \
        c = ops::zero_tiny(c);                                                                                                                       \
        if (relu) c = ops::select_positive(c, c);                                                                                                    \
        if (addend) c = ops::zero_tiny(ops::add(ops::load(addend), c));                                                                              \
        return c;                                                                                                                                    \
    }
// One vector of row i + R, columns from J on, of a fused product: scaled
// by 1 and added to C's zero as the packed tile does, then finished.
#define TENON_SMALL_DENSE_FUSED_STORE(SUFFIX, C, R, J)                                                                                               \
    {                                                                                                                                                \
        const std::size_t at = (i + (R)) * n + (J);                                                                                                  \
        ops::store(y + at,                                                                                                                           \
                   finish_vector_##SUFFIX<T>(ops::fma(one, C, zero), bias ? bias + (J) : nullptr, relu, f.addend ? f.addend + at : nullptr));        \
    }
// Rows [row0, row0 + rows) from column j0 on, one row and one vector at a
// time (the edges of dense_fused_rows), the tail columns with std::fma.
#define TENON_SMALL_DENSE_FUSED_COLS(SUFFIX, TARGET, OPS)                                                                                            \
    template <class T>                                                                                                                               \
    TARGET void dense_fused_cols_##SUFFIX(std::size_t rows, const T* x, const T* w, std::size_t k, std::size_t n, std::size_t j0,                    \
                                          const dense_finish<T>& f, std::size_t row0, T* y) noexcept {                                               \
        using ops = OPS<T>;                                                                                                                          \
        constexpr std::size_t lanes = ops::lanes;                                                                                                    \
        const auto one = ops::broadcast(T(1)), zero = ops::zero();                                                                                   \
        for (std::size_t r = 0; r < rows; ++r) {                                                                                                     \
            const T* xr = x + r * k;                                                                                                                 \
            T* yr = y + (row0 + r) * n;                                                                                                              \
            const T* addend = f.addend ? f.addend + (row0 + r) * n : nullptr;                                                                        \
            std::size_t j = j0;                                                                                                                      \
            for (; j + lanes <= n; j += lanes) {                                                                                                     \
                auto c = zero;                                                                                                                       \
                for (std::size_t p = 0; p < k; ++p) c = ops::fma(ops::broadcast(xr[p]), ops::load(w + p * n + j), c);                                \
                ops::store(yr + j,                                                                                                                   \
                           finish_vector_##SUFFIX<T>(ops::fma(one, c, zero), f.bias ? f.bias + j : nullptr, f.relu, addend ? addend + j : nullptr)); \
            }                                                                                                                                        \
            for (; j < n; ++j) {                                                                                                                     \
                T c = T(0);                                                                                                                          \
                for (std::size_t p = 0; p < k; ++p) c = std::fma(xr[p], w[p * n + j], c);                                                            \
                yr[j] = finish_value(std::fma(T(1), c, T(0)), f, j, addend);                                                                         \
            }                                                                                                                                        \
        }                                                                                                                                            \
    }
#define TENON_SMALL_DENSE_ROW(SUFFIX, TARGET, OPS, ROWS)                                                                                             \
    template <class T>                                                                                                                               \
    TARGET TENON_NO_CONTRACTION void dense_row_##SUFFIX(const T* x, const T* w, std::size_t k, std::size_t n, const dense_finish<T>& f,              \
                                                        const T* addend, T* y) noexcept {                                                            \
        TENON_NO_CONTRACTION_IN_BODY                                                                                                                 \
        using ops = OPS<T>;                                                                                                                          \
        constexpr std::size_t lanes = ops::lanes;                                                                                                    \
        const T* bias = f.bias;                                                                                                                      \
        const bool relu = f.relu;                                                                                                                    \
        std::size_t j = 0;                                                                                                                           \
        for (; j + 4 * lanes <= n; j += 4 * lanes) {                                                                                                 \
            auto c0 = ops::zero(), c1 = ops::zero(), c2 = ops::zero(), c3 = ops::zero();                                                             \
            for (std::size_t p = 0; p < k; ++p) {                                                                                                    \
                const auto s = ops::broadcast(T(1) * x[p]);                                                                                          \
                const T* wp = w + p * n + j;                                                                                                         \
                c0 = ops::add(c0, ops::mul(s, ops::load(wp)));                                                                                       \
                c1 = ops::add(c1, ops::mul(s, ops::load(wp + lanes)));                                                                               \
                c2 = ops::add(c2, ops::mul(s, ops::load(wp + 2 * lanes)));                                                                           \
                c3 = ops::add(c3, ops::mul(s, ops::load(wp + 3 * lanes)));                                                                           \
            }                                                                                                                                        \
            TENON_SMALL_DENSE_STORE(SUFFIX, c0, j)                                                                                                   \
            TENON_SMALL_DENSE_STORE(SUFFIX, c1, j + lanes)                                                                                           \
            TENON_SMALL_DENSE_STORE(SUFFIX, c2, j + 2 * lanes)                                                                                       \
            TENON_SMALL_DENSE_STORE(SUFFIX, c3, j + 3 * lanes)                                                                                       \
        }                                                                                                                                            \
        for (; j + 2 * lanes <= n; j += 2 * lanes) {                                                                                                 \
            auto c0 = ops::zero(), c1 = ops::zero();                                                                                                 \
            for (std::size_t p = 0; p < k; ++p) {                                                                                                    \
                const auto s = ops::broadcast(T(1) * x[p]);                                                                                          \
                const T* wp = w + p * n + j;                                                                                                         \
                c0 = ops::add(c0, ops::mul(s, ops::load(wp)));                                                                                       \
                c1 = ops::add(c1, ops::mul(s, ops::load(wp + lanes)));                                                                               \
            }                                                                                                                                        \
            TENON_SMALL_DENSE_STORE(SUFFIX, c0, j)                                                                                                   \
            TENON_SMALL_DENSE_STORE(SUFFIX, c1, j + lanes)                                                                                           \
        }                                                                                                                                            \
        for (; j + lanes <= n; j += lanes) {                                                                                                         \
            auto c0 = ops::zero();                                                                                                                   \
            for (std::size_t p = 0; p < k; ++p) c0 = ops::add(c0, ops::mul(ops::broadcast(T(1) * x[p]), ops::load(w + p * n + j)));                  \
            TENON_SMALL_DENSE_STORE(SUFFIX, c0, j)                                                                                                   \
        }                                                                                                                                            \
        for (; j < n; ++j) {                                                                                                                         \
            T c = T(0);                                                                                                                              \
            for (std::size_t p = 0; p < k; ++p) c += (T(1) * x[p]) * w[p * n + j];                                                                   \
            y[j] = finish_value(c, f, j, addend);                                                                                                    \
        }                                                                                                                                            \
    }                                                                                                                                                \
    template <class T>                                                                                                                               \
    TARGET void dense_fused_rows_##SUFFIX(std::size_t rows, const T* x, const T* w, std::size_t k, std::size_t n, const dense_finish<T>& f,          \
                                          T* y) noexcept {                                                                                           \
        using ops = OPS<T>;                                                                                                                          \
        constexpr std::size_t lanes = ops::lanes;                                                                                                    \
        const T* bias = f.bias;                                                                                                                      \
        const bool relu = f.relu;                                                                                                                    \
        const auto one = ops::broadcast(T(1)), zero = ops::zero();                                                                                   \
        constexpr std::size_t R = ROWS;                                                                                                              \
        std::size_t i = 0;                                                                                                                           \
        for (; i + R <= rows; i += R) {                                                                                                              \
            const T* x0 = x + i * k;                                                                                                                 \
            std::size_t j = 0;                                                                                                                       \
            for (; j + 2 * lanes <= n; j += 2 * lanes) {                                                                                             \
                typename ops::vector acc0[R], acc1[R];                                                                                               \
                _Pragma("GCC unroll 16") for (std::size_t r = 0; r < R; ++r) acc0[r] = acc1[r] = zero;                                               \
                for (std::size_t p = 0; p < k; ++p) {                                                                                                \
                    const auto w0 = ops::load(w + p * n + j), w1 = ops::load(w + p * n + j + lanes);                                                 \
                    _Pragma("GCC unroll 16") for (std::size_t r = 0; r < R; ++r) {                                                                   \
                        const auto s = ops::broadcast(x0[r * k + p]);                                                                                \
                        acc0[r] = ops::fma(s, w0, acc0[r]);                                                                                          \
                        acc1[r] = ops::fma(s, w1, acc1[r]);                                                                                          \
                    }                                                                                                                                \
                }                                                                                                                                    \
                _Pragma("GCC unroll 16") for (std::size_t r = 0; r < R; ++r) {                                                                       \
                    TENON_SMALL_DENSE_FUSED_STORE(SUFFIX, acc0[r], r, j)                                                                             \
                    TENON_SMALL_DENSE_FUSED_STORE(SUFFIX, acc1[r], r, j + lanes)                                                                     \
                }                                                                                                                                    \
            }                                                                                                                                        \
            if (j < n) dense_fused_cols_##SUFFIX<T>(R, x0, w, k, n, j, f, i, y);                                                                     \
        }                                                                                                                                            \
        if (i < rows) dense_fused_cols_##SUFFIX<T>(rows - i, x + i * k, w, k, n, 0, f, i, y);                                                        \
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
// One row with the column loop fixed when a model is loaded (see
// fixed_row_kernel below): dense_row_fixed sums n = V x lanes outputs as
// dense_row_* does, its V vectors of y in registers over the k terms;
// dense_dot_one is dense_dots for n == 1, split_dot's eight partial sums
// held in 8 / lanes vectors (lane q of the vectors is partial q).
#define TENON_SMALL_DENSE_FIXED(SUFFIX, TARGET, OPS)                                                                                                 \
    template <class T, std::size_t V>                                                                                                                \
    TARGET TENON_NO_CONTRACTION void dense_row_fixed_##SUFFIX(const T* x, const T* w, std::size_t k, const T* bias, bool relu, const T* addend,      \
                                                              T* y) noexcept {                                                                       \
        TENON_NO_CONTRACTION_IN_BODY                                                                                                                 \
        using ops = OPS<T>;                                                                                                                          \
        constexpr std::size_t lanes = ops::lanes, n = V * lanes;                                                                                     \
        typename ops::vector c[V];                                                                                                                   \
        _Pragma("GCC unroll 8") for (std::size_t v = 0; v < V; ++v) c[v] = ops::zero();                                                              \
        _Pragma("GCC unroll 4") for (std::size_t p = 0; p < k; ++p) {                                                                                \
            const auto s = ops::broadcast(T(1) * x[p]);                                                                                              \
            const T* wp = w + p * n;                                                                                                                 \
            _Pragma("GCC unroll 8") for (std::size_t v = 0; v < V; ++v) c[v] = ops::add(c[v], ops::mul(s, ops::load(wp + v * lanes)));               \
        }                                                                                                                                            \
        _Pragma("GCC unroll 8") for (std::size_t v = 0; v < V; ++v) TENON_SMALL_DENSE_STORE(SUFFIX, c[v], v* lanes)                                  \
    }                                                                                                                                                \
    template <class T>                                                                                                                               \
    TARGET TENON_NO_CONTRACTION void dense_dot_one_##SUFFIX(const T* x, const T* w, std::size_t k, const T* bias, bool relu, const T* addend,        \
                                                            T* y) noexcept {                                                                         \
        TENON_NO_CONTRACTION_IN_BODY                                                                                                                 \
        using ops = OPS<T>;                                                                                                                          \
        constexpr std::size_t lanes = ops::lanes, P = 8 / lanes;                                                                                     \
        static_assert(P * lanes == 8, "split_dot has eight partial sums");                                                                           \
        typename ops::vector c[P];                                                                                                                   \
        _Pragma("GCC unroll 8") for (std::size_t q = 0; q < P; ++q) c[q] = ops::zero();                                                              \
        std::size_t p = 0;                                                                                                                           \
        for (; p + 8 <= k; p += 8)                                                                                                                   \
            _Pragma("GCC unroll 8") for (std::size_t q = 0; q < P; ++q) c[q] =                                                                       \
                ops::add(c[q], ops::mul(ops::load(x + p + q * lanes), ops::load(w + p + q * lanes)));                                                \
        T partial[8];                                                                                                                                \
        _Pragma("GCC unroll 8") for (std::size_t q = 0; q < P; ++q) ops::store(partial + q * lanes, c[q]);                                           \
        for (; p < k; ++p) partial[0] += x[p] * w[p];                                                                                                \
        T sum = T(0);                                                                                                                                \
        for (std::size_t q = 0; q < 8; ++q) sum += partial[q];                                                                                       \
        T v = T(0);                                                                                                                                  \
        v += T(1) * sum;                                                                                                                             \
        dense_finish<T> f;                                                                                                                           \
        f.bias = bias;                                                                                                                               \
        f.relu = relu;                                                                                                                               \
        y[0] = finish_value(v, f, 0, addend);                                                                                                        \
    }
#if TENON_GEMM_X86
TENON_SMALL_DENSE_FIXED(avx2, TENON_TARGET_AVX2, avx2_ops)
#else
TENON_SMALL_DENSE_FIXED(neon, TENON_TARGET_NEON, neon_ops)
#endif
#undef TENON_SMALL_DENSE_FIXED
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

// The version for a group of several products at once (dense_group below):
// their chains of additions overlap, so the call is bound by the number of
// vector instructions rather than by latency, and the widest vectors need
// the fewest.
inline small_dense_version best_group_version() noexcept {
#if TENON_GEMM_X86
    const int level = vector_level();
    return level == 2 ? small_dense_version::avx512 : level == 1 ? small_dense_version::avx2 : small_dense_version::portable;
#else
    return best_small_dense_version();
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

// Calls f(std::integral_constant<std::size_t, S>()) for the S in 1..Most
// equal to s (s >= 1): a size known at run time as a template argument.
template <std::size_t Most, class F>
inline void with_size(std::size_t s, F&& f) {
    if constexpr (Most > 1) {
        if (s != Most) return with_size<Most - 1>(s, f);
    }
    f(std::integral_constant<std::size_t, Most>());
}

// One row of y = finish(x W) for x of k values, W k x n (n == 1: one
// column, or W transposed), with the finish's bias, relu and addend given
// apart; the kernels above, with small_dense's bits.
template <class T>
using row_kernel = void (*)(const T* x, const T* w, std::size_t k, const T* bias, bool relu, const T* addend, T* y) noexcept;

// Most vectors of y a fixed row kernel holds (registers: 16 with AVX2, 32 with NEON).
inline constexpr std::size_t most_fixed_vectors = 8;

// The row kernel for n outputs with `version`, chosen once when a model is
// loaded, or null where none has the column loop fixed (the portable and
// AVX-512 versions, and widths that are not 1 or a multiple of the vector
// up to most_fixed_vectors vectors): small_dense then serves the row.
template <class T>
row_kernel<T> fixed_row_kernel(std::size_t n, small_dense_version version) noexcept {
    row_kernel<T> kernel = nullptr;
#if TENON_GEMM_X86
    if (version != small_dense_version::avx2) return nullptr;
    constexpr std::size_t lanes = avx2_ops<T>::lanes;
    if (n < thin_columns<T>) return n == 1 ? &dense_dot_one_avx2<T> : nullptr;
    if (n % lanes == 0 && n / lanes <= most_fixed_vectors)
        with_size<most_fixed_vectors>(n / lanes, [&](auto v) noexcept { kernel = &dense_row_fixed_avx2<T, decltype(v)::value>; });
#elif TENON_SIMD_NEON64
    if (version != small_dense_version::neon) return nullptr;
    constexpr std::size_t lanes = neon_ops<T>::lanes;
    if (n < thin_columns<T>) return n == 1 ? &dense_dot_one_neon<T> : nullptr;
    if (n % lanes == 0 && n / lanes <= most_fixed_vectors)
        with_size<most_fixed_vectors>(n / lanes, [&](auto v) noexcept { kernel = &dense_row_fixed_neon<T, decltype(v)::value>; });
#else
    (void)n;
    (void)version;
#endif
    return kernel;
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
void dense_rows(std::size_t rows, std::size_t k, std::size_t n, const T* x, const T* w, const T* wt, const dense_finish<T>& f, T* y) noexcept {
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
        if (vector_level() == 2)
            dense_fused_rows_avx512(rows, x, w, k, n, f, y);
        else
            dense_fused_rows_avx2(rows, x, w, k, n, f, y);
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

// ---------------------------------------------------------------------------
// Groups: several small dense products at once, each summed as the row
// loop and split_dot above sum it.
//
// A call of one row is bound by the latency of each output's chain of
// additions (k of them, one after the other), not by the arithmetic units.
// Where several independent products of the same shape are due at the same
// time, such as the same layer of every member of a seed ensemble, or the
// rows of a batch through a layer of few outputs, computing them in one loop
// puts their chains side by side, so the processor overlaps them.
//
// Bits. Nothing is summed in another order than the row loop above and
// split_dot (core/gemm.hpp) sum it, so each value keeps its bits:
//   - dense_row_pair_*: two rows of the row loop (n >= thin_columns) in one
//     loop over k; each output is 0 + x_0 w_0j + x_1 w_1j + ... in order,
//     each product and each sum rounded on its own (never fused);
//   - split_dots: split_dot for several (x, w) pairs; each pair's eight
//     partial sums are one vector (partial q in lane q, the products of
//     p = q, q + 8, q + 16, ... added in order, the tail p >= k - k % 8 added
//     to partial 0 afterwards), then the partial vectors of eight (float) or
//     four (double) pairs are transposed so that 0 + partial_0 + partial_1 +
//     ... + partial_7 is computed for all of them at once, one vector
//     addition per term, in the same order as split_dot adds them.
// Only the additions' placement in the instruction stream changes.

// A group of dense products of one shape (k inputs, n outputs): product g
// computes y[g] = finish(x[g] W[g]) with bias[g] (or null), relu[g] and
// addend[g] (or null); wt[g] is W[g] transposed, read when n < thin_columns.
// The arrays hold `count` entries.
template <class T>
struct dense_group_args {
    const T* const* x;
    const T* const* w;
    const T* const* wt;
    const T* const* bias;
    const bool* relu;
    const T* const* addend;
    T* const* y;
};

#if TENON_GEMM_X86 || TENON_SIMD_NEON64
// G rows of the row loop (dense_row_* above), one per product, in one loop
// over k: G x V vectors of y held across the k terms, V <= 4 chosen so that
// G x V stays within `budget` registers.
#define TENON_DENSE_GROUP_BLOCK(SUFFIX, V)                                                                                                           \
    for (; j + (V)*lanes <= n; j += (V)*lanes) {                                                                                                     \
        typename ops::vector c[G][V];                                                                                                                \
        _Pragma("GCC unroll 8") for (std::size_t g = 0; g < G; ++g) _Pragma("GCC unroll 4") for (std::size_t v = 0; v < (V); ++v) c[g][v] =          \
            ops::zero();                                                                                                                             \
        for (std::size_t p = 0; p < k; ++p) {                                                                                                        \
            _Pragma("GCC unroll 8") for (std::size_t g = 0; g < G; ++g) {                                                                            \
                const auto s = ops::broadcast(T(1) * x[g][p]);                                                                                       \
                const T* wp = w[g] + p * n + j;                                                                                                      \
                _Pragma("GCC unroll 4") for (std::size_t v = 0; v < (V); ++v) c[g][v] = ops::add(c[g][v], ops::mul(s, ops::load(wp + v * lanes)));   \
            }                                                                                                                                        \
        }                                                                                                                                            \
        _Pragma("GCC unroll 8") for (std::size_t g = 0; g < G; ++g) _Pragma("GCC unroll 4") for (std::size_t v = 0; v < (V); ++v) {                  \
            const std::size_t at = j + v * lanes;                                                                                                    \
            ops::store(y[g] + at,                                                                                                                    \
                       finish_vector_##SUFFIX<T>(c[g][v], bias[g] ? bias[g] + at : nullptr, relu[g], addend[g] ? addend[g] + at : nullptr));         \
        }                                                                                                                                            \
    }
#define TENON_DENSE_GROUP(SUFFIX, TARGET, OPS, BUDGET)                                                                                               \
    template <class T, std::size_t G>                                                                                                                \
    TARGET TENON_NO_CONTRACTION void dense_row_group_##SUFFIX(const T* const* x, const T* const* w, const T* const* bias, const bool* relu,          \
                                                              const T* const* addend, T* const* y, std::size_t k, std::size_t n) noexcept {          \
        TENON_NO_CONTRACTION_IN_BODY                                                                                                                 \
        using ops = OPS<T>;                                                                                                                          \
        constexpr std::size_t lanes = ops::lanes;                                                                                                    \
        std::size_t j = 0;                                                                                                                           \
        if constexpr (G * 4 <= (BUDGET)) TENON_DENSE_GROUP_BLOCK(SUFFIX, 4)                                                                          \
        if constexpr (G * 2 <= (BUDGET)) TENON_DENSE_GROUP_BLOCK(SUFFIX, 2)                                                                          \
        TENON_DENSE_GROUP_BLOCK(SUFFIX, 1)                                                                                                           \
        for (; j < n; ++j)                                                                                                                           \
            for (std::size_t g = 0; g < G; ++g) {                                                                                                    \
                T c = T(0);                                                                                                                          \
                for (std::size_t p = 0; p < k; ++p) c += (T(1) * x[g][p]) * w[g][p * n + j];                                                         \
                dense_finish<T> f;                                                                                                                   \
                f.bias = bias[g];                                                                                                                    \
                f.relu = relu[g];                                                                                                                    \
                y[g][j] = finish_value(c, f, j, addend[g]);                                                                                          \
            }                                                                                                                                        \
    }
// Registers for accumulators: AVX-512 has 32, AVX2 and NEON (counted for
// its float lanes) 16, less the broadcasts and products in flight.
#if TENON_GEMM_X86
TENON_DENSE_GROUP(avx512, TENON_TARGET_AVX512, avx512_ops, 16)
TENON_DENSE_GROUP(avx2, TENON_TARGET_AVX2, avx2_ops, 8)
#else
TENON_DENSE_GROUP(neon, TENON_TARGET_NEON, neon_ops, 16)
#endif
#undef TENON_DENSE_GROUP
#undef TENON_DENSE_GROUP_BLOCK
#endif

#if TENON_GEMM_X86
// split_dot of eight float pairs (see the top of this file); out[r] for pair r.
TENON_TARGET_AVX2 TENON_NO_CONTRACTION inline void split_dots8_avx2(const float* const* xs, const float* const* ws, std::size_t k,
                                                                    float* out) noexcept {
    TENON_NO_CONTRACTION_IN_BODY
    __m256 r[8];
    const std::size_t full = k - k % 8;
    for (std::size_t i = 0; i < 8; ++i) {
        const float* x = xs[i];
        const float* w = ws[i];
        __m256 acc = _mm256_setzero_ps();
        for (std::size_t p = 0; p < full; p += 8) acc = _mm256_add_ps(acc, _mm256_mul_ps(_mm256_loadu_ps(x + p), _mm256_loadu_ps(w + p)));
        for (std::size_t p = full; p < k; ++p)  // partial 0 (lane 0) only
            acc = _mm256_blend_ps(acc, _mm256_add_ps(acc, _mm256_mul_ps(_mm256_set1_ps(x[p]), _mm256_set1_ps(w[p]))), 1);
        r[i] = acc;
    }
    const __m256 t0 = _mm256_unpacklo_ps(r[0], r[1]), t1 = _mm256_unpackhi_ps(r[0], r[1]);
    const __m256 t2 = _mm256_unpacklo_ps(r[2], r[3]), t3 = _mm256_unpackhi_ps(r[2], r[3]);
    const __m256 t4 = _mm256_unpacklo_ps(r[4], r[5]), t5 = _mm256_unpackhi_ps(r[4], r[5]);
    const __m256 t6 = _mm256_unpacklo_ps(r[6], r[7]), t7 = _mm256_unpackhi_ps(r[6], r[7]);
    const __m256 u0 = _mm256_shuffle_ps(t0, t2, 0x44), u1 = _mm256_shuffle_ps(t0, t2, 0xEE);
    const __m256 u2 = _mm256_shuffle_ps(t1, t3, 0x44), u3 = _mm256_shuffle_ps(t1, t3, 0xEE);
    const __m256 u4 = _mm256_shuffle_ps(t4, t6, 0x44), u5 = _mm256_shuffle_ps(t4, t6, 0xEE);
    const __m256 u6 = _mm256_shuffle_ps(t5, t7, 0x44), u7 = _mm256_shuffle_ps(t5, t7, 0xEE);
    // Column q (partial q of every pair), added in order q = 0..7.
    __m256 sum = _mm256_setzero_ps();
    sum = _mm256_add_ps(sum, _mm256_permute2f128_ps(u0, u4, 0x20));
    sum = _mm256_add_ps(sum, _mm256_permute2f128_ps(u1, u5, 0x20));
    sum = _mm256_add_ps(sum, _mm256_permute2f128_ps(u2, u6, 0x20));
    sum = _mm256_add_ps(sum, _mm256_permute2f128_ps(u3, u7, 0x20));
    sum = _mm256_add_ps(sum, _mm256_permute2f128_ps(u0, u4, 0x31));
    sum = _mm256_add_ps(sum, _mm256_permute2f128_ps(u1, u5, 0x31));
    sum = _mm256_add_ps(sum, _mm256_permute2f128_ps(u2, u6, 0x31));
    sum = _mm256_add_ps(sum, _mm256_permute2f128_ps(u3, u7, 0x31));
    _mm256_storeu_ps(out, sum);
}

// split_dot of four double pairs: partials 0-3 in one vector, 4-7 in another.
TENON_TARGET_AVX2 TENON_NO_CONTRACTION inline void split_dots4_avx2(const double* const* xs, const double* const* ws, std::size_t k,
                                                                    double* out) noexcept {
    TENON_NO_CONTRACTION_IN_BODY
    __m256d lo[4], hi[4];
    const std::size_t full = k - k % 8;
    for (std::size_t i = 0; i < 4; ++i) {
        const double* x = xs[i];
        const double* w = ws[i];
        __m256d a = _mm256_setzero_pd(), b = _mm256_setzero_pd();
        for (std::size_t p = 0; p < full; p += 8) {
            a = _mm256_add_pd(a, _mm256_mul_pd(_mm256_loadu_pd(x + p), _mm256_loadu_pd(w + p)));
            b = _mm256_add_pd(b, _mm256_mul_pd(_mm256_loadu_pd(x + p + 4), _mm256_loadu_pd(w + p + 4)));
        }
        for (std::size_t p = full; p < k; ++p) a = _mm256_blend_pd(a, _mm256_add_pd(a, _mm256_mul_pd(_mm256_set1_pd(x[p]), _mm256_set1_pd(w[p]))), 1);
        lo[i] = a;
        hi[i] = b;
    }
    __m256d sum = _mm256_setzero_pd();
    for (const __m256d* r : {lo, hi}) {
        const __m256d t0 = _mm256_unpacklo_pd(r[0], r[1]), t1 = _mm256_unpackhi_pd(r[0], r[1]);
        const __m256d t2 = _mm256_unpacklo_pd(r[2], r[3]), t3 = _mm256_unpackhi_pd(r[2], r[3]);
        sum = _mm256_add_pd(sum, _mm256_permute2f128_pd(t0, t2, 0x20));
        sum = _mm256_add_pd(sum, _mm256_permute2f128_pd(t1, t3, 0x20));
        sum = _mm256_add_pd(sum, _mm256_permute2f128_pd(t0, t2, 0x31));
        sum = _mm256_add_pd(sum, _mm256_permute2f128_pd(t1, t3, 0x31));
    }
    _mm256_storeu_pd(out, sum);
}

template <class T>
inline void split_dots_avx2(const T* const* xs, const T* const* ws, std::size_t k, T* out) noexcept {
    if constexpr (sizeof(T) == sizeof(float))
        split_dots8_avx2(xs, ws, k, out);
    else
        split_dots4_avx2(xs, ws, k, out);
}

// y[i] = finish(0 + dots[i]) for a chunk of rows of a product with one
// output (so y, the addend and the dots are contiguous and the bias is one
// value), as finish_value computes each: the vector form of the loop in
// dense_group_thin below.
template <class T>
TENON_TARGET_AVX2 TENON_NO_CONTRACTION void finish_column_chunk_avx2(const T* dots, const T* bias, bool relu, const T* addend, T* y) noexcept {
    TENON_NO_CONTRACTION_IN_BODY
    using ops = avx2_ops<T>;
    auto v = ops::add(ops::zero(), ops::load(dots));
    if (bias) v = ops::add(v, ops::broadcast(*bias));
    v = ops::zero_tiny(v);
    if (relu) v = ops::select_positive(v, v);
    if (addend) v = ops::zero_tiny(ops::add(ops::load(addend), v));
    ops::store(y, v);
}
static_assert(avx2_ops<float>::lanes == 8 && avx2_ops<double>::lanes == 4, "a chunk of split_dots is one AVX2 vector");
#endif

// How many pairs split_dots takes at a time.
template <class T>
inline constexpr std::size_t split_dots_chunk = sizeof(T) == sizeof(float) ? 8 : 4;

// out[c] = split_dot(xs[c], 1, ws[c], 1, k) for c < count <= split_dots_chunk<T>.
template <class T>
void split_dots(std::size_t count, const T* const* xs, const T* const* ws, std::size_t k, T* out, small_dense_version version) noexcept {
#if TENON_GEMM_X86
    if (version == small_dense_version::avx2 || version == small_dense_version::avx512) {
        constexpr std::size_t chunk = split_dots_chunk<T>;
        if (count == chunk) {
            split_dots_avx2(xs, ws, k, out);
            return;
        }
        // A short chunk repeats its first pair in the unused lanes.
        const T* x[chunk];
        const T* w[chunk];
        T v[chunk];
        for (std::size_t c = 0; c < chunk; ++c) {
            x[c] = xs[c < count ? c : 0];
            w[c] = ws[c < count ? c : 0];
        }
        split_dots_avx2(x, w, k, v);
        for (std::size_t c = 0; c < count; ++c) out[c] = v[c];
        return;
    }
#endif
    (void)version;
    for (std::size_t c = 0; c < count; ++c) out[c] = split_dot(xs[c], 1, ws[c], 1, k);
}

// The thin case of dense_group below (n < thin_columns): output j of row i
// of product g is 0 + 1 x split_dot(row i of x[g], column j of W[g]), then
// finished, as dense_dots computes it. Whole chunks of rows of one product
// and output first, then the (product, row, output) triples left over.
template <class T>
void dense_group_thin(std::size_t rows, std::size_t count, const dense_group_args<T>& a, std::size_t k, std::size_t n,
                      small_dense_version version) noexcept {
    constexpr std::size_t chunk = split_dots_chunk<T>;
    const T* xs[chunk];
    const T* ws[chunk];
    T dots[chunk];
    std::size_t gs[chunk], is[chunk], js[chunk];
    std::size_t left = 0;  // triples waiting
    const auto finish = [&](std::size_t g, std::size_t i, std::size_t j, T dot) noexcept {
        const T v = T(0) + dot;  // 0 + 1 x dot, as dense_dots (1 x dot is dot)
        dense_finish<T> f;
        f.bias = a.bias[g];
        f.relu = a.relu[g];
        a.y[g][i * n + j] = finish_value(v, f, j, a.addend[g] ? a.addend[g] + i * n : nullptr);
    };
    for (std::size_t g = 0; g < count; ++g) {
        const std::size_t whole = rows - rows % chunk;
        for (std::size_t j = 0; j < n; ++j) {
            const T* column = a.wt[g] + j * k;
            for (std::size_t e = 0; e < chunk; ++e) ws[e] = column;
            for (std::size_t i = 0; i < whole; i += chunk) {
                for (std::size_t e = 0; e < chunk; ++e) xs[e] = a.x[g] + (i + e) * k;
                split_dots(chunk, xs, ws, k, dots, version);
#if TENON_GEMM_X86
                if (n == 1 && (version == small_dense_version::avx2 || version == small_dense_version::avx512)) {
                    finish_column_chunk_avx2(dots, a.bias[g], a.relu[g], a.addend[g] ? a.addend[g] + i : nullptr, a.y[g] + i);
                    continue;
                }
#endif
                for (std::size_t e = 0; e < chunk; ++e) finish(g, i + e, j, dots[e]);
            }
        }
        for (std::size_t i = whole; i < rows; ++i)
            for (std::size_t j = 0; j < n; ++j) {
                gs[left] = g;
                is[left] = i;
                js[left] = j;
                if (++left == chunk) {
                    for (std::size_t e = 0; e < chunk; ++e) {
                        xs[e] = a.x[gs[e]] + is[e] * k;
                        ws[e] = a.wt[gs[e]] + js[e] * k;
                    }
                    split_dots(chunk, xs, ws, k, dots, version);
                    for (std::size_t e = 0; e < chunk; ++e) finish(gs[e], is[e], js[e], dots[e]);
                    left = 0;
                }
            }
    }
    if (left == 1) {
        finish(gs[0], is[0], js[0], split_dot(a.x[gs[0]] + is[0] * k, 1, a.wt[gs[0]] + js[0] * k, 1, k));
    } else if (left > 1) {
        for (std::size_t e = 0; e < left; ++e) {
            xs[e] = a.x[gs[e]] + is[e] * k;
            ws[e] = a.wt[gs[e]] + js[e] * k;
        }
        split_dots(left, xs, ws, k, dots, version);
        for (std::size_t e = 0; e < left; ++e) finish(gs[e], is[e], js[e], dots[e]);
    }
}

// rows rows of each product of a group (see dense_group_args), summed as
// small_dense sums them, so with gemm's bits where is_thin_product holds
// (rows < always_thin_rows, or n < thin_columns at any row count). With
// n < thin_columns: the dot products of up to split_dots_chunk (product,
// row, output) triples at a time; else for one row, up to four products'
// rows in one loop of the row loop.
template <class T>
void dense_group(std::size_t rows, std::size_t count, const dense_group_args<T>& a, std::size_t k, std::size_t n,
                 small_dense_version version) noexcept {
    if (rows == 0 || n == 0 || count == 0) return;
    if (n < thin_columns<T>) {
        dense_group_thin(rows, count, a, k, n, version);
        return;
    }
    std::size_t g = 0;
#if TENON_GEMM_X86 || TENON_SIMD_NEON64
    if (rows == 1) {
        // Groups of at most four, as even as possible (five as three and
        // two, not four and one: a product alone is bound by its latency).
        const auto run = [&](std::size_t at, std::size_t size) noexcept {
            const T* const* x = a.x + at;
            const T* const* w = a.w + at;
            const T* const* b = a.bias + at;
            const bool* r = a.relu + at;
            const T* const* d = a.addend + at;
            T* const* y = a.y + at;
            switch (version) {
#if TENON_GEMM_X86
            case small_dense_version::avx512:
                with_size<4>(size, [&](auto s) noexcept { dense_row_group_avx512<T, decltype(s)::value>(x, w, b, r, d, y, k, n); });
                return true;
            case small_dense_version::avx2:
                with_size<4>(size, [&](auto s) noexcept { dense_row_group_avx2<T, decltype(s)::value>(x, w, b, r, d, y, k, n); });
                return true;
#elif TENON_SIMD_NEON64
            case small_dense_version::neon:
                with_size<4>(size, [&](auto s) noexcept { dense_row_group_neon<T, decltype(s)::value>(x, w, b, r, d, y, k, n); });
                return true;
#endif
            default: return false;
            }
        };
        const std::size_t groups = (count + 3) / 4;
        for (std::size_t q = 0; q < groups; ++q) {
            const std::size_t end = count * (q + 1) / groups;  // groups of count / groups, rounded
            if (!run(g, end - g)) break;
            g = end;
        }
    }
#endif
    for (; g < count; ++g) {
        dense_finish<T> f;
        f.bias = a.bias[g];
        f.relu = a.relu[g];
        f.addend = a.addend[g];
        small_dense(rows, k, n, a.x[g], a.w[g], a.wt[g], f, a.y[g], version);
    }
}

}  // namespace detail

TENON_NAMESPACE_END
