// tenon: general matrix multiply on row-major buffers.
//
// C = alpha * op(A) * op(B) + beta * C, op(X) being X or its transpose; with
// beta == 0, C is written without being read. Method: blocked and packed
// (Goto & van de Geijn 2008, "Anatomy of High-Performance Matrix
// Multiplication"), with register tiles for AVX-512F, AVX2 + FMA, NEON or
// plain C++ (or a configured BLAS), chosen at run time. On the built-in paths
// the bits depend on the shape alone, not on the thread count; steady-state
// calls do not allocate. Kernel paths, rounding, threads, the BLAS path's
// caveats and memory: docs/design/gemm.md.
#pragma once

#include <algorithm>
#include <atomic>
#include <climits>
#include <cstddef>
#include <cstdint>
#include <new>
#include <string>
#include <type_traits>
#include <vector>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"
#include "tenon/core/parallel.hpp"
#include "tenon/core/simd.hpp"
#include "tenon/version.hpp"

#if defined(TENON_HAS_BLAS) && TENON_HAS_BLAS
#include <cblas.h>
#define TENON_GEMM_BLAS 1
#else
#define TENON_GEMM_BLAS 0
#endif

#if TENON_GEMM_BLAS && (defined(__GNUC__) || defined(__clang__)) && defined(__ELF__)
// OpenBLAS's thread-count call, declared weak: null when the linked BLAS
// (reference BLAS, BLIS, ...) has no such function.
extern "C" void openblas_set_num_threads(int) __attribute__((weak));
#define TENON_GEMM_BLAS_THREADS 1
#else
#define TENON_GEMM_BLAS_THREADS 0
#endif

#define TENON_GEMM_X86 TENON_SIMD_X86

TENON_NAMESPACE_BEGIN

/// The implementations of the packed product (see docs/design/gemm.md).
enum class kernel_path : std::uint8_t { portable, avx2, avx512, blas, neon };

inline const char* to_string(kernel_path p) noexcept {
    switch (p) {
    case kernel_path::portable: return "portable";
    case kernel_path::avx2: return "avx2";
    case kernel_path::avx512: return "avx512";
    case kernel_path::blas: return "blas";
    case kernel_path::neon: return "neon";
    }
    return "unknown";
}
/// The former spelling of to_string(kernel_path).
inline const char* kernel_path_name(kernel_path v) noexcept { return to_string(v); }

/// Whether this build and the running CPU can use path `p`.
inline bool kernel_path_available(kernel_path p) noexcept {
    switch (p) {
    case kernel_path::portable: return true;
    case kernel_path::blas: return TENON_GEMM_BLAS != 0;
    case kernel_path::avx2: return cpu_has_avx2_fma();
    case kernel_path::avx512: return cpu_has_avx512f();
    case kernel_path::neon: return cpu_has_neon();
    }
    return false;
}

/// The fastest built-in (non-BLAS) path the running CPU supports.
inline kernel_path best_builtin_kernel_path() noexcept {
    if (kernel_path_available(kernel_path::avx512)) return kernel_path::avx512;
    if (kernel_path_available(kernel_path::avx2)) return kernel_path::avx2;
    if (kernel_path_available(kernel_path::neon)) return kernel_path::neon;
    return kernel_path::portable;
}

/// The default path: the BLAS when the build has one, else the best built-in path.
inline kernel_path default_kernel_path() noexcept {
    return kernel_path_available(kernel_path::blas) ? kernel_path::blas : best_builtin_kernel_path();
}

namespace detail {
// One process-wide choice (an inline function's static is one object across
// translation units), detected on first use.
inline std::atomic<std::uint8_t>& kernel_path_slot() noexcept {
    static std::atomic<std::uint8_t> slot{static_cast<std::uint8_t>(default_kernel_path())};
    return slot;
}
}  // namespace detail

/// The path gemm uses now.
inline kernel_path active_kernel_path() noexcept { return static_cast<kernel_path>(detail::kernel_path_slot().load(std::memory_order_relaxed)); }

/// Makes gemm use path `p` from now on, process-wide; raises
/// core.argument.invalid if this build or CPU cannot run it. Meant for
/// tests, benchmarks and reproducing results; do not switch while another
/// thread multiplies.
inline void set_kernel_path(kernel_path p) {
    if (!kernel_path_available(p)) {
        raise(codes::core_argument_invalid,
              std::string("set_kernel_path: the ") + kernel_path_name(p) + " path is not available " +
                  (p == kernel_path::blas ? "(build without the tenon::blas component)" : "(the CPU or compiler lacks its instructions)"));
    }
    detail::kernel_path_slot().store(static_cast<std::uint8_t>(p), std::memory_order_relaxed);
}

/// Asks the BLAS of the BLAS path to run each product on `threads` threads.
/// With an executor, tenon splits the products across it and the BLAS
/// should run on one (see docs/design/gemm.md, "Threads").
/// Returns true when the linked BLAS offers a way to say so (OpenBLAS);
/// false when it does not or the build has no BLAS: its own settings (e.g.
/// an environment variable it reads) decide. Process-wide, like the BLAS's
/// own setting; the host's choice, never called by tenon itself.
inline bool set_blas_threads(std::size_t threads) noexcept {
#if TENON_GEMM_BLAS_THREADS
    if (threads == 0 || threads > static_cast<std::size_t>(INT_MAX) || !openblas_set_num_threads) return false;
    openblas_set_num_threads(static_cast<int>(threads));
    return true;
#else
    (void)threads;
    return false;
#endif
}

