// tenon: one preparation plan measured over the ranks' shards of the rows.
//
// When every rank holds only its own shard of the training rows, each
// measures the plan on its shard and the statistics are merged (moments by
// the pairwise formulas of Chan, Golub & LeVeque 1979; category sets by
// union; quantiles and modes exactly, from the gathered values), so every
// rank gets the plan a single process would measure on all rows. Ranks whose
// tables differ in columns or kinds raise distributed.plan.mismatch. What is
// merged how, and its memory: docs/design/distributed.md.
#pragma once

#include <algorithm>
#include <cstddef>
#include <cstdint>
#include <cstring>
#include <string>
#include <utility>
#include <vector>

#include "tenon/core/bytes.hpp"
#include "tenon/distributed/communicator.hpp"
#include "tenon/prep/plan.hpp"
#include "tenon/prep/statistics.hpp"

TENON_NAMESPACE_BEGIN

/// statistics_exchange over the ranks of a communicator.
class mpi_statistics_exchange final : public statistics_exchange {
public:
    explicit mpi_statistics_exchange(communicator& c) : comm_(c) {}

    void sum_counts(std::vector<std::uint64_t>& counts) override { comm_.sum(counts.data(), counts.size()); }

    running_moments merge_moments(const running_moments& local) override {
        const double mine[5] = {static_cast<double>(local.count), local.mean, local.squared_deviations, local.minimum, local.maximum};
        const auto all = comm_.gather_all(bytes_of(mine, 5));
        running_moments merged;
        for (const auto& b : all) {
            double v[5];
            std::memcpy(v, b.data(), sizeof v);
            running_moments part;
            part.count = static_cast<std::size_t>(v[0]);
            part.mean = v[1];
            part.squared_deviations = v[2];
            part.minimum = v[3];
            part.maximum = v[4];
            merged.merge(part);  // rank order: the same result on every rank
        }
        return merged;
    }

    std::vector<double> gather_values(const std::vector<double>& local) override {
        std::vector<double> out;
        for (const auto& b : comm_.gather_all(bytes_of(local.data(), local.size()))) {
            const std::size_t n = b.size() / sizeof(double);
            const std::size_t at = out.size();
            out.resize(at + n);
            if (n > 0) std::memcpy(out.data() + at, b.data(), n * sizeof(double));
        }
        return out;
    }

    std::vector<std::pair<std::string, std::uint64_t>> merge_named_counts(const std::vector<std::pair<std::string, std::uint64_t>>& local) override {
        std::vector<std::uint8_t> mine;
        byte_writer w(mine);
        w.u64(local.size());
        for (const auto& kv : local) {
            w.text(kv.first);
            w.u64(kv.second);
        }
        std::vector<std::pair<std::string, std::uint64_t>> all;
        for (const auto& b : comm_.gather_all(mine)) {
            byte_reader r(b.data(), b.size(), "merged names");
            const std::uint64_t n = r.u64();
            for (std::uint64_t k = 0; k < n; ++k) {
                std::string name = r.text();
                all.emplace_back(std::move(name), r.u64());
            }
        }
        std::sort(all.begin(), all.end());
        std::vector<std::pair<std::string, std::uint64_t>> out;
        for (auto& kv : all) {
            if (!out.empty() && out.back().first == kv.first)
                out.back().second += kv.second;
            else
                out.push_back(std::move(kv));
        }
        return out;
    }

private:
    static std::vector<std::uint8_t> bytes_of(const double* v, std::size_t n) {
        std::vector<std::uint8_t> b(n * sizeof(double));
        if (n > 0) std::memcpy(b.data(), v, b.size());
        return b;
    }
    communicator& comm_;
};

/// `preparation` measured on every rank's `rows` of its own `t` together (see
/// docs/design/distributed.md); collective, the same plan on every rank.
inline measured_plan measure_plan_across(const plan& preparation, const table& t, const std::vector<std::size_t>& rows, communicator& c) {
    mpi_statistics_exchange exchange(c);
    require_same_columns(t, exchange, "measure_plan_across");  // same columns, same kinds, on every rank
    return preparation.measure(t, rows, &exchange);
}

TENON_NAMESPACE_END
