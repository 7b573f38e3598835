// Shared data for the deploy/ tests: an invented cooling-pump log.
#pragma once

#include <cmath>
#include <cstdint>
#include <cstring>
#include <sstream>
#include <string>
#include <vector>

#include <tenon/deploy/model_file.hpp>
#include <tenon/prep/csv.hpp>
#include <tenon/train/workflow.hpp>

#include "pump_log.hpp"

namespace deploy_test {

// The pump log of pump_log.hpp, every column.
inline tenon::table pump_table(std::size_t n, std::uint64_t seed) {
    tenon::random_engine rng(seed);
    std::ostringstream csv;
    csv << "flow,head,fluid,power,condition\n";
    for (std::size_t i = 0; i < n; ++i) {
        const pump_log::reading r = pump_log::draw(rng);
        csv << r.flow << "," << r.head << "," << r.fluid_name() << "," << r.power << "," << r.condition() << "\n";
    }
    std::istringstream in(csv.str());
    return tenon::read_csv(in, {}, "pump.csv");
}

inline std::vector<std::size_t> range(std::size_t begin, std::size_t end) {
    std::vector<std::size_t> r;
    for (std::size_t i = begin; i < end; ++i) r.push_back(i);
    return r;
}

// Strict steps: a missing cell or an unseen category is refused, which the
// deploy tests exercise (the plan's defaults would fill and encode them).
inline tenon::plan condition_plan() {
    tenon::plan p;
    p.set_default_steps(tenon::strict_feature_steps());
    p.set_target("condition", tenon::target_kind::classification);
    p.set_role("power", tenon::column_role::ignored);
    return p;
}

inline tenon::plan power_plan() {
    tenon::plan p;
    p.set_default_steps(tenon::strict_feature_steps());
    p.set_target("power", tenon::target_kind::regression);
    p.set_role("condition", tenon::column_role::ignored);
    return p;
}

inline tenon::model_settings small_settings(std::uint64_t seed = 7) {
    tenon::model_settings s;
    s.hidden = {8, 8};
    s.epochs = 4;
    s.batch_size = 16;
    s.learning_rate = 0.01;
    s.seed = seed;
    return s;
}

template <class T>
bool same_bits(T a, T b) {
    return std::memcmp(&a, &b, sizeof(T)) == 0;
}

}  // namespace deploy_test
