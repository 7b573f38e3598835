// Shared data for the retraining and drift tests: the invented cooling-pump
// log of deploy_test_support.hpp, generated under conditions that can
// drift (the flow and head the pump runs at, the fluid mix).
#pragma once

#include <cmath>
#include <cstdint>
#include <sstream>
#include <string>
#include <vector>

#include <tenon/prep/csv.hpp>

#include "deploy_test_support.hpp"

namespace retrain_test {

struct pump_conditions {
    double flow_low = 20.0, flow_high = 120.0;  // m3/h
    double head_low = 5.0, head_high = 40.0;  // m
    double fluid_weights[3] = {1.0, 1.0, 1.0};  // water, glycol, brine
};

// The physics of pump_log.hpp under other operating conditions.
inline tenon::table pump_rows(std::size_t n, std::uint64_t seed, const pump_conditions& c = {}) {
    tenon::random_engine rng(seed, 0xD121u);
    std::ostringstream csv;
    csv.precision(17);
    csv << "flow,head,fluid,power,condition\n";
    const double total = c.fluid_weights[0] + c.fluid_weights[1] + c.fluid_weights[2];
    for (std::size_t i = 0; i < n; ++i) {
        const double flow = rng.uniform(c.flow_low, c.flow_high), head = rng.uniform(c.head_low, c.head_high);
        const double u = rng.uniform(0.0, total);
        const std::size_t f = u < c.fluid_weights[0] ? 0 : u < c.fluid_weights[0] + c.fluid_weights[1] ? 1 : 2;
        const double power = pump_log::power(flow, head, f, rng);
        csv << flow << "," << head << "," << pump_log::fluid_names[f] << "," << power << "," << pump_log::condition(flow, head) << "\n";
    }
    std::istringstream in(csv.str());
    return tenon::read_csv(in, {}, "pump.csv");
}

// The process after the drift: the pump runs faster and against a higher
// head, and mostly on brine.
inline pump_conditions drifted() {
    pump_conditions c;
    c.flow_low = 80.0;
    c.flow_high = 170.0;
    c.head_low = 20.0;
    c.head_high = 55.0;
    c.fluid_weights[0] = 0.1;
    c.fluid_weights[1] = 0.2;
    c.fluid_weights[2] = 0.7;
    return c;
}

inline std::vector<std::size_t> all_rows(const tenon::table& t) { return deploy_test::range(0, t.row_count()); }

}  // namespace retrain_test
