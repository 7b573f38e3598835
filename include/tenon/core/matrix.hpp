// tenon: the matrix type, shapes and shape checks.
//
// The main shape in tenon is a row-major batch x features matrix: row i is
// sample i, column j is feature j. It is an xtensor container, so hosts can
// use xtensor's expressions on it, but tenon's own hot paths work on the raw
// row-major buffer and never return unevaluated expressions.
#pragma once

#include <algorithm>
#include <cstddef>
#include <initializer_list>
#include <string>
#include <type_traits>

#include <xtensor/xtensor.hpp>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"

TENON_NAMESPACE_BEGIN

/// Scalar types tenon computes in.
template <class T>
inline constexpr bool is_scalar_v = std::is_same_v<T, float> || std::is_same_v<T, double>;

#define TENON_REQUIRE_SCALAR(T) static_assert(::tenon::is_scalar_v<T>, "tenon computes in float or double; use one of them as the scalar type")

/// Row-major batch x features matrix.
template <class T>
using matrix = xt::xtensor<T, 2, xt::layout_type::row_major>;

/// The shape of a matrix: rows x cols.
struct shape2 {
    std::size_t rows = 0;
    std::size_t cols = 0;

    std::size_t size() const noexcept { return rows * cols; }
    friend bool operator==(shape2 a, shape2 b) noexcept { return a.rows == b.rows && a.cols == b.cols; }
    friend bool operator!=(shape2 a, shape2 b) noexcept { return !(a == b); }
};

inline std::string to_string(shape2 s) { return std::to_string(s.rows) + "x" + std::to_string(s.cols); }

template <class T>
shape2 shape_of(const matrix<T>& m) noexcept {
    return shape2{m.shape()[0], m.shape()[1]};
}

/// Resizes m to rows x cols unless it already has that shape; a matrix that
/// keeps its shape keeps its buffer, so steady-state code does not allocate.
template <class T>
void ensure_shape(matrix<T>& m, shape2 s) {
    if (m.shape()[0] != s.rows || m.shape()[1] != s.cols) {
        // xtensor's resize() sets the new shape before it allocates; if the
        // allocation fails, the matrix would claim the new shape over its old
        // buffer, and the next call would see "same shape" and write past
        // it. Leave it empty instead (an empty matrix allocates nothing), so
        // the next call allocates again. (Without exceptions a failed
        // allocation ends the program, and there is nothing to repair.)
#if TENON_HAS_EXCEPTIONS
        try {
            m.resize({s.rows, s.cols});
        } catch (...) {
            m = matrix<T>();
            throw;
        }
#else
        m.resize({s.rows, s.cols});
#endif
    }
}

/// Copies src into dst, reusing dst's buffer when the shapes agree.
template <class T>
void copy_into(matrix<T>& dst, const matrix<T>& src) {
    ensure_shape(dst, shape_of(src));
    std::copy(src.data(), src.data() + src.size(), dst.data());
}

/// Throws core.shape.mismatch unless actual == expected. `what` names the
/// operand, e.g. "dense layer 'hidden1' input".
inline void require_shape(shape2 actual, shape2 expected, const std::string& what) {
    if (actual != expected) {
        raise(codes::core_shape_mismatch, what + ": expected shape " + to_string(expected) + ", got " + to_string(actual));
    }
}

/// Builds a matrix from nested initializer lists, checking that every row has
/// the same length (convenient in tests and examples).
template <class T>
matrix<T> make_matrix(std::initializer_list<std::initializer_list<T>> rows) {
    const std::size_t r = rows.size();
    const std::size_t c = r ? rows.begin()->size() : 0;
    matrix<T> m({r, c});
    std::size_t i = 0;
    for (const auto& row : rows) {
        if (row.size() != c) {
            raise(codes::core_shape_mismatch,
                  "make_matrix row " + std::to_string(i) + ": expected " + std::to_string(c) + " values, got " + std::to_string(row.size()));
        }
        std::copy(row.begin(), row.end(), m.data() + i * c);
        ++i;
    }
    return m;
}

TENON_NAMESPACE_END
