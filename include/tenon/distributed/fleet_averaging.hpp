// tenon: fleet averaging of models retrained on many devices.
//
// Devices that retrain a deployed model locally send their weights and sample
// counts as bytes; a coordinator forms the sample-weighted average (federated
// averaging, McMahan et al. 2017, "Communication-Efficient Learning of Deep
// Networks from Decentralized Data", Algorithm 1) and passes it through the
// same promotion gate as a local retraining (gate_fleet_average). Damaged or
// mismatched contributions are refused with their reason, never averaged.
// Bytes in, bytes out: no MPI needed. Usage, refusal rules and the
// contribution layout: docs/design/distributed.md.
#pragma once

#include <cmath>
#include <cstddef>
#include <cstdint>
#include <string>
#include <utility>
#include <vector>

#include "tenon/core/bytes.hpp"
#include "tenon/format/checksum.hpp"
#include "tenon/format/model_file.hpp"
#include "tenon/train/authoring.hpp"
#include "tenon/train/retraining.hpp"

TENON_NAMESPACE_BEGIN

inline constexpr std::uint16_t fleet_contribution_version = 1;

/// FNV-1a 64 of a model's serialized architecture.
template <class T>
std::uint64_t architecture_fingerprint(const model_file<T>& m) {
    const std::vector<std::uint8_t> bytes = to_bytes(m.architecture);
    fnv1a_64 h;
    h.add(bytes.data(), bytes.size());
    return h.value();
}

/// FNV-1a 64 of a model's serialized measured plan (0 when it has none).
template <class T>
std::uint64_t plan_fingerprint(const model_file<T>& m) {
    if (!m.plan) return 0;
    const std::vector<std::uint8_t> bytes = m.plan->to_bytes();
    fnv1a_64 h;
    h.add(bytes.data(), bytes.size());
    return h.value();
}

/// What a device sends: its retrained model file and the number of samples
/// it trained on (the weight of its weights in the average).
template <class T>
std::vector<std::uint8_t> fleet_contribution_bytes(const model_file<T>& retrained, std::uint64_t samples) {
    const std::vector<std::uint8_t> model = model_file_to_bytes(retrained);
    std::vector<std::uint8_t> out = {'T', 'N', 'F', 'C'};
    byte_writer w(out);
    w.u16(fleet_contribution_version);
    w.u16(0);
    w.u64(samples);
    w.u64(architecture_fingerprint(retrained));
    w.u64(plan_fingerprint(retrained));
    w.u64(model.size());
    out.insert(out.end(), model.begin(), model.end());
    w.u32(crc32(out.data(), out.size()));
    return out;
}

/// A contribution's header and model, as read.
template <class T>
struct fleet_contribution {
    std::uint64_t samples = 0;
    std::uint64_t architecture_fingerprint = 0;
    std::uint64_t plan_fingerprint = 0;
    model_file<T> model;
};

/// Reads a contribution; raises distributed.fleet.bad_bytes when the
/// envelope is damaged and the model file's own deploy.model.* codes when
/// the file inside is.
template <class T>
fleet_contribution<T> read_fleet_contribution(const std::vector<std::uint8_t>& bytes, const model_limits& limits = {}) {
    constexpr std::size_t header = 4 + 2 + 2 + 8 + 8 + 8 + 8, trailer = 4;
    const auto fail = [&](const std::string& what) {
        raise(codes::distributed_fleet_bad_bytes, "fleet contribution (" + std::to_string(bytes.size()) + " bytes): " + what);
    };
    if (bytes.size() < header + trailer) fail("shorter than its " + std::to_string(header + trailer) + "-byte envelope");
    if (bytes[0] != 'T' || bytes[1] != 'N' || bytes[2] != 'F' || bytes[3] != 'C') fail("does not start with the magic 'TNFC'");
    const std::uint32_t stored = detail::get_u32(bytes.data() + bytes.size() - trailer);
    if (crc32(bytes.data(), bytes.size() - trailer) != stored) fail("the CRC-32 does not match (damaged in transit)");
    const std::uint16_t version = detail::get_u16(bytes.data() + 4);
    if (version != fleet_contribution_version)
        fail("version " + std::to_string(version) + " is not supported (this build reads " + std::to_string(fleet_contribution_version) + ")");
    fleet_contribution<T> c;
    c.samples = detail::get_u64(bytes.data() + 8);
    c.architecture_fingerprint = detail::get_u64(bytes.data() + 16);
    c.plan_fingerprint = detail::get_u64(bytes.data() + 24);
    const std::uint64_t length = detail::get_u64(bytes.data() + 32);
    if (length != bytes.size() - header - trailer)
        fail("names a model of " + std::to_string(length) + " bytes, " + std::to_string(bytes.size() - header - trailer) + " follow");
    c.model = model_file_from_bytes<T>(bytes.data() + header, static_cast<std::size_t>(length), limits, "fleet contribution");
    return c;
}

