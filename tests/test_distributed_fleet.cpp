// Tests of distributed/fleet_averaging.hpp: every rank plays a device that
// retrains the deployed pump model on its own new rows and sends its
// contribution's bytes over MPI to rank 0, the coordinator.
#include <doctest/doctest.h>

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <string>
#include <vector>

#include <tenon/deploy/retraining.hpp>
#include <tenon/distributed/communicator.hpp>
#include <tenon/distributed/fleet_averaging.hpp>

#include "retraining_test_support.hpp"

namespace {

using deploy_test::range;

tenon::communicator& fleet_world() {
    static tenon::communicator c;
    return c;
}

std::string code_of(const std::function<void()>& f) {
    try {
        f();
    } catch (const tenon::error& e) {
        return e.code();
    }
    return "no error";
}

// The deployed model: the pump's condition, trained briefly (one epoch) on
// 200 rows, so that the fleet's retraining has something to add.
tenon::model_file<float> incumbent_model(std::size_t hidden = 8) {
    const tenon::table t = retrain_test::pump_rows(200, 11);
    tenon::model_settings s = deploy_test::small_settings(3);
    s.hidden = {hidden, hidden};
    s.epochs = 1;
    s.learning_rate = 0.001;
    auto fitted = tenon::fit_model<float>(t, deploy_test::condition_plan(), range(0, 160), range(160, 200), s);
    tenon::model_file_options o;
    o.replay_rows = 64;
    o.created_unix_seconds = 1700000000;
    return tenon::make_model_file(fitted, t, range(0, 160), s, o);
}

}  // namespace

TEST_CASE("fleet averaging over MPI: the sample-weighted mean of the devices' weights, gated like a retraining") {
    tenon::communicator& world = fleet_world();
    const tenon::model_file<float> incumbent = incumbent_model();
    // Each device collects its own rows (another seed per rank) and a
    // different number of them, so the sample weights matter.
    const std::size_t rows = 120 + 60 * world.rank();
    const tenon::table mine = retrain_test::pump_rows(rows, 100 + world.rank());
    tenon::retraining_options o;
    o.epochs = 15;
    o.seed = 5 + world.rank();
    o.created_unix_seconds = 1700000100;
    const auto retrained = tenon::retrain_model(incumbent, mine, o);
    const std::uint64_t samples = retrained.report.training_rows;
    CHECK(samples > 0);
    const auto gathered = world.gather_at(tenon::fleet_contribution_bytes(retrained.candidate, samples), 0);
    if (world.rank() != 0) return;

    REQUIRE(gathered.size() == world.size());
    std::vector<std::vector<std::uint8_t>> received = gathered;
    // Three more that must be refused: another architecture, another plan, damaged bytes.
    const auto other_architecture = incumbent_model(6);
    received.push_back(tenon::fleet_contribution_bytes(other_architecture, 50));
    auto other_plan = retrained.candidate;
    {
        const tenon::table t = retrain_test::pump_rows(200, 12);  // other rows: other scalings
        auto fitted = tenon::fit_model<float>(t, deploy_test::condition_plan(), range(0, 160), range(160, 200), deploy_test::small_settings(3));
        other_plan.plan.emplace(fitted.plan);
    }
    received.push_back(tenon::fleet_contribution_bytes(other_plan, 50));
    auto damaged = gathered.front();
    damaged[damaged.size() / 2] ^= 0x40;
    received.push_back(damaged);

    const auto avg = tenon::average_fleet(incumbent, received);
    REQUIRE(avg.accepted.size() == world.size());
    REQUIRE(avg.refused.size() == 3);
    CHECK(avg.refused[0].index == world.size());
    CHECK(avg.refused[0].reason.find("architecture") != std::string::npos);
    CHECK(avg.refused[1].reason.find("plan") != std::string::npos);
    CHECK(avg.refused[2].reason.find("distributed.fleet.bad_bytes") != std::string::npos);

    // McMahan et al. 2017, Algorithm 1: w = sum_k n_k / n w_k, checked on
    // every weight against the contributions read back one by one.
    std::vector<tenon::fleet_contribution<float>> parts;
    std::uint64_t total = 0;
    for (const auto& b : gathered) {
        parts.push_back(tenon::read_fleet_contribution<float>(b));
        total += parts.back().samples;
    }
    CHECK(avg.samples == total);
    double worst = 0.0;
    for (std::size_t w = 0; w < incumbent.weights.size(); ++w) {
        for (std::size_t i = 0; i < incumbent.weights[w].values.size(); ++i) {
            double expected = 0.0;
            for (const auto& p : parts) expected += static_cast<double>(p.samples) * static_cast<double>(p.model.weights[w].values.data()[i]);
            expected /= static_cast<double>(total);
            worst = std::max(worst, std::abs(expected - static_cast<double>(avg.model.weights[w].values.data()[i])));
        }
    }
    CHECK(worst < 1e-6);
    CHECK(avg.model.metadata->metric("fleet_samples") == doctest::Approx(static_cast<double>(total)));
    CHECK_FALSE(avg.model.resume.has_value());

    // The gate: scored on rows none of the devices trained on.
    const tenon::table holdout = retrain_test::pump_rows(300, 999);
    const auto verdict = tenon::gate_fleet_average(incumbent, avg.model, holdout);
    CHECK(verdict.metric == "accuracy");
    CHECK(verdict.holdout_rows == 300);
    CHECK(verdict.decision.promoted == (verdict.candidate_score > verdict.incumbent_score));
    CHECK(verdict.candidate_score > verdict.incumbent_score);  // one epoch at 1e-3 against 15 more on new rows
    std::printf("fleet averaging over %zu ranks, %llu samples: holdout accuracy %.3f (incumbent %.3f), %s\n", world.size(),
                static_cast<unsigned long long>(total), verdict.candidate_score, verdict.incumbent_score,
                verdict.decision.promoted ? "promoted" : "not promoted");
    // A margin larger than any possible gain in accuracy refuses promotion.
    CHECK_FALSE(tenon::gate_fleet_average(incumbent, avg.model, holdout, tenon::gate_metric::accuracy, 1.5).decision.promoted);
    // The averaged file survives its own byte format.
    const auto again = tenon::model_file_from_bytes<float>(tenon::model_file_to_bytes(avg.model));
    CHECK(again.weights[0].values.data()[0] == avg.model.weights[0].values.data()[0]);
}