namespace detail {

// Results with fewer columns than this take the unpacked loops (packing
// would cost as much as the arithmetic): one 32-byte vector.
template <class T>
inline constexpr std::size_t thin_columns = 32 / sizeof(T);

// The portable kernel's blocking (common practice, then measured): a tile of
// 4 rows x 32 columns. Among 4 x 4, 4 x 8, 4 x 16 and 4 x 32 tiles it was the
// fastest (or within 10% of it) for float and double with both GCC 12 and
// Clang 14 with the default x86-64 flags (SSE2); 16 columns fell into a
// slow, unvectorized path with GCC. A packed A block (mc x kc, 64 KiB for
// float) stays in L2.
template <class T>
struct portable_kernel {
    static constexpr std::size_t mr = 4, nr = 32, kc = 256, mc = 64, nc = 512;
};

// Element (row, col) of op(X) for a row-major X with row stride ld.
template <class T>
inline T op_element(const T* x, std::size_t ld, bool transposed, std::size_t row, std::size_t col) noexcept {
    return transposed ? x[col * ld + row] : x[row * ld + col];
}

// Packs rows [i0, i0 + rows) and depths [p0, p0 + depth) of op(A) into
// panels of MR rows: panel q holds, for each depth p, the MR values
// op(A)(i0 + q * MR + r, p0 + p), zero-padded past the last row.
template <std::size_t MR, class T>
void pack_a_block(const T* a, std::size_t lda, bool transpose_a, std::size_t i0, std::size_t rows, std::size_t p0, std::size_t depth,
                  T* out) noexcept {
    for (std::size_t q = 0; q < rows; q += MR) {
        const std::size_t live = std::min(MR, rows - q);
        T* panel = out + q * depth;
        if (!transpose_a) {
            for (std::size_t r = 0; r < MR; ++r) {
                if (r < live) {
                    const T* source = a + (i0 + q + r) * lda + p0;
                    for (std::size_t p = 0; p < depth; ++p) panel[p * MR + r] = source[p];
                } else {
                    for (std::size_t p = 0; p < depth; ++p) panel[p * MR + r] = T(0);
                }
            }
        } else {
            for (std::size_t p = 0; p < depth; ++p) {
                const T* source = a + (p0 + p) * lda + i0 + q;
                for (std::size_t r = 0; r < MR; ++r) panel[p * MR + r] = r < live ? source[r] : T(0);
            }
        }
    }
}

// Packs depths [p0, p0 + depth) and columns [j0, j0 + cols) of op(B) into
// panels of NR columns: panel q holds, for each depth p, the NR values
// op(B)(p0 + p, j0 + q * NR + c), zero-padded past the last column.
template <std::size_t NR, class T>
void pack_b_block(const T* b, std::size_t ldb, bool transpose_b, std::size_t p0, std::size_t depth, std::size_t j0, std::size_t cols,
                  T* out) noexcept {
    for (std::size_t q = 0; q < cols; q += NR) {
        const std::size_t live = std::min(NR, cols - q);
        T* panel = out + q * depth;
        if (!transpose_b) {
            for (std::size_t p = 0; p < depth; ++p) {
                const T* source = b + (p0 + p) * ldb + j0 + q;
                if (live == NR) {
                    for (std::size_t c = 0; c < NR; ++c) panel[p * NR + c] = source[c];
                } else {
                    for (std::size_t c = 0; c < NR; ++c) panel[p * NR + c] = c < live ? source[c] : T(0);
                }
            }
        } else {
            for (std::size_t c = 0; c < NR; ++c) {
                if (c < live) {
                    const T* source = b + (j0 + q + c) * ldb + p0;
                    for (std::size_t p = 0; p < depth; ++p) panel[p * NR + c] = source[p];
                } else {
                    for (std::size_t p = 0; p < depth; ++p) panel[p * NR + c] = T(0);
                }
            }
        }
    }
}

// C tile (rows x cols, at most mr x nr of the portable kernel) += alpha * sum over
// depth of packed A panel (x) packed B panel.
template <class T>
void gemm_tile(std::size_t depth, const T* a_panel, const T* b_panel, T alpha, T* c, std::size_t ldc, std::size_t rows, std::size_t cols) noexcept {
    constexpr std::size_t mr = portable_kernel<T>::mr;
    constexpr std::size_t nr = portable_kernel<T>::nr;
    T acc[mr][nr] = {};
    for (std::size_t p = 0; p < depth; ++p) {
        const T* ap = a_panel + p * mr;
        const T* bp = b_panel + p * nr;
        for (std::size_t r = 0; r < mr; ++r) {
            const T ar = ap[r];
            for (std::size_t col = 0; col < nr; ++col) acc[r][col] += ar * bp[col];
        }
    }
    if (rows == mr && cols == nr) {
        for (std::size_t r = 0; r < mr; ++r) {
            T* cr = c + r * ldc;
            for (std::size_t col = 0; col < nr; ++col) cr[col] += alpha * acc[r][col];
        }
    } else {
        for (std::size_t r = 0; r < rows; ++r) {
            T* cr = c + r * ldc;
            for (std::size_t col = 0; col < cols; ++col) cr[col] += alpha * acc[r][col];
        }
    }
}

// sum_p x[p * incx] * y[p * incy] over `lanes` interleaved partial sums.
// Written out, the split lets the compiler vectorize the contiguous case
// without permission to reassociate (no -ffast-math): each partial sum is
// its own chain of additions.
template <class T>
TENON_NO_CONTRACTION T split_dot(const T* x, std::size_t incx, const T* y, std::size_t incy, std::size_t k) noexcept {
    TENON_NO_CONTRACTION_IN_BODY
    constexpr std::size_t lanes = 8;
    T partial[lanes] = {};
    std::size_t p = 0;
    if (incx == 1 && incy == 1) {
        for (; p + lanes <= k; p += lanes)
            for (std::size_t q = 0; q < lanes; ++q) partial[q] += x[p + q] * y[p + q];
    } else {
        for (; p + lanes <= k; p += lanes)
            for (std::size_t q = 0; q < lanes; ++q) partial[q] += x[(p + q) * incx] * y[(p + q) * incy];
    }
    for (; p < k; ++p) partial[0] += x[p * incx] * y[p * incy];
    T sum = T(0);
    for (std::size_t q = 0; q < lanes; ++q) sum += partial[q];
    return sum;
}

#if TENON_GEMM_X86 || TENON_SIMD_NEON64
// c[j] += s_0 b_0[j] + s_1 b_1[j] + ... + s_{k-1} b_{k-1}[j] for j < n, added
// one term at a time in that order, where s_p = alpha * a[p * a_step] and
// b_p = b + p * ldb: one row of the unpacked product below. Each element is
// computed as the plain loop computes it (a multiply and an add, each
// rounded, never fused), so the bits do not depend on which version runs; the
// vector versions only keep up to four vectors of c in registers across the
// k terms instead of reading and writing c once per term.
#define TENON_GEMM_ROW_KERNEL(SUFFIX, TARGET, OPS)                                                                                                   \
    template <class T>                                                                                                                               \
    TARGET TENON_NO_CONTRACTION void combine_rows_##SUFFIX(const T* a, std::size_t a_step, T alpha, const T* b, std::size_t ldb, std::size_t k,      \
                                                           T* c, std::size_t n) noexcept {                                                           \
        TENON_NO_CONTRACTION_IN_BODY                                                                                                                 \
        using ops = OPS<T>;                                                                                                                          \
        constexpr std::size_t lanes = ops::lanes;                                                                                                    \
        std::size_t j = 0;                                                                                                                           \
        for (; j + 4 * lanes <= n; j += 4 * lanes) {                                                                                                 \
            auto c0 = ops::load(c + j), c1 = ops::load(c + j + lanes);                                                                               \
            auto c2 = ops::load(c + j + 2 * lanes), c3 = ops::load(c + j + 3 * lanes);                                                               \
            for (std::size_t p = 0; p < k; ++p) {                                                                                                    \
                const auto s = ops::broadcast(alpha * a[p * a_step]);                                                                                \
                const T* bp = b + p * ldb + j;                                                                                                       \
                c0 = ops::add(c0, ops::mul(s, ops::load(bp)));                                                                                       \
                c1 = ops::add(c1, ops::mul(s, ops::load(bp + lanes)));                                                                               \
                c2 = ops::add(c2, ops::mul(s, ops::load(bp + 2 * lanes)));                                                                           \
                c3 = ops::add(c3, ops::mul(s, ops::load(bp + 3 * lanes)));                                                                           \
            }                                                                                                                                        \
            ops::store(c + j, c0);                                                                                                                   \
            ops::store(c + j + lanes, c1);                                                                                                           \
            ops::store(c + j + 2 * lanes, c2);                                                                                                       \
            ops::store(c + j + 3 * lanes, c3);                                                                                                       \
        }                                                                                                                                            \
        for (; j + 2 * lanes <= n; j += 2 * lanes) {                                                                                                 \
            auto c0 = ops::load(c + j), c1 = ops::load(c + j + lanes);                                                                               \
            for (std::size_t p = 0; p < k; ++p) {                                                                                                    \
                const auto s = ops::broadcast(alpha * a[p * a_step]);                                                                                \
                const T* bp = b + p * ldb + j;                                                                                                       \
                c0 = ops::add(c0, ops::mul(s, ops::load(bp)));                                                                                       \
                c1 = ops::add(c1, ops::mul(s, ops::load(bp + lanes)));                                                                               \
            }                                                                                                                                        \
            ops::store(c + j, c0);                                                                                                                   \
            ops::store(c + j + lanes, c1);                                                                                                           \
        }                                                                                                                                            \
        for (; j + lanes <= n; j += lanes) {                                                                                                         \
            auto c0 = ops::load(c + j);                                                                                                              \
            for (std::size_t p = 0; p < k; ++p) c0 = ops::add(c0, ops::mul(ops::broadcast(alpha * a[p * a_step]), ops::load(b + p * ldb + j)));      \
            ops::store(c + j, c0);                                                                                                                   \
        }                                                                                                                                            \
        for (; j < n; ++j) {                                                                                                                         \
            T cj = c[j];                                                                                                                             \
            for (std::size_t p = 0; p < k; ++p) cj += (alpha * a[p * a_step]) * b[p * ldb + j];                                                      \
            c[j] = cj;                                                                                                                               \
        }                                                                                                                                            \
    }
