// tenon: gradient checking by central finite differences.
//
// For hosts that add their own operations or layers: compare the tape's
// analytic gradients with (f(x + h) - f(x - h)) / 2h for every element of
// every parameter, in double. The step is h = step * max(1, |x|); the default
// step is the cube root of double's machine epsilon, which balances the
// truncation error of the central difference against rounding (Nocedal &
// Wright, "Numerical Optimization", 2nd ed. 2006, section 8.1).
#pragma once

#include <algorithm>
#include <cmath>
#include <limits>
#include <string>
#include <vector>

#include "tenon/autodiff/operations.hpp"

TENON_NAMESPACE_BEGIN

struct gradient_check_options {
    double step = 6.0554544523933395e-06;  // cbrt(2^-52)
    /// Relative error is |analytic - numeric| / max(|analytic|, |numeric|, floor);
    /// the floor keeps gradients that are zero in exact arithmetic from
    /// turning rounding noise into a large relative error.
    double relative_floor = 1e-3;
};

struct gradient_check_entry {
    std::string name;  // parameter name
    double max_abs_error = 0.0;  // worst |analytic - numeric|
    double max_rel_error = 0.0;  // worst relative error (see options)
    std::size_t worst_index = 0;  // flat row-major index of the worst relative error
};

struct gradient_check_report {
    std::vector<gradient_check_entry> parameters;
    double max_abs_error = 0.0;
    double max_rel_error = 0.0;
};

/// Checks d(loss)/d(p) for every p in `params`. `build(tape)` records the
/// loss on the given (cleared) tape, tracking the parameters itself, and
/// returns a 1x1 value; it is called 1 + 2 * (number of elements) times.
template <class Build>
gradient_check_report check_gradients(const std::vector<parameter<double>*>& params, Build&& build, const gradient_check_options& options = {}) {
    tape<double> t;
    for (auto* p : params) p->clear_gradient();
    t.clear();
    t.backward(build(t));

    std::vector<matrix<double>> analytic;
    analytic.reserve(params.size());
    for (auto* p : params) analytic.push_back(p->grad());

    auto loss_at = [&]() {
        t.clear();
        const var<double> l = build(t);
        return l.value().data()[0];
    };

    gradient_check_report report;
    for (std::size_t pi = 0; pi < params.size(); ++pi) {
        parameter<double>& p = *params[pi];
        gradient_check_entry e;
        e.name = p.name();
        double* x = p.value().data();
        for (std::size_t k = 0; k < p.size(); ++k) {
            const double saved = x[k];
            const double h = options.step * std::max(1.0, std::abs(saved));
            x[k] = saved + h;
            const double up = loss_at();
            x[k] = saved - h;
            const double down = loss_at();
            x[k] = saved;
            const double numeric = (up - down) / (2.0 * h);
            const double a = analytic[pi].data()[k];
            const double abs_err = std::abs(a - numeric);
            const double rel_err = abs_err / std::max({std::abs(a), std::abs(numeric), options.relative_floor});
            e.max_abs_error = std::max(e.max_abs_error, abs_err);
            if (rel_err > e.max_rel_error || !(rel_err == rel_err)) {
                e.max_rel_error = (rel_err == rel_err) ? rel_err : std::numeric_limits<double>::infinity();
                e.worst_index = k;
            }
        }
        report.max_abs_error = std::max(report.max_abs_error, e.max_abs_error);
        report.max_rel_error = std::max(report.max_rel_error, e.max_rel_error);
        report.parameters.push_back(std::move(e));
    }
    return report;
}

TENON_NAMESPACE_END
