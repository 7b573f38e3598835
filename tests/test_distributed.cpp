// Tests of distributed/: data-parallel training over MPI. Run by ctest under
// mpirun with 2 and 4 ranks (tests/CMakeLists.txt); every rank runs every
// case, in the same order, since the cases make collective calls.
#define DOCTEST_CONFIG_IMPLEMENT
#include <doctest/doctest.h>

#include <algorithm>
#include <atomic>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <functional>
#include <limits>
#include <numeric>
#include <string>
#include <vector>

#include <sstream>

#include <tenon/distributed/data_parallel.hpp>
#include <tenon/distributed/plan_merge.hpp>
#include <tenon/prep/csv.hpp>
#include <tenon/train/workflow.hpp>
#include <tenon/update/rules.hpp>
#include <tenon/update/schedules.hpp>

namespace {

tenon::communicator& world() {
    static tenon::communicator c;
    return c;
}

// y = sin(x0) + 0.5 x1^2 - x2 on [-2, 2]^3, an invented smooth target
// (a press's force from three settings).
template <class T>
tenon::supervised_rows<T> press_rows(std::size_t n, std::uint64_t seed) {
    tenon::random_engine rng(seed);
    tenon::supervised_rows<T> d;
    d.features = tenon::matrix<T>({n, 3});
    d.targets = tenon::matrix<T>({n, 1});
    for (std::size_t i = 0; i < n; ++i) {
        const double a = rng.uniform(-2.0, 2.0), b = rng.uniform(-2.0, 2.0), c = rng.uniform(-2.0, 2.0);
        d.features(i, 0) = static_cast<T>(a);
        d.features(i, 1) = static_cast<T>(b);
        d.features(i, 2) = static_cast<T>(c);
        d.targets(i, 0) = static_cast<T>(std::sin(a) + 0.5 * b * b - c);
    }
    return d;
}

// Three classes of a packaging line's seal quality from two readings.
template <class T>
tenon::supervised_rows<T> seal_rows(std::size_t n, std::uint64_t seed) {
    tenon::random_engine rng(seed);
    tenon::supervised_rows<T> d;
    d.features = tenon::matrix<T>({n, 2});
    d.class_count = 3;
    for (std::size_t i = 0; i < n; ++i) {
        const double a = rng.uniform(-1.0, 1.0), b = rng.uniform(-1.0, 1.0);
        d.features(i, 0) = static_cast<T>(a);
        d.features(i, 1) = static_cast<T>(b);
        d.labels.push_back(a + b > 0.4 ? 2 : a - b > 0.0 ? 1 : 0);
    }
    return d;
}

template <class T>
double max_difference(tenon::network<T>& a, tenon::network<T>& b) {
    double m = 0.0;
    for (std::size_t k = 0; k < a.parameters().size(); ++k) {
        const auto& x = a.parameters()[k]->value();
        const auto& y = b.parameters()[k]->value();
        for (std::size_t i = 0; i < x.size(); ++i) m = std::max(m, std::abs(static_cast<double>(x.data()[i]) - static_cast<double>(y.data()[i])));
    }
    return m;
}

template <class T>
double largest_weight(tenon::network<T>& a) {
    double m = 0.0;
    for (const auto* p : a.parameters())
        for (std::size_t i = 0; i < p->size(); ++i) m = std::max(m, std::abs(static_cast<double>(p->value().data()[i])));
    return m;
}

struct run_result {
    tenon::training_outcome outcome;
    std::vector<std::uint64_t> checksums_agree;  // 1 per epoch where every rank held the same bits
};

// Trains a fresh 3-16-1 (or 2-16-3) network on `train` with Adam; with the
// team when `team` is given, else alone.
template <class T>
run_result train_once(tenon::network<T>& net, const tenon::supervised_rows<T>& train, const tenon::supervised_rows<T>& validation, std::size_t batch,
                      std::size_t epochs, tenon::training_team* team, tenon::training_options<T> o = {}) {
    tenon::adam<T> rule;
    tenon::constant_rate schedule(0.01);
    o.epochs = epochs;
    o.batch_size = batch;
    o.seed = 42;
    o.patience = 0;
    o.loss = train.is_classification() ? tenon::loss_kind::cross_entropy : tenon::loss_kind::l2;
    o.team = team;
    run_result r;
    auto observer = o.on_epoch;
    o.on_epoch = [&](const tenon::epoch_summary& s) {
        if (team) r.checksums_agree.push_back(tenon::weights_agree(net, world()) ? 1 : 0);
        return observer ? observer(s) : true;
    };
    tenon::trainer<T> tr(net, rule, schedule, o);
    r.outcome = tr.run(train, validation);
    return r;
}

}  // namespace

