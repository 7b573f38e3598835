// Quantiles of the chi-square distribution, computed here instead of quoted
// from tables. With a = k / 2 and z = x / 2 the survival function of
// chi-square with k degrees of freedom is the regularized upper incomplete
// gamma function Q(a, z). Integrating the incomplete gamma function by parts
// gives Q(a + 1, z) = Q(a, z) + z^a e^(-z) / Gamma(a + 1), and
// Q(1, z) = e^(-z), Q(1/2, z) = erfc(sqrt(z)), so for whole and half-whole a
// Q is a short finite sum of library functions (exp, erfc, lgamma). The
// quantile solves Q = upper_tail by bisection (Q falls as x grows).
#pragma once

#include <cmath>

namespace chi_square {

inline double survival(unsigned degrees, double x) {
    const double z = x / 2.0;
    const bool even = degrees % 2 == 0;
    double q = even ? std::exp(-z) : std::erfc(std::sqrt(z));
    for (double a = even ? 1.0 : 0.5; a < degrees / 2.0; a += 1.0) q += std::exp(a * std::log(z) - z - std::lgamma(a + 1.0));
    return q;
}

// The x with P(X > x) = upper_tail (e.g. 0.001 for the 0.999 quantile).
inline double upper_quantile(unsigned degrees, double upper_tail) {
    double low = 0.0, high = 1.0;
    while (survival(degrees, high) > upper_tail) high *= 2.0;
    for (int i = 0; i < 200; ++i) {
        const double middle = (low + high) / 2.0;
        (survival(degrees, middle) > upper_tail ? low : high) = middle;
    }
    return (low + high) / 2.0;
}

}  // namespace chi_square
