// tenon: the plain linear baseline a network has to beat.
//
// fit_least_squares fits y = x W + c on prepared rows by ridge regression
// (Hoerl & Kennard 1970, "Ridge Regression: Biased Estimation for
// Nonorthogonal Problems", eq. 2.2, on centred columns so the intercept is
// not shrunk): (Xc^T Xc + lambda n I) W = Xc^T Yc, c = mean(y) - mean(x) W,
// solved by a Cholesky factorization (Golub & Van Loan, "Matrix
// Computations", 4th ed., algorithm 4.2.1). A small lambda keeps the system
// solvable when columns repeat (one-hot groups, a constant column) and
// otherwise leaves the least-squares solution nearly unchanged.
#pragma once

#include <cmath>
#include <cstddef>
#include <string>
#include <vector>

#include "tenon/core/error.hpp"
#include "tenon/core/matrix.hpp"

TENON_NAMESPACE_BEGIN

/// y = x weights + intercept: weights is features x outputs (row-major).
/// With `class_scores` the outputs are a multinomial logistic regression's
/// class scores (probabilities through the softmax).
struct linear_fit {
    std::size_t features = 0, outputs = 0;
    bool class_scores = false;
    std::vector<double> weights;
    std::vector<double> intercept;

    /// Predictions for one row of `features` values into `out[0 .. outputs)`.
    template <class T>
    void predict_row(const T* x, double* out) const noexcept {
        for (std::size_t j = 0; j < outputs; ++j) out[j] = intercept[j];
        for (std::size_t k = 0; k < features; ++k) {
            const double v = static_cast<double>(x[k]);
            for (std::size_t j = 0; j < outputs; ++j) out[j] += v * weights[k * outputs + j];
        }
    }
};

/// Ridge least squares of `targets` (rows x outputs) on `features` (rows x
/// features); `ridge` is lambda per row (lambda n on the diagonal).
template <class T>
linear_fit fit_least_squares(const matrix<T>& features, const matrix<T>& targets, double ridge = 1e-4) {
    const std::size_t n = features.shape()[0], p = features.shape()[1], m = targets.shape()[1];
    if (n == 0 || targets.shape()[0] != n) {
        raise(codes::core_shape_mismatch,
              "fit_least_squares: " + std::to_string(n) + " feature rows and " + std::to_string(targets.shape()[0]) +
                  " target rows (needs the same count, at least 1)");
    }
    if (!(ridge > 0.0)) raise(codes::core_argument_invalid, "fit_least_squares: the ridge must be positive, got " + std::to_string(ridge));
    std::vector<double> mean_x(p, 0.0), mean_y(m, 0.0);
    for (std::size_t i = 0; i < n; ++i) {
        for (std::size_t k = 0; k < p; ++k) mean_x[k] += static_cast<double>(features(i, k));
        for (std::size_t j = 0; j < m; ++j) mean_y[j] += static_cast<double>(targets(i, j));
    }
    for (auto& v : mean_x) v /= static_cast<double>(n);
    for (auto& v : mean_y) v /= static_cast<double>(n);
    std::vector<double> a(p * p, 0.0), b(p * m, 0.0), xc(p);
    for (std::size_t i = 0; i < n; ++i) {
        for (std::size_t k = 0; k < p; ++k) xc[k] = static_cast<double>(features(i, k)) - mean_x[k];
        for (std::size_t k = 0; k < p; ++k) {
            for (std::size_t l = 0; l <= k; ++l) a[k * p + l] += xc[k] * xc[l];
            for (std::size_t j = 0; j < m; ++j) b[k * m + j] += xc[k] * (static_cast<double>(targets(i, j)) - mean_y[j]);
        }
    }
    // Scale the ridge by the mean diagonal, so it means the same for any feature units.
    double trace = 0.0;
    for (std::size_t k = 0; k < p; ++k) trace += a[k * p + k];
    const double shift = ridge * (trace > 0.0 ? trace / static_cast<double>(p) : static_cast<double>(n));
    for (std::size_t k = 0; k < p; ++k) a[k * p + k] += shift;
    // Cholesky: a = L L^T in the lower triangle.
    for (std::size_t k = 0; k < p; ++k) {
        double d = a[k * p + k];
        for (std::size_t l = 0; l < k; ++l) d -= a[k * p + l] * a[k * p + l];
        if (!(d > 0.0))
            raise(codes::core_argument_invalid, "fit_least_squares: the features' cross-products are not positive definite (non-finite values?)");
        a[k * p + k] = std::sqrt(d);
        for (std::size_t r = k + 1; r < p; ++r) {
            double v = a[r * p + k];
            for (std::size_t l = 0; l < k; ++l) v -= a[r * p + l] * a[k * p + l];
            a[r * p + k] = v / a[k * p + k];
        }
    }
    linear_fit fit;
    fit.features = p;
    fit.outputs = m;
    fit.weights.assign(p * m, 0.0);
    fit.intercept = mean_y;
    for (std::size_t j = 0; j < m; ++j) {
        std::vector<double> z(p);
        for (std::size_t k = 0; k < p; ++k) {  // L z = b
            double v = b[k * m + j];
            for (std::size_t l = 0; l < k; ++l) v -= a[k * p + l] * z[l];
            z[k] = v / a[k * p + k];
        }
        for (std::size_t k = p; k-- > 0;) {  // L^T w = z
            double v = z[k];
            for (std::size_t l = k + 1; l < p; ++l) v -= a[l * p + k] * fit.weights[l * m + j];
            fit.weights[k * m + j] = v / a[k * p + k];
        }
        for (std::size_t k = 0; k < p; ++k) fit.intercept[j] -= mean_x[k] * fit.weights[k * m + j];
    }
    return fit;
}

TENON_NAMESPACE_END