TEST_CASE_TEMPLATE("p ranks with batch b train the weights of one process with batch b x p", T, float, double) {
    const std::size_t p = world().size();
    // 4 x 8 x 6 + 3 rows: the last global batch has 3 rows, so with 4 ranks
    // one rank has no row in it and the others one each.
    const auto train = press_rows<T>(4 * 8 * 6 + 3, 1);
    const auto validation = press_rows<T>(41, 2);
    auto team_net = tenon::make_mlp<T>({3, 16, 1}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 7);
    auto alone_net = tenon::make_mlp<T>({3, 16, 1}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 7);
    tenon::mpi_team team(world());
    const run_result shared = train_once(team_net, train, validation, 8, 6, &team);
    const run_result alone = train_once(alone_net, train, validation, 8 * p, 6, nullptr);

    REQUIRE(shared.checksums_agree.size() == 6);
    for (auto agree : shared.checksums_agree) CHECK(agree == 1);  // identical bits on every rank after every epoch
    CHECK(shared.outcome.steps == alone.outcome.steps);
    // Same math, other summation order: within a few float roundings per
    // step, relative to the weights' size.
    const double tolerance = (sizeof(T) == 4 ? 2e-4 : 1e-10) * std::max(1.0, largest_weight(alone_net));
    const double difference = max_difference(team_net, alone_net);
    CHECK(difference <= tolerance);
    if (world().rank() == 0)
        std::printf("equivalence (%s, %zu ranks, batch 8 x %zu vs one process with batch %zu): max weight difference %.3g\n",
                    sizeof(T) == 4 ? "float" : "double", p, p, 8 * p, difference);
    for (std::size_t e = 0; e < alone.outcome.history.size(); ++e) {
        CHECK(shared.outcome.history[e].training_loss == doctest::Approx(alone.outcome.history[e].training_loss).epsilon(1e-4));
        CHECK(shared.outcome.history[e].validation_loss == doctest::Approx(alone.outcome.history[e].validation_loss).epsilon(1e-4));
        CHECK(shared.outcome.history[e].validation_metric == doctest::Approx(alone.outcome.history[e].validation_metric).epsilon(1e-4));
    }
}

TEST_CASE("class-weighted cross-entropy: the ranks' gradients are weighted by their rows' class weights") {
    using T = double;
    const std::size_t p = world().size();
    const auto train = seal_rows<T>(3 * 5 * 4 + 5, 3);
    const auto validation = seal_rows<T>(23, 4);
    auto team_net = tenon::make_mlp<T>({2, 12, 3}, tenon::activation::relu, {tenon::init_scheme::he, tenon::init_distribution::uniform}, 9);
    auto alone_net = tenon::make_mlp<T>({2, 12, 3}, tenon::activation::relu, {tenon::init_scheme::he, tenon::init_distribution::uniform}, 9);
    tenon::training_options<T> o;
    o.loss_settings.class_weights = {1.0, 3.0, 0.5};
    tenon::mpi_team team(world());
    const run_result shared = train_once(team_net, train, validation, 5, 4, &team, o);
    const run_result alone = train_once(alone_net, train, validation, 5 * p, 4, nullptr, o);
    for (auto agree : shared.checksums_agree) CHECK(agree == 1);
    CHECK(max_difference(team_net, alone_net) <= 1e-10 * std::max(1.0, largest_weight(alone_net)));
    CHECK(shared.outcome.history.back().validation_loss == doctest::Approx(alone.outcome.history.back().validation_loss).epsilon(1e-9));
    CHECK(shared.outcome.history.back().validation_metric == doctest::Approx(alone.outcome.history.back().validation_metric));
}

TEST_CASE("a cancellation on one rank stops every rank after the same step") {
    using T = float;
    const auto train = press_rows<T>(400, 5);
    auto net = tenon::make_mlp<T>({3, 8, 1}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 3);
    std::atomic<bool> cancel{false};
    tenon::training_options<T> o;
    o.cancel = &cancel;
    const bool last = world().rank() + 1 == world().size();
    o.on_batch = [&](const tenon::batch_progress& b) {
        if (last && b.epoch == 2 && b.batch == 3) cancel = true;  // only the last rank's host cancels
    };
    tenon::mpi_team team(world());
    const run_result r = train_once(net, train, {}, 10, 5, &team, o);
    CHECK(r.outcome.reason == tenon::stop_reason::cancelled);
    const std::size_t per_epoch = (400 + 10 * world().size() - 1) / (10 * world().size());
    // The request is read before the next step's sum: every rank stops after that step.
    CHECK(r.outcome.steps == per_epoch + 4);
    CHECK(tenon::weights_agree(net, world()));
}