#if TENON_GEMM_X86
TENON_GEMM_ROW_KERNEL(avx512, TENON_TARGET_AVX512, avx512_ops)
TENON_GEMM_ROW_KERNEL(avx2, TENON_TARGET_AVX2, avx2_ops)
#else
// aarch64 only: 32-bit ARM's NEON would flush subnormals (core/simd.hpp).
TENON_GEMM_ROW_KERNEL(neon, TENON_TARGET_NEON, neon_ops)
#endif
#undef TENON_GEMM_ROW_KERNEL
#endif

// The unpacked product, for results too thin to fill a register tile (fewer
// than a kernel's tile rows or thin_columns columns, such as a single row to
// predict or a single regression output), where packing would cost as much
// as the arithmetic; also the fallback when the scratch cannot grow.
template <class T>
TENON_NO_CONTRACTION void gemm_unpacked(bool transpose_a, bool transpose_b, std::size_t m, std::size_t n, std::size_t k, T alpha, const T* a,
                                        std::size_t lda, const T* b, std::size_t ldb, T* c, std::size_t ldc) noexcept {
    TENON_NO_CONTRACTION_IN_BODY
    if (!transpose_b && n >= thin_columns<T>) {
        // Few rows: each row of C accumulates scaled rows of B (contiguous).
#if TENON_GEMM_X86
        if (const int level = vector_level()) {
            for (std::size_t i = 0; i < m; ++i) {
                const T* ai = transpose_a ? a + i : a + i * lda;
                const std::size_t a_step = transpose_a ? lda : 1;
                if (level == 2)
                    combine_rows_avx512(ai, a_step, alpha, b, ldb, k, c + i * ldc, n);
                else
                    combine_rows_avx2(ai, a_step, alpha, b, ldb, k, c + i * ldc, n);
            }
            return;
        }
#elif TENON_SIMD_NEON64
        for (std::size_t i = 0; i < m; ++i) {
            const T* ai = transpose_a ? a + i : a + i * lda;
            combine_rows_neon(ai, transpose_a ? lda : 1, alpha, b, ldb, k, c + i * ldc, n);
        }
        return;
#endif
        for (std::size_t i = 0; i < m; ++i) {
            T* ci = c + i * ldc;
            for (std::size_t p = 0; p < k; ++p) {
                const T s = alpha * op_element(a, lda, transpose_a, i, p);
                const T* bp = b + p * ldb;
                for (std::size_t j = 0; j < n; ++j) ci[j] += s * bp[j];
            }
        }
        return;
    }
    // One dot product per element: row i of op(A) with column j of op(B).
    const std::size_t a_step = transpose_a ? lda : 1, b_step = transpose_b ? 1 : ldb;
    for (std::size_t i = 0; i < m; ++i) {
        const T* ai = transpose_a ? a + i : a + i * lda;
        T* ci = c + i * ldc;
        for (std::size_t j = 0; j < n; ++j) {
            const T* bj = transpose_b ? b + j * ldb : b + j;
            ci[j] += alpha * split_dot(ai, a_step, bj, b_step, k);
        }
    }
}

