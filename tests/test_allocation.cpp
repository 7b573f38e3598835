// Steady state allocates nothing: after the first step with a given batch
// shape, a training step (forward, backward, update) and a predictor call
// make zero heap allocations, on one thread and with a thread pool.
//
// This file replaces the global allocation functions with counting ones,
// which affects the whole executable, so it is an executable of its own
// (tenon_allocation_tests, label "alloc"; sanitizer builds, which bring
// their own allocation functions, skip it).
#include <doctest/doctest.h>

#include <atomic>
#include <cmath>
#include <cstdlib>
#include <malloc.h>
#include <new>
#include <optional>
#include <sstream>
#include <string_view>
#include <vector>

#include <tenon/core/parallel.hpp>
#include <tenon/deploy/model_file.hpp>
#include <tenon/deploy/predictor.hpp>
#include <tenon/train/calibration.hpp>
#include <tenon/layers/network.hpp>
#include <tenon/losses/classification.hpp>
#include <tenon/train/trainer.hpp>
#include <tenon/update/rules.hpp>
#include <tenon/update/schedules.hpp>

#include "deploy_test_support.hpp"

#if defined(__GNUC__) && !defined(__clang__)
#pragma GCC diagnostic ignored "-Wmismatched-new-delete"
#endif

// Counting global allocation functions. The count is process-wide (atomic),
// so allocations on the pool's worker threads count too.
// Live bytes are the usable sizes of the blocks handed out and not yet
// freed (glibc's malloc_usable_size), whether counting or not.
namespace {
std::atomic<bool> counting{false};
std::atomic<std::size_t> allocations{0};
std::atomic<std::size_t> live_bytes{0};

void* counted_malloc(std::size_t size) noexcept {
    void* p = std::malloc(size ? size : 1);
    if (p) live_bytes.fetch_add(malloc_usable_size(p), std::memory_order_relaxed);
    return p;
}
void counted_free(void* p) noexcept {
    if (p) live_bytes.fetch_sub(malloc_usable_size(p), std::memory_order_relaxed);
    std::free(p);
}
}  // namespace

void* operator new(std::size_t size) {
    if (counting.load(std::memory_order_relaxed)) allocations.fetch_add(1, std::memory_order_relaxed);
    if (void* p = counted_malloc(size)) return p;
    throw std::bad_alloc();
}
void* operator new[](std::size_t size) { return operator new(size); }
void* operator new(std::size_t size, const std::nothrow_t&) noexcept {
    if (counting.load(std::memory_order_relaxed)) allocations.fetch_add(1, std::memory_order_relaxed);
    return counted_malloc(size);
}
void operator delete(void* p) noexcept { counted_free(p); }
void operator delete[](void* p) noexcept { counted_free(p); }
void operator delete(void* p, std::size_t) noexcept { counted_free(p); }
void operator delete[](void* p, std::size_t) noexcept { counted_free(p); }

namespace {

// Fashion-MNIST-shaped data (784 inputs, 10 classes) drawn at random: the
// allocation behaviour depends on shapes, not on values.
template <class T>
tenon::supervised_rows<T> random_rows(std::size_t rows, std::uint64_t seed) {
    tenon::random_engine rng(seed);
    tenon::supervised_rows<T> d;
    d.features = tenon::matrix<T>({rows, 784});
    for (std::size_t k = 0; k < d.features.size(); ++k) d.features.data()[k] = rng.normal(T(0), T(1));
    d.class_count = 10;
    d.labels.resize(rows);
    for (auto& l : d.labels) l = static_cast<std::size_t>(rng.below(10));
    return d;
}

}  // namespace