namespace detail {
// Every weight tensor of a file: the first network's, then each other
// ensemble member's (section ENSM), in that order.
template <class File>
auto weight_tensors(File& f) {
    std::vector<decltype(&f.weights.front())> all;
    for (auto& w : f.weights) all.push_back(&w);
    for (auto& member : f.members)
        for (auto& w : member) all.push_back(&w);
    return all;
}
}  // namespace detail

/// A contribution left out of the average, and why.
struct fleet_refusal {
    std::size_t index = 0;  // position in the list given to average_fleet
    std::string reason;
};

template <class T>
struct fleet_average_result {
    /// The incumbent's file with the averaged weights (parameters and state
    /// buffers; every member of a seed ensemble, each averaged with the same
    /// member of the others), its plan, references and replay sample; no
    /// resume state.
    model_file<T> model;
    std::uint64_t samples = 0;  // over the accepted contributions
    std::vector<std::size_t> accepted;  // positions in the given list
    std::vector<fleet_refusal> refused;
};

/// The sample-weighted average of the accepted contributions' weights
/// (sums in double, in list order). Raises distributed.fleet.no_contribution
/// when none is accepted.
template <class T>
fleet_average_result<T> average_fleet(const model_file<T>& incumbent, const std::vector<std::vector<std::uint8_t>>& contributions,
                                      const model_limits& limits = {}) {
    const std::uint64_t arch = architecture_fingerprint(incumbent), plan = plan_fingerprint(incumbent);
    const std::vector<std::uint8_t> arch_bytes = to_bytes(incumbent.architecture);
    const std::vector<std::uint8_t> plan_bytes = incumbent.plan ? incumbent.plan->to_bytes() : std::vector<std::uint8_t>{};
    fleet_average_result<T> r;
    const auto incumbent_tensors = detail::weight_tensors(incumbent);
    std::vector<std::vector<double>> sums(incumbent_tensors.size());
    for (std::size_t w = 0; w < sums.size(); ++w) sums[w].assign(incumbent_tensors[w]->values.size(), 0.0);
    std::vector<std::pair<std::uint64_t, model_file<T>>> kept;
    for (std::size_t k = 0; k < contributions.size(); ++k) {
        const auto refuse = [&](std::string why) { r.refused.push_back({k, std::move(why)}); };
        fleet_contribution<T> c;
        try {
            c = read_fleet_contribution<T>(contributions[k], limits);
        } catch (const error& e) {
            refuse(e.what());
            continue;
        }
        if (c.samples == 0) {
            refuse("it claims no samples");
            continue;
        }
        if (c.architecture_fingerprint != arch || architecture_fingerprint(c.model) != arch || to_bytes(c.model.architecture) != arch_bytes) {
            refuse("its architecture differs from the incumbent's (fingerprint " + std::to_string(architecture_fingerprint(c.model)) + ", expected " +
                   std::to_string(arch) + ")");
            continue;
        }
        const std::vector<std::uint8_t> its_plan = c.model.plan ? c.model.plan->to_bytes() : std::vector<std::uint8_t>{};
        if (c.plan_fingerprint != plan || plan_fingerprint(c.model) != plan || its_plan != plan_bytes) {
            refuse("its preparation plan differs from the incumbent's (fingerprint " + std::to_string(plan_fingerprint(c.model)) + ", expected " +
                   std::to_string(plan) + ")");
            continue;
        }
        if (c.model.members.size() != incumbent.members.size()) {
            refuse("it holds " + std::to_string(c.model.members.size() + 1) + " network(s), the incumbent " +
                   std::to_string(incumbent.members.size() + 1));
            continue;
        }
        const auto its_tensors = detail::weight_tensors(c.model);
        bool fits = its_tensors.size() == incumbent_tensors.size(), finite = true;
        for (std::size_t w = 0; fits && w < incumbent_tensors.size(); ++w) {
            const auto& mine = *its_tensors[w];
            fits = mine.name == incumbent_tensors[w]->name && shape_of(mine.values) == shape_of(incumbent_tensors[w]->values);
            for (std::size_t i = 0; fits && finite && i < mine.values.size(); ++i) finite = std::isfinite(mine.values.data()[i]);
        }
        if (!fits) {
            refuse("its weights do not fit the architecture");
            continue;
        }
        if (!finite) {
            refuse("a weight is not finite");
            continue;
        }
        r.accepted.push_back(k);
        r.samples += c.samples;
        kept.emplace_back(c.samples, std::move(c.model));
    }
    if (kept.empty())
        raise(codes::distributed_fleet_no_contribution,
              "average_fleet: none of the " + std::to_string(contributions.size()) + " contributions was accepted" +
                  (r.refused.empty() ? std::string() : " (first refusal: " + r.refused.front().reason + ")"));
    const double total = static_cast<double>(r.samples);
    for (const auto& [samples, m] : kept) {
        const double share = static_cast<double>(samples) / total;
        const auto tensors = detail::weight_tensors(m);
        for (std::size_t w = 0; w < sums.size(); ++w) {
            const T* v = tensors[w]->values.data();
            for (std::size_t i = 0; i < sums[w].size(); ++i) sums[w][i] += share * static_cast<double>(v[i]);
        }
    }
    r.model = incumbent;
    r.model.resume.reset();
    const auto averaged = detail::weight_tensors(r.model);
    for (std::size_t w = 0; w < sums.size(); ++w) {
        T* v = averaged[w]->values.data();
        for (std::size_t i = 0; i < sums[w].size(); ++i) v[i] = static_cast<T>(sums[w][i]);
    }
    if (r.model.metadata) {
        auto& meta = *r.model.metadata;
        const auto set_metric = [&](const std::string& key, double v) {
            for (auto& kv : meta.metrics)
                if (kv.first == key) {
                    kv.second = v;
                    return;
                }
            meta.metrics.emplace_back(key, v);
        };
        set_metric("fleet_contributions", static_cast<double>(kept.size()));
        set_metric("fleet_samples", total);
    }
    return r;
}