// Per-thread packing buffers, grown on demand and kept for later calls.
template <class T>
struct gemm_scratch {
    std::vector<T> a_block, b_block;

    static gemm_scratch& for_this_thread() noexcept {
        static thread_local gemm_scratch scratch;
        return scratch;
    }
    bool reserve(std::size_t a_size, std::size_t b_size) noexcept {
#if TENON_HAS_EXCEPTIONS
        try {
            if (a_block.size() < a_size) a_block.resize(a_size);
            if (b_block.size() < b_size) b_block.resize(b_size);
            return true;
        } catch (const std::bad_alloc&) {
            return false;
        }
#else
        // Built without exceptions (e.g. a host using try_load_model_file and the predictor's try_ calls):
        // an allocation failure terminates instead of falling back.
        if (a_block.size() < a_size) a_block.resize(a_size);
        if (b_block.size() < b_size) b_block.resize(b_size);
        return true;
#endif
    }
};

inline std::size_t round_up(std::size_t value, std::size_t multiple) noexcept { return (value + multiple - 1) / multiple * multiple; }

#if TENON_GEMM_X86 || TENON_SIMD_NEON
// The tiles: MR rows x 2 vectors of columns, MR * 2 accumulators held in
// registers (AVX-512 has 32 vector registers: 16 accumulators, 2 columns of
// B and one broadcast of A; AVX2 has 16: 12 + 2 + 1). Per depth step: two
// loads of B, MR broadcasts of A, 2 * MR independent fused multiply-adds,
// enough to cover the multiply-add latency on two ports (Goto & van de Geijn
// 2008, section 6.2, on choosing mr x nr from the register count). Written
// out per instruction set because the target attribute cannot be a
// template argument.
#define TENON_GEMM_SIMD_TILE(TARGET, OPS)                                                                                                            \
    TARGET static void tile(std::size_t depth, const T* a, const T* b, T alpha, T* c, std::size_t ldc) noexcept {                                    \
        using ops = OPS<T>;                                                                                                                          \
        using vector = typename ops::vector;                                                                                                         \
        constexpr std::size_t lanes = ops::lanes;                                                                                                    \
        vector acc0[mr], acc1[mr];                                                                                                                   \
        _Pragma("GCC unroll 16") for (std::size_t r = 0; r < mr; ++r) acc0[r] = acc1[r] = ops::zero();                                               \
        for (std::size_t p = 0; p < depth; ++p) {                                                                                                    \
            const vector b0 = ops::load(b + p * nr), b1 = ops::load(b + p * nr + lanes);                                                             \
            const T* ap = a + p * mr;                                                                                                                \
            _Pragma("GCC unroll 16") for (std::size_t r = 0; r < mr; ++r) {                                                                          \
                const vector ar = ops::broadcast(ap[r]);                                                                                             \
                acc0[r] = ops::fma(ar, b0, acc0[r]);                                                                                                 \
                acc1[r] = ops::fma(ar, b1, acc1[r]);                                                                                                 \
            }                                                                                                                                        \
        }                                                                                                                                            \
        const vector scale = ops::broadcast(alpha);                                                                                                  \
        _Pragma("GCC unroll 16") for (std::size_t r = 0; r < mr; ++r) {                                                                              \
            T* cr = c + r * ldc;                                                                                                                     \
            ops::store(cr, ops::fma(scale, acc0[r], ops::load(cr)));                                                                                 \
            ops::store(cr + lanes, ops::fma(scale, acc1[r], ops::load(cr + lanes)));                                                                 \
        }                                                                                                                                            \
    }