TEST_CASE_TEMPLATE("a training step of a 784-256-128-10 perceptron allocates nothing after the first", T, float, double) {
    for (const std::size_t threads : {std::size_t(1), std::size_t(2)}) {
        tenon::thread_pool pool(threads);
        auto net = tenon::make_mlp<T>({784, 256, 128, 10}, tenon::activation::relu, {tenon::init_scheme::he, tenon::init_distribution::uniform}, 1);
        tenon::adam<T> rule;
        tenon::random_engine rng(4);
        tenon::matrix<T> x({128, 784});
        for (std::size_t k = 0; k < x.size(); ++k) x.data()[k] = rng.normal(T(0), T(1));
        std::vector<std::size_t> labels(128);
        for (auto& l : labels) l = static_cast<std::size_t>(rng.below(10));
        tenon::tape<T> t;
        t.set_executor(&pool);
        auto step = [&] {
            t.clear();
            net.clear_gradients();
            const auto y = net.forward(t, t.input(x));
            const auto loss = tenon::cross_entropy_loss(t, y, labels);
            t.backward(loss);
            rule.apply(net.parameters(), T(0.001));
        };
        step();  // the first step with this shape sizes every buffer
        allocations = 0;
        counting = true;
        for (int i = 0; i < 3; ++i) step();
        counting = false;
        CHECK_MESSAGE(allocations.load() == 0, "threads=" << threads);
    }
    // The counter does count: a new tape's first step allocates its nodes.
    tenon::tape<T> fresh;
    counting = true;
    fresh.input(tenon::matrix<T>({2, 2}));
    counting = false;
    CHECK(allocations.load() > 0);
}

TEST_CASE_TEMPLATE("the trainer's steps after the first epoch allocate nothing, with or without workers", T, float, double) {
    // Measured between consecutive batch observer calls (which see no
    // allocation of their own): everything the trainer does for one step,
    // from gathering the batch to the update, lies between two calls.
    const auto train = random_rows<T>(600, 1);
    for (const std::size_t threads : {std::size_t(1), std::size_t(2)}) {
        tenon::thread_pool pool(threads);
        auto net = tenon::make_mlp<T>({784, 256, 128, 10}, tenon::activation::relu, {tenon::init_scheme::he, tenon::init_distribution::uniform}, 2);
        tenon::adam<T> rule;
        tenon::constant_rate schedule(0.001);
        tenon::training_options<T> o;
        o.epochs = 2;
        o.batch_size = 128;  // 4 full batches and a tail of 88 rows
        o.loss = tenon::loss_kind::cross_entropy;
        o.workers = &pool;
        std::vector<std::size_t> per_step;
        std::size_t last = 0;
        o.on_batch = [&](const tenon::batch_progress& p) {
            counting = false;
            const std::size_t now = allocations.load();
            if (p.epoch == 2 && p.batch > 1) per_step.push_back(now - last);
            last = now;
            counting = p.epoch == 2 && p.batch < p.batches;  // count until the epoch's last batch
        };
        allocations = 0;
        tenon::trainer<T> tr(net, rule, schedule, o);
        tr.run(train, tenon::supervised_rows<T>{});
        counting = false;
        REQUIRE(per_step.size() == 4);
        for (std::size_t i = 0; i < per_step.size(); ++i) CHECK_MESSAGE(per_step[i] == 0, "threads=" << threads << " batch " << i + 2);
    }
}

TEST_CASE_TEMPLATE("a predictor call on a prepared row allocates nothing", T, float, double) {
    const auto table = deploy_test::pump_table(200, 3);
    const auto train = deploy_test::range(0, 160), validation = deploy_test::range(160, 200);
    auto fitted = tenon::fit_model<T>(table, deploy_test::condition_plan(), train, validation, deploy_test::small_settings());
    tenon::predictor<T> p(tenon::make_model_file(fitted, table, train, deploy_test::small_settings()), 8);
    const auto features = fitted.plan.template apply<T>(table, validation).features;
    tenon::prediction_view<T> out;
    REQUIRE(p.try_predict_prepared(features.data(), 1, out).ok());
    allocations = 0;
    counting = true;
    bool ok = true;
    for (std::size_t row = 0; row < 8; ++row) ok = ok && p.try_predict_prepared(features.data() + row * features.shape()[1], 1, out).ok();
    ok = ok && p.try_predict_prepared(features.data(), 8, out).ok();
    counting = false;
    CHECK(ok);
    CHECK(allocations.load() == 0);
}