/// The promotion gate's verdict on a fleet average against the incumbent.
struct fleet_gate_report {
    gate_decision decision;
    std::string metric;
    double incumbent_score = 0.0;
    double candidate_score = 0.0;
    std::size_t holdout_rows = 0;
};

/// Scores incumbent and averaged model on `holdout` (raw rows with the
/// plan's columns and target; rows with a missing target are left out) with
/// the retraining gate's metric and rule (decide_promotion).
template <class T>
fleet_gate_report gate_fleet_average(const model_file<T>& incumbent, const model_file<T>& averaged, const table& holdout,
                                     gate_metric metric = gate_metric::automatic, double margin = 0.0) {
    if (!incumbent.plan || !incumbent.plan->has_target())
        raise(codes::deploy_model_missing_section, "gate_fleet_average: the incumbent has no preparation plan with a target");
    const measured_plan& plan = *incumbent.plan;
    const bool classify = plan.target_type() == target_kind::classification;
    if (metric == gate_metric::automatic) metric = classify ? gate_metric::accuracy : gate_metric::rmse;
    if (classify == (metric == gate_metric::rmse))
        raise(codes::deploy_retrain_option,
              std::string("gate_fleet_average: the metric ") + gate_metric_name(metric) + " does not fit a " +
                  (classify ? "classification" : "regression") + " target");
    const prepared_rows<T> rows = plan.template apply<T>(holdout, all_rows(holdout.row_count()));
    if (rows.rows.empty()) raise(codes::deploy_retrain_too_few_rows, "gate_fleet_average: the holdout has no row with a target");
    // A seed ensemble is scored on its members' mean, as the retraining gate scores it.
    const std::vector<network<T>> a = detail::networks_of(incumbent), b = detail::networks_of(averaged);
    fleet_gate_report g;
    g.metric = gate_metric_name(metric);
    g.holdout_rows = rows.rows.size();
    g.incumbent_score = detail::gate_score(a, plan, rows, metric);
    g.candidate_score = detail::gate_score(b, plan, rows, metric);
    g.decision = decide_promotion(metric, g.incumbent_score, g.candidate_score, margin);
    return g;
}

TENON_NAMESPACE_END