TEST_CASE("the wall-clock budget is spent when any rank's clock says so") {
    using T = float;
    const auto train = press_rows<T>(300, 6);
    const auto validation = press_rows<T>(30, 7);
    auto net = tenon::make_mlp<T>({3, 8, 1}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 4);
    double now = 0.0;
    tenon::training_options<T> o;
    o.time_budget_seconds = 10.0;
    // Rank 0's clock runs fast (one second per reading); the others' stand still.
    o.clock = [&] { return world().rank() == 0 ? (now += 1.0) : 0.0; };
    tenon::mpi_team team(world());
    const run_result r = train_once(net, train, validation, 4, 50, &team, o);
    CHECK(r.outcome.reason == tenon::stop_reason::time_budget);
    std::uint64_t steps[1] = {r.outcome.steps}, max_steps[1] = {r.outcome.steps};
    world().maximum(max_steps, 1);
    CHECK(steps[0] == max_steps[0]);
    CHECK(tenon::weights_agree(net, world()));
}

TEST_CASE("a divergence is seen by every rank, and the guard retries together") {
    using T = float;
    const auto train = press_rows<T>(200, 8);
    auto net = tenon::make_mlp<T>({3, 8, 1}, tenon::activation::relu, {tenon::init_scheme::he, tenon::init_distribution::uniform}, 5);
    tenon::gradient_descent<T> rule;
    tenon::constant_rate schedule(1e30);  // overflows in the first steps
    tenon::training_options<T> o;
    o.epochs = 3;
    o.batch_size = 10;
    o.loss = tenon::loss_kind::l2;
    o.divergence_retries = 2;
    tenon::mpi_team team(world());
    o.team = &team;
    tenon::trainer<T> tr(net, rule, schedule, o);
    const auto out = tr.run(train, {});
    CHECK(out.reason == tenon::stop_reason::diverged);
    REQUIRE(out.history.size() == 1);
    CHECK(out.history[0].retries == 2);
    CHECK(tenon::weights_agree(net, world()));
}

TEST_CASE("ranks that train on different rows refuse together: train.team.mismatch") {
    using T = float;
    const auto train = press_rows<T>(world().rank() == 0 ? 101 : 100, 9);
    auto net = tenon::make_mlp<T>({3, 4, 1}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 6);
    tenon::mpi_team team(world());
    if (world().size() > 1) {
        CHECK_THROWS_WITH_AS(train_once(net, train, {}, 10, 2, &team), doctest::Contains("train.team.mismatch"), tenon::error);
    }
}

namespace {

// A packaging line's log as CSV: rows [0, n) dealt to `rank` of `ranks`
// (all rows for ranks == 1, and for rank == ranks: the union of the ranks'
// shards). Only the last rank's shard holds the die "wide" and the class 7,
// so only a union finds them; some cells are missing.
std::string line_log(std::size_t n, std::size_t rank, std::size_t ranks, bool extra_column = false) {
    tenon::random_engine rng(77);
    std::ostringstream csv;
    csv.precision(17);
    csv << "speed,temperature,load,die,grade" << (extra_column ? ",note" : "") << "\n";
    const char* dies[] = {"flat", "round", "vee"};
    for (std::size_t i = 0; i < n; ++i) {
        const double speed = rng.uniform(1.0, 9.0), temperature = rng.normal(60.0, 8.0), load = rng.uniform(0.0, 1.0) * 1e3;
        const std::size_t die = static_cast<std::size_t>(rng.uniform(0.0, 3.0)) % 3;
        const bool last = i % ranks == ranks - 1;
        if (rank < ranks && i % ranks != rank) continue;
        csv << speed << "," << (i % 11 == 3 ? std::string("NA") : std::to_string(temperature)) << "," << load << ","
            << (last && i % 13 == 5 ? "wide"
                    : i % 17 == 2   ? "NA"
                                    : dies[die])
            << "," << (last && i % 19 == 4 ? 7 : static_cast<int>(i % 3)) << (extra_column ? ",x" : "") << "\n";
    }
    std::istringstream in(csv.str());
    return in.str();
}

tenon::table table_of(const std::string& csv) {
    std::istringstream in(csv);
    return tenon::read_csv(in, {}, "line.csv");
}

tenon::plan line_plan() {
    tenon::plan p;
    p.set_target("grade", tenon::target_kind::classification);
    tenon::feature_steps z;  // z-score, mean fill
    z.fill = tenon::fill_method::mean;
    p.set_steps("temperature", z);
    tenon::feature_steps range;
    range.scaling = tenon::scaling_method::min_max;
    p.set_steps("speed", range);
    tenon::feature_steps quartile_scaled;
    quartile_scaled.scaling = tenon::scaling_method::median_iqr;
    p.set_steps("load", quartile_scaled);
    tenon::feature_steps category;
    category.fill = tenon::fill_method::mode;
    category.missing_indicator = true;
    p.set_steps("die", category);
    return p;
}

}  // namespace

