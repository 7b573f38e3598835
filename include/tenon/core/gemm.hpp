// tenon: general matrix multiply on row-major buffers.
//
// C = alpha * op(A) * op(B) + beta * C, where op(X) is X or its transpose,
// op(A) is m x k, op(B) is k x n and C is m x n; lda, ldb and ldc are the row
// strides of the stored matrices. With beta == 0, C is overwritten without
// being read, so uninitialised or non-finite contents of C do not leak into
// the result.
//
// Method: the blocked, packed scheme of Goto & van de Geijn 2008, "Anatomy of
// High-Performance Matrix Multiplication" (ACM TOMS 34(3), section 4 and
// figure 8). op(B) is copied block by block (kc x nc) into panels of
// `panel_columns` contiguous columns and op(A) (mc x kc) into panels of
// `panel_rows` contiguous rows; a small register tile of C
// (panel_rows x panel_columns) then accumulates kc rank-1 updates from two
// contiguous streams. Packing makes the four transpose cases one kernel: a
// transposed operand only changes the order in which the copy reads it, so
// op(B) = B^T (the case backpropagation uses for the input gradient) runs
// as fast as the plain product instead of as strided dot products. The tile
// loops have fixed trip counts, so the compiler vectorizes and unrolls them
// with whatever instruction set the host's flags allow; no intrinsics.
//
// Results differ from a naive triple loop only by rounding: each element of
// C sums the same products, in blocks of kc terms, then scales by alpha once.
//
// Memory: the packed blocks live in per-thread scratch buffers that grow to
// at most (mc + nc) * kc scalars and are reused, so steady-state calls do
// not allocate. If the scratch cannot grow (allocation failure), the product
// falls back to unpacked loops, which need no memory. Products with fewer
// than panel_rows rows or thin_columns columns take the unpacked loops too.
#pragma once

#include <algorithm>
#include <cstddef>
#include <new>
#include <vector>

#include "tenon/version.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {

// Blocking sizes (common practice, then measured): a tile of 4 rows x 32
// columns. Among 4 x 4, 4 x 8, 4 x 16 and 4 x 32 tiles it was the fastest
// (or within 10% of it) for float and double with both GCC 12 and Clang 14,
// with the default x86-64 flags (SSE2) and, for float, with -march=native;
// 16 columns fell into a slow, unvectorized path with GCC. See
// bench/bench_gemm.cpp. A packed A block (mc x kc, 64 KiB for float) stays
// in L2. Results with fewer than `thin_columns` columns or `panel_rows` rows
// skip the packing (see gemm_unpacked).
template <class T>
struct gemm_blocking {
    static constexpr std::size_t panel_rows = 4;
    static constexpr std::size_t panel_columns = 32;
    static constexpr std::size_t thin_columns = 32 / sizeof(T);
    static constexpr std::size_t kc = 256;
    static constexpr std::size_t mc = 64;
    static constexpr std::size_t nc = 512;
    static_assert(mc % panel_rows == 0 && nc % panel_columns == 0, "blocks hold whole panels");
};

// Element (row, col) of op(X) for a row-major X with row stride ld.
template <class T>
inline T op_element(const T* x, std::size_t ld, bool transposed, std::size_t row, std::size_t col) noexcept {
    return transposed ? x[col * ld + row] : x[row * ld + col];
}

// Packs rows [i0, i0 + rows) and depths [p0, p0 + depth) of op(A) into
// panels of panel_rows rows: panel q holds, for each depth p, the
// panel_rows values op(A)(i0 + q * panel_rows + r, p0 + p), zero-padded past
// the last row.
template <class T>
void pack_a_block(const T* a, std::size_t lda, bool transpose_a, std::size_t i0, std::size_t rows, std::size_t p0,
                  std::size_t depth, T* out) noexcept {
    constexpr std::size_t mr = gemm_blocking<T>::panel_rows;
    for (std::size_t q = 0; q < rows; q += mr) {
        const std::size_t live = std::min(mr, rows - q);
        T* panel = out + q * depth;
        if (!transpose_a) {
            for (std::size_t r = 0; r < mr; ++r) {
                if (r < live) {
                    const T* source = a + (i0 + q + r) * lda + p0;
                    for (std::size_t p = 0; p < depth; ++p) panel[p * mr + r] = source[p];
                } else {
                    for (std::size_t p = 0; p < depth; ++p) panel[p * mr + r] = T(0);
                }
            }
        } else {
            for (std::size_t p = 0; p < depth; ++p) {
                const T* source = a + (p0 + p) * lda + i0 + q;
                for (std::size_t r = 0; r < mr; ++r) panel[p * mr + r] = r < live ? source[r] : T(0);
            }
        }
    }
}

// Packs depths [p0, p0 + depth) and columns [j0, j0 + cols) of op(B) into
// panels of panel_columns columns: panel q holds, for each depth p, the
// panel_columns values op(B)(p0 + p, j0 + q * panel_columns + c),
// zero-padded past the last column.
template <class T>
void pack_b_block(const T* b, std::size_t ldb, bool transpose_b, std::size_t p0, std::size_t depth, std::size_t j0,
                  std::size_t cols, T* out) noexcept {
    constexpr std::size_t nr = gemm_blocking<T>::panel_columns;
    for (std::size_t q = 0; q < cols; q += nr) {
        const std::size_t live = std::min(nr, cols - q);
        T* panel = out + q * depth;
        if (!transpose_b) {
            for (std::size_t p = 0; p < depth; ++p) {
                const T* source = b + (p0 + p) * ldb + j0 + q;
                for (std::size_t c = 0; c < nr; ++c) panel[p * nr + c] = c < live ? source[c] : T(0);
            }
        } else {
            for (std::size_t c = 0; c < nr; ++c) {
                if (c < live) {
                    const T* source = b + (j0 + q + c) * ldb + p0;
                    for (std::size_t p = 0; p < depth; ++p) panel[p * nr + c] = source[p];
                } else {
                    for (std::size_t p = 0; p < depth; ++p) panel[p * nr + c] = T(0);
                }
            }
        }
    }
}