#if TENON_GEMM_X86
template <class T>
struct avx512_kernel {
    static constexpr std::size_t mr = 8, nr = 2 * avx512_ops<T>::lanes, kc = 256, mc = 128, nc = 512;
    TENON_GEMM_SIMD_TILE(TENON_TARGET_AVX512, avx512_ops)
};
template <class T>
struct avx2_kernel {
    static constexpr std::size_t mr = 6, nr = 2 * avx2_ops<T>::lanes, kc = 256, mc = 120, nc = 512;
    TENON_GEMM_SIMD_TILE(TENON_TARGET_AVX2, avx2_ops)
};
#endif
#if TENON_SIMD_NEON
// aarch64 has 32 vector registers (8 x 2 accumulators), 32-bit ARM 16 (6 x 2);
// mc is a multiple of mr (the packed A block holds whole panels).
template <class T>
struct neon_kernel {
    static constexpr std::size_t mr = TENON_SIMD_NEON64 ? 8 : 6, nr = 2 * neon_ops<T>::lanes, kc = 256, mc = TENON_SIMD_NEON64 ? 128 : 120, nc = 512;
    static_assert(mc % mr == 0, "the packed A block holds whole panels");
    TENON_GEMM_SIMD_TILE(TENON_TARGET_NEON, neon_ops)
};
// The neon path's tile for T: the portable one where NEON has no lanes of T.
template <class T>
using neon_path_kernel = std::conditional_t<neon_has_lanes<T>, neon_kernel<T>, portable_kernel<T>>;
#endif
#undef TENON_GEMM_SIMD_TILE
#endif  // TENON_GEMM_X86 || TENON_SIMD_NEON

// One product and the band of C a task computes.
template <class T>
struct gemm_problem {
    bool transpose_a, transpose_b;
    std::size_t m, n, k;
    T alpha;
    const T* a;
    std::size_t lda;
    const T* b;
    std::size_t ldb;
    T beta;
    T* c;
    std::size_t ldc;
};

// Rows [i0, i0 + m) and columns [j0, j0 + n) of the product, with the
// operands and C shifted to start there.
template <class T>
gemm_problem<T> sub_problem(const gemm_problem<T>& g, std::size_t i0, std::size_t m, std::size_t j0, std::size_t n) noexcept {
    gemm_problem<T> s = g;
    s.m = m;
    s.n = n;
    s.a = g.transpose_a ? g.a + i0 : g.a + i0 * g.lda;
    s.b = g.transpose_b ? g.b + j0 * g.ldb : g.b + j0;
    s.c = g.c + i0 * g.ldc + j0;
    return s;
}

template <class T>
void scale_c(const gemm_problem<T>& g) noexcept {
    for (std::size_t i = 0; i < g.m; ++i) {
        T* ci = g.c + i * g.ldc;
        if (g.beta == T(0)) {
            for (std::size_t j = 0; j < g.n; ++j) ci[j] = T(0);
        } else if (g.beta != T(1)) {
            for (std::size_t j = 0; j < g.n; ++j) ci[j] *= g.beta;
        }
    }
}

// One register tile of C: the portable tile handles partial tiles itself;
// the SIMD tiles always compute a whole tile, so a partial one goes through
// a copy of C's live part (same operations, same rounding as a whole tile).
template <class T, class K>
void run_tile(std::size_t depth, const T* a_panel, const T* b_panel, T alpha, T* c, std::size_t ldc, std::size_t rows, std::size_t cols) noexcept {
    if constexpr (std::is_same_v<K, portable_kernel<T>>) {
        gemm_tile(depth, a_panel, b_panel, alpha, c, ldc, rows, cols);
    } else {
        if (rows == K::mr && cols == K::nr) {
            K::tile(depth, a_panel, b_panel, alpha, c, ldc);
            return;
        }
        alignas(64) T part[K::mr * K::nr] = {};
        for (std::size_t r = 0; r < rows; ++r)
            for (std::size_t col = 0; col < cols; ++col) part[r * K::nr + col] = c[r * ldc + col];
        K::tile(depth, a_panel, b_panel, alpha, part, K::nr);
        for (std::size_t r = 0; r < rows; ++r)
            for (std::size_t col = 0; col < cols; ++col) c[r * ldc + col] = part[r * K::nr + col];
    }
}