TEST_CASE("a plan measured on each rank's shard equals the plan of all rows (Chan et al. merge, union of categories)") {
    const std::size_t p = world().size(), n = 301;
    const tenon::table all = table_of(line_log(n, 0, 1));
    const tenon::table mine = table_of(line_log(n, world().rank(), p));
    const tenon::measured_plan alone = line_plan().measure(all, tenon::all_rows(all.row_count()));
    const tenon::measured_plan merged = tenon::measure_plan_across(line_plan(), mine, tenon::all_rows(mine.row_count()), world());
    CHECK(merged.feature_names() == alone.feature_names());
    CHECK(merged.class_names() == alone.class_names());
    CHECK(std::find(merged.class_names().begin(), merged.class_names().end(), "7") != merged.class_names().end());
    CHECK(merged.feature_categories("die").categories() == alone.feature_categories("die").categories());
    CHECK(merged.feature_fill("die").text == alone.feature_fill("die").text);
    for (const char* name : {"speed", "temperature", "load"}) {
        const tenon::scaling a = alone.feature_scaling(name), b = merged.feature_scaling(name);
        CHECK(b.method == a.method);
        CHECK(b.center == doctest::Approx(a.center).epsilon(1e-12));
        CHECK(b.spread == doctest::Approx(a.spread).epsilon(1e-12));
    }
    CHECK(merged.feature_scaling("load").center == alone.feature_scaling("load").center);  // quantiles are exact
    CHECK(merged.feature_fill("temperature").number == doctest::Approx(alone.feature_fill("temperature").number).epsilon(1e-12));
    CHECK(merged.dropped_training_rows() == alone.dropped_training_rows());
    // Every rank holds the same plan, bit for bit.
    const auto bytes = merged.to_bytes();
    const auto everyone = world().gather_all(bytes);
    for (const auto& b : everyone) CHECK(b == bytes);
}

TEST_CASE("ranks whose tables differ in their columns refuse together: distributed.plan.mismatch") {
    if (world().size() < 2) return;
    const tenon::table mine = table_of(line_log(60, world().rank(), world().size(), world().rank() == 0));
    CHECK_THROWS_WITH_AS(tenon::measure_plan_across(line_plan(), mine, tenon::all_rows(mine.row_count()), world()),
                         doctest::Contains("distributed.plan.mismatch"), tenon::error);
}

TEST_CASE("a failing MPI call raises distributed.mpi.failed instead of aborting the job") {
    world();  // MPI_COMM_WORLD returns errors to the caller from here on
    CHECK_THROWS_WITH_AS(tenon::communicator(MPI_COMM_NULL), doctest::Contains("distributed.mpi.failed"), tenon::error);
    CHECK_THROWS_WITH_AS(tenon::deal_rows({1, 2, 3}, 2, 2), doctest::Contains("core.argument.invalid"), tenon::error);
    CHECK(tenon::deal_rows({10, 11, 12, 13, 14}, 1, 2) == std::vector<std::size_t>{11, 13});
}

TEST_CASE("the ring-allreduce model: 2 (p - 1) / p of the bytes per rank, 2 (p - 1) latencies") {
    // 1 MB at 1 GB/s without latency: 2 x 1/2 x 1 ms on 2 ranks, 2 x 63/64 ms on 64.
    CHECK(tenon::ring_allreduce_seconds(2, 1e6, 0.0, 1e9) == doctest::Approx(1e-3));
    CHECK(tenon::ring_allreduce_seconds(64, 1e6, 0.0, 1e9) == doctest::Approx(2e-3 * 63.0 / 64.0));
    CHECK(tenon::ring_allreduce_seconds(8, 0.0, 1e-6, 1e9) == doctest::Approx(14e-6));
    CHECK(tenon::ring_allreduce_seconds(1, 1e6, 1e-6, 1e9) == 0.0);
}