TEST_CASE_TEMPLATE("a calibrated predictor's bands and class sets allocate nothing", T, float, double) {
    const auto table = deploy_test::pump_table(200, 3);
    const auto train = deploy_test::range(0, 160), validation = deploy_test::range(160, 200);
    for (const bool classify : {true, false}) {
        const tenon::plan plan = classify ? deploy_test::condition_plan() : deploy_test::power_plan();
        auto fitted = tenon::fit_model<T>(table, plan, train, validation, deploy_test::small_settings());
        auto file = tenon::make_model_file(fitted, table, train, deploy_test::small_settings());
        file.calibration = tenon::calibrate_model(fitted, table, validation, 0.9);
        tenon::predictor<T> p(file, 8);
        const auto features = fitted.plan.template apply<T>(table, validation).features;
        tenon::prediction_view<T> out;
        REQUIRE(p.try_predict_prepared(features.data(), 1, out).ok());
        allocations = 0;
        counting = true;
        bool ok = true;
        for (std::size_t row = 0; row < 8; ++row) ok = ok && p.try_predict_prepared(features.data() + row * features.shape()[1], 1, out).ok();
        ok = ok && p.try_predict_prepared(features.data(), 8, out).ok();
        counting = false;
        CHECK(ok);
        CHECK(allocations.load() == 0);
        CHECK((classify ? out.has_class_sets() : out.has_interval()));
    }
}

// Footprint of a serving process (README, "Footprint"): the model file of an
// 8-32-32-1 regression network loaded from its bytes, and a predictor for
// it, keep at most 256 KiB on the heap once constructed (the predictor
// holds its own copy of the network, plan and reference summaries; the
// loaded file may then go), on every processor the tests run on. The data
// are invented: eight sensor readings of a packaging line and the seal
// temperature they predict.
TEST_CASE("a serving process for an 8-32-32-1 model holds at most 256 KiB of heap after construction") {
    tenon::random_engine rng(12);
    std::ostringstream csv;
    csv << "s1,s2,s3,s4,s5,s6,s7,s8,seal_temperature\n";
    for (int i = 0; i < 2000; ++i) {
        double sum = 0;
        for (int k = 0; k < 8; ++k) {
            const double v = rng.uniform(0.0, 10.0);
            sum += (k + 1) * v;
            csv << v << ",";
        }
        csv << 150.0 + 0.5 * sum + rng.normal(0.0, 1.0) << "\n";
    }
    std::istringstream in(csv.str());
    const tenon::table table = tenon::read_csv(in, {}, "line.csv");
    tenon::plan plan;
    plan.set_target("seal_temperature", tenon::target_kind::regression);
    tenon::model_settings s;
    s.hidden = {32, 32};
    s.epochs = 2;
    s.seed = 5;
    s.ensemble = 1;  // one 8-32-32-1 network (an ensemble holds one per member)
    const auto train = deploy_test::range(0, 1600), validation = deploy_test::range(1600, 2000);
    auto fitted = tenon::fit_model<float>(table, plan, train, validation, s);
    const std::vector<std::uint8_t> bytes = tenon::model_file_to_bytes(tenon::make_model_file(fitted, table, train, s));

    // Once, so that what the first use of each part keeps for the process
    // (per-thread matrix-product scratch, static tables) is not counted.
    const auto serve = [&](std::size_t& with_file, std::size_t& predictor_alone) {
        const std::size_t before = live_bytes.load();
        std::optional<tenon::predictor<float>> p;
        {
            const auto file = tenon::model_file_from_bytes<float>(bytes);
            p.emplace(file);
            with_file = live_bytes.load() - before;
        }
        predictor_alone = live_bytes.load() - before;
        const std::string_view row[8] = {"1", "2", "3", "4", "5", "6", "7", "8"};
        REQUIRE(std::isfinite(p->predict_cells(row, 1).at(0, 0)));
    };
    std::size_t with_file = 0, predictor_alone = 0;
    serve(with_file, predictor_alone);
    serve(with_file, predictor_alone);
    MESSAGE("heap held after construction: " << predictor_alone << " bytes by the predictor, " << with_file
                                             << " bytes with the loaded model file still alive");
    CHECK(predictor_alone <= 256u * 1024u);
}