// The packed product of g (C already scaled by beta) with kernel K; false
// if the scratch could not grow.
template <class T, class K>
bool gemm_packed(const gemm_problem<T>& g, gemm_scratch<T>& scratch) noexcept {
    constexpr std::size_t mr = K::mr, nr = K::nr;
    const std::size_t kc = std::min(g.k, K::kc);
    const std::size_t mc = std::min(round_up(g.m, mr), K::mc);
    const std::size_t nc = std::min(round_up(g.n, nr), K::nc);
    if (!scratch.reserve(mc * kc, nc * kc)) return false;
    T* const packed_a = scratch.a_block.data();
    T* const packed_b = scratch.b_block.data();
    for (std::size_t j0 = 0; j0 < g.n; j0 += nc) {
        const std::size_t cols = std::min(nc, g.n - j0);
        for (std::size_t p0 = 0; p0 < g.k; p0 += kc) {
            const std::size_t depth = std::min(kc, g.k - p0);
            pack_b_block<nr>(g.b, g.ldb, g.transpose_b, p0, depth, j0, cols, packed_b);
            for (std::size_t i0 = 0; i0 < g.m; i0 += mc) {
                const std::size_t rows = std::min(mc, g.m - i0);
                pack_a_block<mr>(g.a, g.lda, g.transpose_a, i0, rows, p0, depth, packed_a);
                for (std::size_t jq = 0; jq < cols; jq += nr) {
                    const T* b_panel = packed_b + jq * depth;
                    const std::size_t tile_cols = std::min(nr, cols - jq);
                    for (std::size_t iq = 0; iq < rows; iq += mr) {
                        run_tile<T, K>(depth, packed_a + iq * depth, b_panel, g.alpha, g.c + (i0 + iq) * g.ldc + j0 + jq, g.ldc,
                                       std::min(mr, rows - iq), tile_cols);
                    }
                }
            }
        }
    }
    return true;
}

#if TENON_GEMM_BLAS
inline void blas_gemm(const gemm_problem<float>& g) noexcept {
    cblas_sgemm(CblasRowMajor, g.transpose_a ? CblasTrans : CblasNoTrans, g.transpose_b ? CblasTrans : CblasNoTrans, static_cast<int>(g.m),
                static_cast<int>(g.n), static_cast<int>(g.k), g.alpha, g.a, static_cast<int>(g.lda), g.b, static_cast<int>(g.ldb), g.beta, g.c,
                static_cast<int>(g.ldc));
}
inline void blas_gemm(const gemm_problem<double>& g) noexcept {
    cblas_dgemm(CblasRowMajor, g.transpose_a ? CblasTrans : CblasNoTrans, g.transpose_b ? CblasTrans : CblasNoTrans, static_cast<int>(g.m),
                static_cast<int>(g.n), static_cast<int>(g.k), g.alpha, g.a, static_cast<int>(g.lda), g.b, static_cast<int>(g.ldb), g.beta, g.c,
                static_cast<int>(g.ldc));
}
#endif

// Tile rows of the packed kernel of `path` (where a thin product begins).
template <class T>
std::size_t tile_rows(kernel_path path) noexcept {
#if TENON_GEMM_X86
    if (path == kernel_path::avx512) return avx512_kernel<T>::mr;
    if (path == kernel_path::avx2) return avx2_kernel<T>::mr;
#endif
#if TENON_SIMD_NEON
    if (path == kernel_path::neon) return neon_path_kernel<T>::mr;
#endif
    (void)path;
    return portable_kernel<T>::mr;
}
template <class T>
std::size_t tile_columns(kernel_path path) noexcept {
#if TENON_GEMM_X86
    if (path == kernel_path::avx512) return avx512_kernel<T>::nr;
    if (path == kernel_path::avx2) return avx2_kernel<T>::nr;
#endif
#if TENON_SIMD_NEON
    if (path == kernel_path::neon) return neon_path_kernel<T>::nr;
#endif
    (void)path;
    return portable_kernel<T>::nr;
}

// The whole product of g on the calling thread with `path`.
template <class T>
void gemm_band(const gemm_problem<T>& g, kernel_path path, gemm_scratch<T>& scratch) noexcept {
#if TENON_GEMM_BLAS
    if (path == kernel_path::blas) {
        blas_gemm(g);
        return;
    }
#endif
    scale_c(g);
    if (g.k == 0) return;
    bool packed = false;
    switch (path) {
#if TENON_GEMM_X86
    case kernel_path::avx512: packed = gemm_packed<T, avx512_kernel<T>>(g, scratch); break;
    case kernel_path::avx2: packed = gemm_packed<T, avx2_kernel<T>>(g, scratch); break;
#endif
#if TENON_SIMD_NEON
    case kernel_path::neon: packed = gemm_packed<T, neon_path_kernel<T>>(g, scratch); break;
#endif
    default: packed = gemm_packed<T, portable_kernel<T>>(g, scratch); break;
    }
    if (!packed) gemm_unpacked(g.transpose_a, g.transpose_b, g.m, g.n, g.k, g.alpha, g.a, g.lda, g.b, g.ldb, g.c, g.ldc);
}

// The path a product takes: the active one, but a built-in one where the
// BLAS cannot take the sizes (k = 0 or a size past int).
inline kernel_path product_path(std::size_t m, std::size_t n, std::size_t k, std::size_t lda, std::size_t ldb, std::size_t ldc) noexcept {
    kernel_path path = active_kernel_path();
    if (path == kernel_path::blas) {
        constexpr std::size_t limit = static_cast<std::size_t>(INT_MAX);
        if (k == 0 || m > limit || n > limit || k > limit || lda > limit || ldb > limit || ldc > limit) path = best_builtin_kernel_path();
    }
    return path;
}