namespace {

// Rows `first`, `first + 1`, ..., `first + count - 1` of `d`.
template <class T>
tenon::supervised_rows<T> row_block(const tenon::supervised_rows<T>& d, std::size_t first, std::size_t count) {
    tenon::supervised_rows<T> out;
    out.class_count = d.class_count;
    const std::size_t inputs = d.features.shape()[1];
    out.features = tenon::matrix<T>({count, inputs});
    std::copy(d.features.data() + first * inputs, d.features.data() + (first + count) * inputs, out.features.data());
    if (d.is_classification()) {
        out.labels.assign(d.labels.begin() + static_cast<std::ptrdiff_t>(first), d.labels.begin() + static_cast<std::ptrdiff_t>(first + count));
    } else {
        const std::size_t outs = d.targets.shape()[1];
        out.targets = tenon::matrix<T>({count, outs});
        std::copy(d.targets.data() + first * outs, d.targets.data() + (first + count) * outs, out.targets.data());
    }
    return out;
}

// Rows `rows` of `d`, in that order.
template <class T>
tenon::supervised_rows<T> rows_of(const tenon::supervised_rows<T>& d, const std::vector<std::size_t>& rows) {
    tenon::supervised_rows<T> out;
    out.class_count = d.class_count;
    const std::size_t inputs = d.features.shape()[1];
    out.features = tenon::matrix<T>({rows.size(), inputs});
    const std::size_t outs = d.is_classification() ? 0 : d.targets.shape()[1];
    if (!d.is_classification()) out.targets = tenon::matrix<T>({rows.size(), outs});
    for (std::size_t i = 0; i < rows.size(); ++i) {
        std::copy(d.features.data() + rows[i] * inputs, d.features.data() + (rows[i] + 1) * inputs, out.features.data() + i * inputs);
        if (d.is_classification())
            out.labels.push_back(d.labels[rows[i]]);
        else
            std::copy(d.targets.data() + rows[i] * outs, d.targets.data() + (rows[i] + 1) * outs, out.targets.data() + i * outs);
    }
    return out;
}

// Shards of unequal sizes: rank r holds a block of sizes[r % 4] rows.
struct shard_layout {
    std::vector<std::size_t> first, size;
    std::size_t total = 0;
};

shard_layout layout_of(std::size_t ranks, const std::vector<std::size_t>& sizes) {
    shard_layout l;
    for (std::size_t r = 0; r < ranks; ++r) {
        l.first.push_back(l.total);
        l.size.push_back(sizes[r % sizes.size()]);
        l.total += l.size.back();
    }
    return l;
}

// The order in which one process meets the team's rows without shuffling:
// step k holds rank 0's rows [k b, (k + 1) b) of its shard, then rank 1's, ...
std::vector<std::size_t> interleaved_batches(const shard_layout& l, std::size_t batch) {
    std::vector<std::size_t> order;
    for (std::size_t k = 0; order.size() < l.total; ++k)
        for (std::size_t r = 0; r < l.first.size(); ++r)
            for (std::size_t i = k * batch; i < std::min((k + 1) * batch, l.size[r]); ++i) order.push_back(l.first[r] + i);
    return order;
}

std::string code_of(const std::function<void()>& f) {
    try {
        f();
    } catch (const tenon::error& e) {
        return e.code();
    }
    return "none";
}

}  // namespace