TEST_CASE("fleet contributions: damaged envelopes and an empty fleet raise their codes") {
    const tenon::model_file<float> incumbent = incumbent_model();
    const auto good = tenon::fleet_contribution_bytes(incumbent, 10);
    CHECK(tenon::read_fleet_contribution<float>(good).samples == 10);
    auto bad_magic = good;
    bad_magic[0] = 'X';
    CHECK(code_of([&] { tenon::read_fleet_contribution<float>(bad_magic); }) == "distributed.fleet.bad_bytes");
    const std::vector<std::uint8_t> short_bytes(good.begin(), good.begin() + 20);
    CHECK(code_of([&] { tenon::read_fleet_contribution<float>(short_bytes); }) == "distributed.fleet.bad_bytes");
    auto flipped = good;
    flipped[40] ^= 1;
    CHECK(code_of([&] { tenon::read_fleet_contribution<float>(flipped); }) == "distributed.fleet.bad_bytes");
    // A double model is not a float contribution: the model file's own code.
    CHECK(code_of([&] { tenon::read_fleet_contribution<double>(good); }) == "deploy.model.scalar_type");
    const auto no_samples = tenon::fleet_contribution_bytes(incumbent, 0);
    CHECK(code_of([&] { tenon::average_fleet(incumbent, {no_samples, bad_magic}); }) == "distributed.fleet.no_contribution");
    CHECK(code_of([&] { tenon::average_fleet(incumbent, {}); }) == "distributed.fleet.no_contribution");
    // One device alone: the average is its own weights.
    const auto one = tenon::average_fleet(incumbent, {good});
    CHECK(one.model.weights[1].values.data()[0] == incumbent.weights[1].values.data()[0]);
}

TEST_CASE("fleet averaging of a seed ensemble averages every member and gates on the members' mean") {
    const tenon::table t = retrain_test::pump_rows(200, 12);
    tenon::model_settings s = deploy_test::small_settings(4);
    s.hidden = {8};
    s.epochs = 2;
    s.ensemble = 3;
    auto fitted = tenon::fit_model<float>(t, deploy_test::condition_plan(), range(0, 160), range(160, 200), s);
    const tenon::model_file<float> incumbent = tenon::make_model_file(fitted, t, range(0, 160), s);
    REQUIRE(incumbent.members.size() == 2);
    // Two devices whose every weight is the incumbent's plus 1 and plus 3,
    // with 1 and 3 samples: the average is the incumbent's plus 2.5, in
    // every tensor of every member.
    const auto shifted = [&](float by) {
        tenon::model_file<float> m = incumbent;
        for (auto* w : tenon::detail::weight_tensors(m))
            for (std::size_t i = 0; i < w->values.size(); ++i) w->values.data()[i] += by;
        return m;
    };
    const auto avg =
        tenon::average_fleet(incumbent, {tenon::fleet_contribution_bytes(shifted(1.0f), 1), tenon::fleet_contribution_bytes(shifted(3.0f), 3)});
    REQUIRE(avg.accepted.size() == 2);
    REQUIRE(avg.model.members.size() == 2);
    const auto mine = tenon::detail::weight_tensors(incumbent);
    const auto theirs = tenon::detail::weight_tensors(avg.model);
    REQUIRE(theirs.size() == mine.size());
    double worst = 0.0;
    for (std::size_t w = 0; w < mine.size(); ++w)
        for (std::size_t i = 0; i < mine[w]->values.size(); ++i)
            worst = std::max(worst, std::abs(static_cast<double>(theirs[w]->values.data()[i]) - (mine[w]->values.data()[i] + 2.5)));
    CHECK(worst < 1e-5);
    // A single network is not a member-by-member match for an ensemble of three.
    tenon::model_file<float> single = incumbent;
    single.members.clear();
    const auto mixed = tenon::average_fleet(incumbent, {tenon::fleet_contribution_bytes(single, 5), tenon::fleet_contribution_bytes(incumbent, 5)});
    REQUIRE(mixed.refused.size() == 1);
    CHECK(mixed.refused[0].reason.find("holds 1 network(s), the incumbent 3") != std::string::npos);
    // The gate scores the members' mean: a candidate whose second member is
    // emptied scores otherwise, though its first member is the incumbent's.
    tenon::model_file<float> hollow = incumbent;
    for (auto& w : hollow.members[0])
        for (std::size_t i = 0; i < w.values.size(); ++i) w.values.data()[i] = 0.0f;
    const tenon::table holdout = retrain_test::pump_rows(300, 998);
    const auto verdict = tenon::gate_fleet_average(incumbent, hollow, holdout, tenon::gate_metric::log_loss);
    CHECK(verdict.candidate_score != verdict.incumbent_score);
    CHECK(tenon::gate_fleet_average(incumbent, incumbent, holdout, tenon::gate_metric::log_loss).candidate_score == verdict.incumbent_score);
}
