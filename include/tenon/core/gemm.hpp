// tenon: general matrix multiply on row-major buffers.
//
// C = alpha * op(A) * op(B) + beta * C, where op(X) is X or its transpose,
// op(A) is m x k, op(B) is k x n and C is m x n; lda, ldb and ldc are the row
// strides of the stored matrices. This is the portable reference kernel; the
// loop orders keep the innermost loop on contiguous memory so compilers can
// vectorize it. With beta == 0, C is overwritten without being read, so
// uninitialised or non-finite contents of C do not leak into the result.
#pragma once

#include <cstddef>

#include "tenon/version.hpp"

TENON_NAMESPACE_BEGIN

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

    if (!transpose_a && !transpose_b) {
        for (std::size_t i = 0; i < m; ++i) {
            T* ci = c + i * ldc;
            const T* ai = a + i * lda;
            for (std::size_t p = 0; p < k; ++p) {
                const T s = alpha * ai[p];
                const T* bp = b + p * ldb;
                for (std::size_t j = 0; j < n; ++j) ci[j] += s * bp[j];
            }
        }
    } else if (transpose_a && !transpose_b) {
        for (std::size_t p = 0; p < k; ++p) {
            const T* ap = a + p * lda;
            const T* bp = b + p * ldb;
            for (std::size_t i = 0; i < m; ++i) {
                const T s = alpha * ap[i];
                T* ci = c + i * ldc;
                for (std::size_t j = 0; j < n; ++j) ci[j] += s * bp[j];
            }
        }
    } else if (!transpose_a && transpose_b) {
        for (std::size_t i = 0; i < m; ++i) {
            const T* ai = a + i * lda;
            T* ci = c + i * ldc;
            for (std::size_t j = 0; j < n; ++j) {
                const T* bj = b + j * ldb;
                T acc = T(0);
                for (std::size_t p = 0; p < k; ++p) acc += ai[p] * bj[p];
                ci[j] += alpha * acc;
            }
        }
    } else {
        for (std::size_t i = 0; i < m; ++i) {
            T* ci = c + i * ldc;
            for (std::size_t j = 0; j < n; ++j) {
                const T* bj = b + j * ldb;
                T acc = T(0);
                for (std::size_t p = 0; p < k; ++p) acc += a[p * lda + i] * bj[p];
                ci[j] += alpha * acc;
            }
        }
    }
}

TENON_NAMESPACE_END