TEST_CASE_TEMPLATE("shards without shuffling: p ranks with batch b train the weights of one process with batch b x p on the interleaved batches", T,
                   float, double) {
    const std::size_t p = world().size(), r = world().rank(), batch = 8;
    // Shards of 45, 40, 48 and 42 rows: 6 steps per epoch, and in the last
    // step rank 1 has no row left (5 + 0 (+ 8 + 2) rows in the global batch).
    const shard_layout train_layout = layout_of(p, {45, 40, 48, 42});
    const shard_layout validation_layout = layout_of(p, {7, 0, 5, 3});  // rank 1 validates nothing itself
    const auto all_train = press_rows<T>(train_layout.total, 11);
    const auto all_validation = press_rows<T>(validation_layout.total, 12);
    const auto my_train = row_block(all_train, train_layout.first[r], train_layout.size[r]);
    const auto my_validation = row_block(all_validation, validation_layout.first[r], validation_layout.size[r]);

    auto team_net = tenon::make_mlp<T>({3, 16, 1}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 7);
    auto alone_net = tenon::make_mlp<T>({3, 16, 1}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 7);
    tenon::mpi_team team(world());
    tenon::training_options<T> o;
    o.shuffle = false;
    o.member_rows = tenon::team_rows::shard_per_member;
    std::vector<std::size_t> batches_seen;
    o.on_batch = [&](const tenon::batch_progress& b) {
        if (b.batch == 1) batches_seen.push_back(b.batches);
    };
    const run_result shared = train_once(team_net, my_train, my_validation, batch, 5, &team, o);
    tenon::training_options<T> alone_options;
    alone_options.shuffle = false;
    const run_result alone =
        train_once(alone_net, rows_of(all_train, interleaved_batches(train_layout, batch)), all_validation, batch * p, 5, nullptr, alone_options);

    REQUIRE(shared.checksums_agree.size() == 5);
    for (auto agree : shared.checksums_agree) CHECK(agree == 1);  // identical bits on every rank after every epoch
    for (auto b : batches_seen) CHECK(b == 6);  // the largest shard's batch count
    CHECK(shared.outcome.steps == 5 * 6);
    CHECK(alone.outcome.steps == shared.outcome.steps);
    const double tolerance = (sizeof(T) == 4 ? 2e-4 : 1e-10) * std::max(1.0, largest_weight(alone_net));
    const double difference = max_difference(team_net, alone_net);
    CHECK(difference <= tolerance);
    if (r == 0)
        std::printf("shard equivalence (%s, %zu ranks, batch 8 x %zu, shards %zu..%zu rows, no shuffling): max weight difference %.3g\n",
                    sizeof(T) == 4 ? "float" : "double", p, p, *std::min_element(train_layout.size.begin(), train_layout.size.end()),
                    *std::max_element(train_layout.size.begin(), train_layout.size.end()), difference);
    for (std::size_t e = 0; e < alone.outcome.history.size(); ++e) {
        CHECK(shared.outcome.history[e].training_loss == doctest::Approx(alone.outcome.history[e].training_loss).epsilon(1e-4));
        CHECK(shared.outcome.history[e].validation_loss == doctest::Approx(alone.outcome.history[e].validation_loss).epsilon(1e-4));
        CHECK(shared.outcome.history[e].validation_metric == doctest::Approx(alone.outcome.history[e].validation_metric).epsilon(1e-4));
    }
}

TEST_CASE("shards with shuffling: every rank holds the same bits every epoch, a rerun gives the same bits, each rank shuffles its own way") {
    using T = double;
    const std::size_t p = world().size(), r = world().rank();
    const shard_layout layout = layout_of(p, {50, 50, 50, 50});
    const auto all_train = press_rows<T>(layout.total, 13);
    const auto my_train = row_block(all_train, layout.first[r], layout.size[r]);
    tenon::mpi_team team(world());
    const auto run = [&](bool shuffle, std::vector<std::size_t>* order) {
        auto net = tenon::make_mlp<T>({3, 10, 1}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 8);
        tenon::adam<T> rule;
        tenon::constant_rate schedule(0.01);
        tenon::training_options<T> o;
        o.epochs = 4;
        o.batch_size = 6;
        o.seed = 42;
        o.patience = 0;
        o.shuffle = shuffle;
        o.member_rows = tenon::team_rows::shard_per_member;
        o.team = &team;
        std::size_t agreed = 0;
        o.on_epoch = [&](const tenon::epoch_summary&) {
            agreed += tenon::weights_agree(net, world()) ? 1 : 0;
            return true;
        };
        tenon::trainer<T> tr(net, rule, schedule, o);
        tr.run(my_train, {});
        CHECK(agreed == 4);
        if (order) *order = tr.progress().order;
        return tenon::weights_checksum(net);
    };
    std::vector<std::size_t> order;
    const std::uint64_t first = run(true, &order), second = run(true, nullptr), unshuffled = run(false, nullptr);
    CHECK(first == second);
    CHECK(first != unshuffled);
    std::vector<std::size_t> identity(order.size());
    std::iota(identity.begin(), identity.end(), std::size_t(0));
    CHECK(order != identity);
    // Equal shard sizes, other streams: no two ranks draw the same permutation.
    std::vector<std::uint8_t> bytes(order.size() * sizeof(std::size_t));
    std::memcpy(bytes.data(), order.data(), bytes.size());
    const auto everyone = world().gather_all(bytes);
    for (std::size_t other = 0; other < p; ++other)
        if (other != r) CHECK(everyone[other] != bytes);
}