// Whether an m x n product on `path` takes the unpacked loops (gemm_unpacked)
// rather than the packed tiles; core/small_dense.hpp relies on this choice.
template <class T>
bool is_thin_product(std::size_t m, std::size_t n, kernel_path path) noexcept {
    return m < tile_rows<T>(path) || n < thin_columns<T>;
}

// Products below this many multiply-adds run on one thread: handing out a
// task costs microseconds, more than a product of a few microseconds gains
// (on the 2-core development machine, 128 x 128 x 10 took 2.9 us on one
// thread and 6.8 us split in two; the 8-32-32-1 network's layers and the
// 784-256-128-10 network's 10-wide products stay below it).
inline constexpr std::size_t parallel_threshold = std::size_t(1) << 19;
inline constexpr std::size_t blas_band_unit = 16;
inline constexpr std::size_t cache_line = 64;

// Packing buffers for the bands of a split product, one per band index,
// owned by the calling thread. A band index always gets the same band of a
// given product, whichever thread runs it, so each buffer reaches its size
// in the first call and steady-state calls allocate nothing (per-thread
// buffers would grow whenever a thread first happened to draw a larger band).
template <class T>
struct gemm_band_scratch {
    std::vector<gemm_scratch<T>> bands;

    static gemm_band_scratch& for_this_thread() noexcept {
        static thread_local gemm_band_scratch scratch;
        return scratch;
    }
    bool reserve(std::size_t count) noexcept {
        if (bands.size() >= count) return true;
#if TENON_HAS_EXCEPTIONS
        try {
            bands.resize(count);
        } catch (const std::bad_alloc&) {
            return false;
        }
#else
        bands.resize(count);
#endif
        return true;
    }
};

// Elements from c to the next cache line when every row of C (stride ldc)
// starts at the same place in a line, and that is within the n columns;
// otherwise 0.
template <class T>
std::size_t line_offset(const T* c, std::size_t ldc, std::size_t n) noexcept {
    if ((ldc * sizeof(T)) % cache_line != 0) return 0;
    const std::size_t misalignment = static_cast<std::size_t>(reinterpret_cast<std::uintptr_t>(c) % cache_line);
    if (misalignment % sizeof(T) != 0) return 0;
    const std::size_t offset = (cache_line - misalignment) % cache_line / sizeof(T);
    return offset < n ? offset : 0;
}

template <class T>
struct gemm_split {
    const gemm_problem<T>* g;
    gemm_scratch<T>* scratch;
    kernel_path path;
    bool by_rows;
    // Band edges: multiples of unit; on the blas path, offset + the
    // multiple of unit nearest to an even split (the first band also takes
    // the offset's columns).
    std::size_t extent, unit, units, parts, offset;

    // The row bands of a split on `path` into at most `threads` parts of a
    // product with `rows` rows of C (g and scratch unset): the update rules
    // give each thread the rows of a weight whose gradient's rows that
    // thread computed.
    static gemm_split rows_of(std::size_t rows, kernel_path path, std::size_t threads) noexcept {
        gemm_split split{};
        split.path = path;
        split.by_rows = true;
        split.extent = rows;
        split.unit = path == kernel_path::blas ? blas_band_unit : tile_rows<T>(path);
        split.units = (rows + split.unit - 1) / split.unit;
        split.parts = std::min(threads, split.units);
        return split;
    }

    // The split of g into at most `threads` bands on `path`.
    // (rows_of is this split's bands of rows, the same edges by construction.)
    static gemm_split plan(const gemm_problem<T>& g, kernel_path path, std::size_t threads, gemm_scratch<T>* scratch) noexcept {
        gemm_split split{};
        if (g.m > g.n) {
            split = rows_of(g.m, path, threads);
        } else {
            split.path = path;
            split.by_rows = false;
            // A BLAS band is one BLAS call: its edges go on a grid of blas_band_unit
            // rows or columns (whole cache lines of C, a multiple of common BLAS tiles).
            split.unit = path == kernel_path::blas ? blas_band_unit : tile_columns<T>(path);
            // Bands of columns of a BLAS product start on a cache line of C where
            // every row allows it: two threads writing the two halves of one line
            // pass it back and forth, once per row (on the development machine
            // 128 x 256 x 128 took 47 us in two bands of C 16 bytes off a line and
            // 39 us on lines; 128 x 128 x 10 took 18 and 7 us). The built-in paths
            // keep their bands on the register-tile grid, so that results do not
            // depend on the thread count.
            split.offset = path == kernel_path::blas ? line_offset(g.c, g.ldc, g.n) : 0;
            split.extent = g.n;
            split.units = (split.extent - split.offset + split.unit - 1) / split.unit;
            split.parts = std::min(threads, split.units);
        }
        split.g = &g;
        split.scratch = scratch;
        return split;
    }
    std::size_t edge(std::size_t index) const noexcept {
        if (index == 0) return 0;
        if (index >= parts) return extent;
        if (path != kernel_path::blas) return std::min(extent, index * units / parts * unit);
        const std::size_t even = index * extent / parts;
        if (even <= offset) return std::min(extent, offset);
        return std::min(extent, offset + (even - offset + unit / 2) / unit * unit);
    }
    static void run_part(void* context, std::size_t index) {
        const gemm_split& s = *static_cast<const gemm_split*>(context);
        const std::size_t first = s.edge(index), last = s.edge(index + 1);
        if (first >= last) return;
        const gemm_problem<T> band =
            s.by_rows ? sub_problem(*s.g, first, last - first, 0, s.g->n) : sub_problem(*s.g, 0, s.g->m, first, last - first);
        gemm_band(band, s.path, s.scratch[index]);
    }
};

}  // namespace detail