// C tile (rows x cols, at most panel_rows x panel_columns) += alpha * sum over
// depth of packed A panel (x) packed B panel.
template <class T>
void gemm_tile(std::size_t depth, const T* a_panel, const T* b_panel, T alpha, T* c, std::size_t ldc, std::size_t rows,
               std::size_t cols) noexcept {
    constexpr std::size_t mr = gemm_blocking<T>::panel_rows;
    constexpr std::size_t nr = gemm_blocking<T>::panel_columns;
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
T split_dot(const T* x, std::size_t incx, const T* y, std::size_t incy, std::size_t k) noexcept {
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

// The unpacked product, for results too thin to fill a register tile (fewer
// than panel_rows rows or thin_columns columns, such as a single row to
// predict or a single regression output), where packing would cost as much
// as the arithmetic; also the fallback when the scratch cannot grow.
template <class T>
void gemm_unpacked(bool transpose_a, bool transpose_b, std::size_t m, std::size_t n, std::size_t k, T alpha, const T* a,
                   std::size_t lda, const T* b, std::size_t ldb, T* c, std::size_t ldc) noexcept {
    if (!transpose_b && n >= gemm_blocking<T>::thin_columns) {
        // Few rows: each row of C accumulates scaled rows of B (contiguous).
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
#if defined(__cpp_exceptions) || defined(__EXCEPTIONS) || defined(_CPPUNWIND)
        try {
            if (a_block.size() < a_size) a_block.resize(a_size);
            if (b_block.size() < b_size) b_block.resize(b_size);
            return true;
        } catch (const std::bad_alloc&) {
            return false;
        }
#else
        // Built without exceptions (e.g. a host using deploy/'s try_ calls):
        // an allocation failure terminates instead of falling back.
        if (a_block.size() < a_size) a_block.resize(a_size);
        if (b_block.size() < b_size) b_block.resize(b_size);
        return true;
#endif
    }
};

inline std::size_t round_up(std::size_t value, std::size_t multiple) noexcept {
    return (value + multiple - 1) / multiple * multiple;
}

}  // namespace detail

template <class T>
void gemm(bool transpose_a, bool transpose_b, std::size_t m, std::size_t n, std::size_t k, T alpha,
          const T* a, std::size_t lda, const T* b, std::size_t ldb, T beta, T* c, std::size_t ldc) noexcept {
    for (std::size_t i = 0; i < m; ++i) {
        T* ci = c + i * ldc;
        if (beta == T(0)) {
            for (std::size_t j = 0; j < n; ++j) ci[j] = T(0);
        } else if (beta != T(1)) {
            for (std::size_t j = 0; j < n; ++j) ci[j] *= beta;
        }
    }
    if (m == 0 || n == 0 || k == 0) return;

    using blocking = detail::gemm_blocking<T>;
    constexpr std::size_t mr = blocking::panel_rows, nr = blocking::panel_columns;
    if (m < mr || n < blocking::thin_columns) {
        detail::gemm_unpacked(transpose_a, transpose_b, m, n, k, alpha, a, lda, b, ldb, c, ldc);
        return;
    }
    const std::size_t kc = std::min(k, blocking::kc);
    const std::size_t mc = std::min(detail::round_up(m, mr), blocking::mc);
    const std::size_t nc = std::min(detail::round_up(n, nr), blocking::nc);
    auto& scratch = detail::gemm_scratch<T>::for_this_thread();
    if (!scratch.reserve(mc * kc, nc * kc)) {
        detail::gemm_unpacked(transpose_a, transpose_b, m, n, k, alpha, a, lda, b, ldb, c, ldc);
        return;
    }
    T* const packed_a = scratch.a_block.data();
    T* const packed_b = scratch.b_block.data();

    for (std::size_t j0 = 0; j0 < n; j0 += nc) {
        const std::size_t cols = std::min(nc, n - j0);
        for (std::size_t p0 = 0; p0 < k; p0 += kc) {
            const std::size_t depth = std::min(kc, k - p0);
            detail::pack_b_block(b, ldb, transpose_b, p0, depth, j0, cols, packed_b);
            for (std::size_t i0 = 0; i0 < m; i0 += mc) {
                const std::size_t rows = std::min(mc, m - i0);
                detail::pack_a_block(a, lda, transpose_a, i0, rows, p0, depth, packed_a);
                for (std::size_t jq = 0; jq < cols; jq += nr) {
                    const T* b_panel = packed_b + jq * depth;
                    const std::size_t tile_cols = std::min(nr, cols - jq);
                    for (std::size_t iq = 0; iq < rows; iq += mr) {
                        detail::gemm_tile(depth, packed_a + iq * depth, b_panel, alpha, c + (i0 + iq) * ldc + j0 + jq, ldc,
                                          std::min(mr, rows - iq), tile_cols);
                    }
                }
            }
        }
    }
}

TENON_NAMESPACE_END