TEST_CASE("shards: a run resumed from each rank's own progress continues as the uninterrupted run, bit for bit") {
    using T = float;
    const std::size_t p = world().size(), r = world().rank();
    const shard_layout layout = layout_of(p, {37, 30, 41, 33});
    const auto all_train = press_rows<T>(layout.total, 14);
    const auto my_train = row_block(all_train, layout.first[r], layout.size[r]);
    tenon::mpi_team team(world());
    const auto options = [&](std::size_t epochs) {
        tenon::training_options<T> o;
        o.epochs = epochs;
        o.batch_size = 5;
        o.seed = 3;
        o.patience = 0;
        o.member_rows = tenon::team_rows::shard_per_member;
        o.team = &team;
        return o;
    };
    auto whole_net = tenon::make_mlp<T>({3, 8, 1}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 9);
    tenon::adam<T> whole_rule;
    tenon::constant_rate whole_schedule(0.01);
    tenon::trainer<T>(whole_net, whole_rule, whole_schedule, options(4)).run(my_train, {});

    auto net = tenon::make_mlp<T>({3, 8, 1}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 9);
    tenon::adam<T> rule;
    tenon::constant_rate schedule(0.01);
    tenon::trainer<T> part(net, rule, schedule, options(2));
    part.run(my_train, {});
    const tenon::training_progress<T> progress = part.progress();
    CHECK(progress.order.size() == my_train.rows());
    tenon::training_options<T> rest = options(4);
    rest.resume = &progress;
    const auto out = tenon::trainer<T>(net, rule, schedule, rest).run(my_train, {});
    CHECK(out.history.size() == 4);
    CHECK(tenon::weights_checksum(net) == tenon::weights_checksum(whole_net));
    CHECK(tenon::weights_agree(net, world()));
}

TEST_CASE("a rank whose own rows fail the checks stops every rank before a step: its error there, train.team.member_failed on the others") {
    using T = float;
    if (world().size() < 2) return;
    const std::size_t r = world().rank(), last = world().size() - 1;
    auto rows = press_rows<T>(40, 15 + r);
    if (r == last) rows.features(7, 1) = std::numeric_limits<T>::quiet_NaN();  // only the last rank's shard is bad
    auto net = tenon::make_mlp<T>({3, 4, 1}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 6);
    const std::uint64_t before = tenon::weights_checksum(net);
    tenon::mpi_team team(world());
    tenon::training_options<T> o;
    o.member_rows = tenon::team_rows::shard_per_member;
    const std::string code = code_of([&] { train_once(net, rows, {}, 8, 2, &team, o); });
    CHECK(code == (r == last ? "train.input.non_finite" : "train.team.member_failed"));
    CHECK(tenon::weights_checksum(net) == before);
    // The message names the failed member.
    if (r != last) {
        const std::string named = "team member " + std::to_string(last) + " of";
        CHECK_THROWS_WITH_AS(train_once(net, rows, {}, 8, 2, &team, o), doctest::Contains(named.c_str()), tenon::error);
    } else {
        CHECK_THROWS_AS(train_once(net, rows, {}, 8, 2, &team, o), tenon::error);
    }
}

TEST_CASE("ranks that disagree on row holding, shuffling or epochs refuse together: train.team.mismatch") {
    using T = float;
    if (world().size() < 2) return;
    const bool first = world().rank() == 0;
    const auto rows = press_rows<T>(60, 16);
    auto net = tenon::make_mlp<T>({3, 4, 1}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 6);
    tenon::mpi_team team(world());
    tenon::training_options<T> holding;
    holding.member_rows = first ? tenon::team_rows::shard_per_member : tenon::team_rows::all_on_every_member;
    CHECK_THROWS_WITH_AS(train_once(net, rows, {}, 8, 2, &team, holding), doctest::Contains("row holding"), tenon::error);
    tenon::training_options<T> shuffling;
    shuffling.member_rows = tenon::team_rows::shard_per_member;
    shuffling.shuffle = first;
    CHECK(code_of([&] { train_once(net, rows, {}, 8, 2, &team, shuffling); }) == "train.team.mismatch");
    tenon::training_options<T> same;
    same.member_rows = tenon::team_rows::shard_per_member;
    CHECK(code_of([&] { train_once(net, rows, {}, 8, first ? 3 : 2, &team, same); }) == "train.team.mismatch");
    CHECK(code_of([&] { train_once(net, rows, {}, 8, 2, &team, same); }) == "none");  // shards may differ in size and content
}

