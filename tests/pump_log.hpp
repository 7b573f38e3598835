// The invented cooling-pump log several test files train on: flow [m3/h],
// head [m], fluid, motor power [kW] = flow * head * density / (367
// efficiency) + noise, and a condition class from the efficiency and the
// head (an invented rule). One place for the physics; each test writes the
// columns it needs.
#pragma once

#include <cmath>
#include <cstddef>

#include <tenon/core/random.hpp>

namespace pump_log {

inline constexpr const char* fluid_names[] = {"water", "glycol", "brine"};
inline constexpr double fluid_density[] = {1.0, 1.07, 1.2};

inline double efficiency(double flow) { return 0.55 + 0.25 * std::exp(-std::pow((flow - 70.0) / 40.0, 2)); }
inline const char* condition(double flow, double head) { return efficiency(flow) < 0.62 ? "worn" : (head > 30.0 ? "cavitating" : "ok"); }
/// Motor power with measurement noise N(0, 0.05) drawn from `rng`.
inline double power(double flow, double head, std::size_t fluid, tenon::random_engine& rng) {
    return flow * head * fluid_density[fluid] / (367.0 * efficiency(flow)) + rng.normal(0.0, 0.05);
}

struct reading {
    double flow = 0, head = 0, power = 0;
    std::size_t fluid = 0;
    const char* fluid_name() const { return fluid_names[fluid]; }
    const char* condition() const { return pump_log::condition(flow, head); }
};

/// One reading of the standard plant: flow 20-120, head 5-40, any fluid.
inline reading draw(tenon::random_engine& rng) {
    reading r;
    r.flow = rng.uniform(20.0, 120.0);
    r.head = rng.uniform(5.0, 40.0);
    r.fluid = static_cast<std::size_t>(rng.below(3));
    r.power = power(r.flow, r.head, r.fluid, rng);
    return r;
}

}  // namespace pump_log
