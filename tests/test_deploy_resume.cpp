// Tests of resuming: a checkpoint saved to a model file mid-training,
// loaded and continued, ends with the uninterrupted run's weights bit for bit.
#include <doctest/doctest.h>

#include <cstdio>
#include <string>
#include <vector>

#include <tenon/deploy/model_file.hpp>
#include <tenon/update/rules.hpp>

#include "deploy_test_support.hpp"

namespace {

using namespace deploy_test;

template <class T>
tenon::supervised_rows<T> wave_rows(std::size_t n, std::uint64_t seed) {
    tenon::random_engine rng(seed);
    tenon::supervised_rows<T> d;
    d.features = tenon::matrix<T>({n, 2});
    d.targets = tenon::matrix<T>({n, 1});
    for (std::size_t i = 0; i < n; ++i) {
        const double a = rng.uniform(-2.0, 2.0), b = rng.uniform(-2.0, 2.0);
        d.features(i, 0) = static_cast<T>(a);
        d.features(i, 1) = static_cast<T>(b);
        d.targets(i, 0) = static_cast<T>(std::sin(a) + 0.5 * b * b - 1.0 + rng.normal(0.0, 0.3));
    }
    return d;
}

// A net with dropout, so that layer engines are part of the state too.
template <class T>
tenon::network<T> net_with_dropout(std::uint64_t seed) {
    tenon::random_engine rng(seed);
    tenon::network<T> net;
    net.add(tenon::dense<T>(2, 16, rng, {tenon::init_scheme::he, tenon::init_distribution::uniform}), "hidden1");
    net.add(tenon::activation_layer<T>(tenon::activation::relu), "hidden1_act");
    net.add(tenon::dropout<T>(0.2, seed), "drop");
    net.add(tenon::dense<T>(16, 1, rng, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}), "output");
    return net;
}

template <class T>
tenon::training_options<T> options(std::size_t epochs) {
    tenon::training_options<T> o;
    o.epochs = epochs;
    o.batch_size = 24;
    o.seed = 17;
    o.patience = 4;
    o.clock = [] { return 0.0; };
    return o;
}

template <class T>
std::vector<T> all_values(tenon::network<T>& net) {
    std::vector<T> v;
    for (auto* p : net.parameters()) v.insert(v.end(), p->value().data(), p->value().data() + p->size());
    for (auto* p : net.state_buffers()) v.insert(v.end(), p->value().data(), p->value().data() + p->size());
    return v;
}

}  // namespace

TEST_CASE_TEMPLATE("a run checkpointed to a file, loaded and continued matches the uninterrupted run bit for bit", T, float, double) {
    const auto train = wave_rows<T>(200, 1), validation = wave_rows<T>(60, 2);
    const std::size_t epochs = 12;

    // The uninterrupted run.
    auto net_a = net_with_dropout<T>(3);
    tenon::adam<T> rule_a;
    tenon::stall_reduction_options so;
    so.initial_rate = 0.02;
    so.tolerated_reports = 1;
    tenon::stall_reduction schedule_a(so);
    tenon::trainer<T> trainer_a(net_a, rule_a, schedule_a, options<T>(epochs));
    const auto outcome_a = trainer_a.run(train, validation);

    const std::size_t ran = outcome_a.history.size();
    REQUIRE(ran >= 3);
    for (const std::size_t stop_after : {std::size_t(1), ran / 2, ran - 1}) {
        CAPTURE(stop_after);
        // The interrupted run: a checkpoint after `stop_after` epochs, then it stops.
        auto net_b = net_with_dropout<T>(3);
        tenon::adam<T> rule_b;
        tenon::stall_reduction schedule_b(so);
        const std::string path = "/tmp/tenon_deploy_resume_" + std::to_string(::getpid()) + ".tnm";
        auto o = options<T>(epochs);
        tenon::trainer<T>* self = nullptr;
        o.on_epoch = [&](const tenon::epoch_summary& s) {
            if (s.epoch < stop_after) return true;
            auto file = tenon::capture_network(net_b);
            file.resume = tenon::capture_resume_state(net_b, rule_b, schedule_b, self->progress());
            tenon::save_model_file(path, file);
            return false;
        };
        tenon::trainer<T> trainer_b(net_b, rule_b, schedule_b, o);
        self = &trainer_b;
        trainer_b.run(train, validation);

        // A fresh process: everything comes from the file.
        const auto file = tenon::load_model_file<T>(path);
        std::remove(path.c_str());
        REQUIRE(file.resume);
        CHECK(file.resume->progress.epochs_done == stop_after);
        auto net_c = tenon::rebuild_network(file);
        tenon::adam<T> rule_c;
        tenon::stall_reduction schedule_c(so);
        tenon::restore_resume_state(*file.resume, net_c, rule_c, schedule_c);
        auto oc = options<T>(epochs);
        oc.resume = &file.resume->progress;
        tenon::trainer<T> trainer_c(net_c, rule_c, schedule_c, oc);
        const auto outcome_c = trainer_c.run(train, validation);

        CHECK(outcome_c.reason == outcome_a.reason);
        CHECK(outcome_c.best_epoch == outcome_a.best_epoch);
        CHECK(outcome_c.steps == outcome_a.steps);
        CHECK(outcome_c.history.size() == outcome_a.history.size());
        const auto a = all_values(net_a), c = all_values(net_c);
        REQUIRE(a.size() == c.size());
        std::size_t differing = 0;
        for (std::size_t k = 0; k < a.size(); ++k) differing += !same_bits(a[k], c[k]);
        CHECK(differing == 0);
    }
}

TEST_CASE("a saved state that does not fit is refused") {
    auto net = net_with_dropout<float>(1);
    tenon::adam<float> rule;
    tenon::constant_rate schedule(0.01);
    tenon::training_progress<float> progress;
    const auto state = tenon::capture_resume_state(net, rule, schedule, progress);
    tenon::rmsprop<float> other_rule;
    CHECK_THROWS_WITH_AS(tenon::restore_resume_state(state, net, other_rule, schedule), doctest::Contains("'adam'"), tenon::error);
    try {
        tenon::restore_resume_state(state, net, other_rule, schedule);
    } catch (const tenon::error& e) {
        CHECK(e.code() == "deploy.resume.mismatch");
    }
    auto plain = tenon::make_mlp<float>({2, 4, 1}, tenon::activation::relu, {}, 0);
    CHECK_THROWS_AS(tenon::restore_resume_state(state, plain, rule, schedule), tenon::error);

    // The trainer refuses a row order of another size.
    const auto train = wave_rows<float>(50, 1);
    tenon::training_progress<float> wrong;
    wrong.order = {0, 1, 2};
    wrong.epochs_done = 1;
    auto o = options<float>(3);
    o.resume = &wrong;
    tenon::trainer<float> tr(net, rule, schedule, o);
    CHECK_THROWS_WITH_AS(tr.run(train, {}), doctest::Contains("shuffled 3 training rows"), tenon::error);
}