TEST_CASE("fit_model with shards: each rank prepares only its own table's rows, and the model equals one process's with batch b x p") {
    using T = double;
    const std::size_t p = world().size(), n = 301;
    // Rank r's table holds the log's rows r, r + p, ...: all it ever reads.
    const tenon::table mine = table_of(line_log(n, world().rank(), p));
    const tenon::table all = table_of(line_log(n, p, p));
    tenon::mpi_team team(world());
    tenon::mpi_statistics_exchange exchange(world());
    tenon::model_settings s;
    s.hidden = {12};
    s.epochs = 4;
    s.batch_size = 6;
    s.patience = 0;
    s.seed = 5;
    s.shuffle = false;
    s.learning_rate = 0.01;
    s.refit = false;  // a team does not refit, so neither does the process it is compared with
    tenon::model_settings shared = s;
    shared.team = &team;
    shared.member_rows = tenon::team_rows::shard_per_member;
    CHECK(code_of([&] { tenon::fit_model<T>(mine, line_plan(), tenon::all_rows(mine.row_count()), {}, shared); }) == "train.option.invalid");
    shared.exchange = &exchange;
    // The last tenth of each shard validates.
    const std::size_t own = mine.row_count(), own_validation = own / 10;
    std::vector<std::size_t> train_rows(own - own_validation), validation_rows(own_validation);
    std::iota(train_rows.begin(), train_rows.end(), std::size_t(0));
    std::iota(validation_rows.begin(), validation_rows.end(), own - own_validation);
    std::size_t steps_per_epoch = 0;
    shared.on_batch = [&](const tenon::batch_progress& b) { steps_per_epoch = b.batches; };
    auto team_model = tenon::fit_model<T>(mine, line_plan(), train_rows, validation_rows, shared);
    std::uint64_t largest_shard_steps[1] = {(train_rows.size() + 5) / 6};
    world().maximum(largest_shard_steps, 1);
    CHECK(steps_per_epoch == largest_shard_steps[0]);
    CHECK(tenon::weights_agree(team_model.net, world()));

    // One process: the same rows of the whole log, in the log's order (the
    // ranks' batch k together are the log's training rows [6 k p, 6 (k + 1) p)).
    std::vector<std::size_t> all_train, all_validation;
    for (std::size_t q = 0; q < p; ++q) {
        const std::size_t rows_q = (n - q + p - 1) / p, validation_q = rows_q / 10;
        for (std::size_t i = 0; i < rows_q - validation_q; ++i) all_train.push_back(q + i * p);
        for (std::size_t i = rows_q - validation_q; i < rows_q; ++i) all_validation.push_back(q + i * p);
    }
    std::sort(all_train.begin(), all_train.end());
    std::sort(all_validation.begin(), all_validation.end());
    s.batch_size = 6 * p;
    auto alone_model = tenon::fit_model<T>(all, line_plan(), all_train, all_validation, s);
    CHECK(team_model.train_rows == all_train.size());
    CHECK(team_model.validation_rows == all_validation.size());
    CHECK(team_model.plan.feature_names() == alone_model.plan.feature_names());
    CHECK(team_model.plan.class_names() == alone_model.plan.class_names());
    const double difference = max_difference(team_model.net, alone_model.net);
    CHECK(difference <= 1e-9 * std::max(1.0, largest_weight(alone_model.net)));
    if (world().rank() == 0)
        std::printf("fit_model with shards (%zu ranks, %zu training rows on rank 0 of %zu) vs one process: max weight difference %.3g\n", p,
                    train_rows.size(), all_train.size(), difference);
}

int main(int argc, char** argv) {
    tenon::mpi_session session(&argc, &argv);
    doctest::Context context(argc, argv);
    const int failed = context.run();
    // Any rank's failure fails the job on every rank.
    double failures[1] = {failed != 0 ? 1.0 : 0.0};
    world().sum(failures, 1);
    return failures[0] > 0.0 ? 1 : 0;
}