/// C = alpha op(A) op(B) + beta C (see docs/design/gemm.md), split across
/// `workers` when given and the product is large enough.
template <class T>
void gemm(bool transpose_a, bool transpose_b, std::size_t m, std::size_t n, std::size_t k, T alpha, const T* a, std::size_t lda, const T* b,
          std::size_t ldb, T beta, T* c, std::size_t ldc, executor* workers) noexcept {
    if (m == 0 || n == 0) return;
    const detail::gemm_problem<T> g{transpose_a, transpose_b, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc};
    const kernel_path path = detail::product_path(m, n, k, lda, ldb, ldc);
    // Thin products take the plain loops on every path, the BLAS one
    // included: a call costs more than the arithmetic there, and single-row
    // predictions then give the same bits on every path.
    if (detail::is_thin_product<T>(m, n, path)) {
        detail::scale_c(g);
        if (k > 0) detail::gemm_unpacked(transpose_a, transpose_b, m, n, k, alpha, a, lda, b, ldb, c, ldc);
        return;
    }
    const std::size_t threads = workers ? workers->concurrency() : 1;
    if (threads <= 1 || m * n * k < detail::parallel_threshold) {
        detail::gemm_band(g, path, detail::gemm_scratch<T>::for_this_thread());
        return;
    }
    auto& bands = detail::gemm_band_scratch<T>::for_this_thread();
    if (!bands.reserve(threads)) {
        detail::gemm_band(g, path, detail::gemm_scratch<T>::for_this_thread());
        return;
    }
    detail::gemm_split<T> split = detail::gemm_split<T>::plan(g, path, threads, bands.bands.data());
    workers->run(split.parts, &detail::gemm_split<T>::run_part, &split);
}

namespace detail {

// Whether tenon's own forward products x W (C m x n, inner size k, no
// transposes) take two halves of k (gemm_inner_halves) on the active path:
// the BLAS path's products large enough to split, whatever the thread count
// (so the answer, and the bits, do not depend on it).
template <class T>
bool splits_inner(std::size_t m, std::size_t n, std::size_t k) noexcept {
    if (active_kernel_path() != kernel_path::blas) return false;
    constexpr std::size_t limit = static_cast<std::size_t>(INT_MAX);
    if (m > limit || n > limit || k > limit) return false;
    if (m < tile_rows<T>(kernel_path::blas) || n < thin_columns<T>) return false;
    return m * n * k >= parallel_threshold && k >= 2 * blas_band_unit;
}

template <class T>
struct inner_halves {
    const T* a;
    std::size_t lda;
    const T* b;
    std::size_t ldb;
    T* c;
    T* partial;
    std::size_t m, n, k, edge;

    static void run_part(void* context, std::size_t index) {
        const inner_halves& h = *static_cast<const inner_halves*>(context);
        const std::size_t first = index == 0 ? 0 : h.edge, last = index == 0 ? h.edge : h.k;
        const gemm_problem<T> g{
            false, false, h.m, h.n, last - first, T(1), h.a + first, h.lda, h.b + first * h.ldb, h.ldb, T(0), index == 0 ? h.c : h.partial, h.n};
        gemm_band(g, kernel_path::blas, gemm_scratch<T>::for_this_thread());
    }
};

// For splits_inner products: C = A[:, :e] B[:e, :] and P =
// A[:, e:] B[e:, :] (C and P m x n, dense rows), with e the edge the split
// of a product of k rows in two puts between its bands (the rows of B, a
// weight, whose gradient the first thread computes and whose update it
// runs). The two products run as tasks 0 and 1 of `workers`, or one after
// the other without; the caller adds P to C. On a machine whose cores pay
// for each line of a weight another core has read (the 2-core development
// machine: about five times the cost of writing its own line), the thread
// that updates rows of B is then the only one that read them.
template <class T>
void gemm_inner_halves(std::size_t m, std::size_t n, std::size_t k, const T* a, std::size_t lda, const T* b, std::size_t ldb, T* c, T* partial,
                       executor* workers) noexcept {
    inner_halves<T> h{a, lda, b, ldb, c, partial, m, n, k, gemm_split<T>::rows_of(k, kernel_path::blas, 2).edge(1)};
    if (workers && workers->concurrency() > 1) {
        workers->run(2, &inner_halves<T>::run_part, &h);
    } else {
        inner_halves<T>::run_part(&h, 0);
        inner_halves<T>::run_part(&h, 1);
    }
}

}  // namespace detail

/// C = alpha op(A) op(B) + beta C on the calling thread.
template <class T>
void gemm(bool transpose_a, bool transpose_b, std::size_t m, std::size_t n, std::size_t k, T alpha, const T* a, std::size_t lda, const T* b,
          std::size_t ldb, T beta, T* c, std::size_t ldc) noexcept {
    gemm<T>(transpose_a, transpose_b, m, n, k, alpha, a, lda, b, ldb, beta, c, ldc, nullptr);
}

TENON_NAMESPACE_END
