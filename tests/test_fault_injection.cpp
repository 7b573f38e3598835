// Fault injection: every fault a host's environment can throw at tenon
// (a failing write, fsync or rename, a full disk, an allocation failure in
// a training step, a predictor swap or a save, NaN and infinity in the data
// and in the gradients, cancellation at any epoch boundary) must lose
// nothing: the previous model file stays intact, the error is clear, the
// host process lives on, and what the objects hold afterwards is stated.
//
// This file replaces the global allocation functions (to fail the Nth
// allocation and to count live allocations), which affects the whole
// executable, so it is an executable of its own: tenon_fault_tests (label
// "fault"). The counting allocator of tenon_allocation_tests is separate.
#include <doctest/doctest.h>

#include <atomic>
#include <cerrno>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <filesystem>
#include <limits>
#include <new>
#include <string>
#include <vector>

#include <tenon/autodiff/custom_operation.hpp>
#include <tenon/deploy/model_file.hpp>
#include <tenon/deploy/predictor.hpp>
#include <tenon/layers/network.hpp>
#include <tenon/train/trainer.hpp>
#include <tenon/train/workflow.hpp>
#include <tenon/update/rules.hpp>
#include <tenon/update/schedules.hpp>

#if !defined(_WIN32)
#include <fcntl.h>
#include <unistd.h>
#endif

#include "deploy_test_support.hpp"

#if defined(__GNUC__) && !defined(__clang__)
#pragma GCC diagnostic ignored "-Wmismatched-new-delete"
#endif

// --- the injecting allocator ----------------------------------------------------------------
// `countdown` > 0 arms it: the allocation that brings it to zero throws
// std::bad_alloc (once; later ones succeed again, as after a transient
// shortage). `live` counts allocations not yet freed, so a leak shows as a
// difference, whatever the sanitizers see.
namespace {
std::atomic<long> countdown{0};
std::atomic<long> live{0};
std::atomic<bool> fired{false};
thread_local bool paused = false;  // the test's own bookkeeping is never failed

void* allocate_or_fail(std::size_t size) {
    if (!paused && countdown.load(std::memory_order_relaxed) > 0 && countdown.fetch_sub(1) == 1) {
        fired = true;
        throw std::bad_alloc();
    }
    void* p = std::malloc(size ? size : 1);
    if (!p) throw std::bad_alloc();
    live.fetch_add(1, std::memory_order_relaxed);
    return p;
}
void release(void* p) noexcept {
    if (!p) return;
    live.fetch_sub(1, std::memory_order_relaxed);
    std::free(p);
}
}  // namespace

void* operator new(std::size_t size) { return allocate_or_fail(size); }
void* operator new[](std::size_t size) { return allocate_or_fail(size); }
void* operator new(std::size_t size, const std::nothrow_t&) noexcept {
    try {
        return allocate_or_fail(size);
    } catch (...) {
        return nullptr;
    }
}
void* operator new[](std::size_t size, const std::nothrow_t& tag) noexcept { return operator new(size, tag); }
void operator delete(void* p) noexcept { release(p); }
void operator delete[](void* p) noexcept { release(p); }
void operator delete(void* p, std::size_t) noexcept { release(p); }
void operator delete[](void* p, std::size_t) noexcept { release(p); }

namespace {

using namespace deploy_test;

void arm(long n) {
    fired = false;
    countdown = n;
}
void disarm() { countdown = 0; }

struct pause_faults {
    bool before = paused;
    pause_faults() { paused = true; }
    ~pause_faults() { paused = before; }
};

// y = sin(x0) + 0.5 x1^2, an invented smooth target (as in test_trainer.cpp).
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
        d.targets(i, 0) = static_cast<T>(std::sin(a) + 0.5 * b * b - 1.0);
    }
    return d;
}

template <class T>
std::vector<T> flat_weights(tenon::network<T>& net) {
    const pause_faults p;
    std::vector<T> w;
    for (auto* q : net.parameters()) w.insert(w.end(), q->value().data(), q->value().data() + q->size());
    return w;
}

template <class T>
bool all_finite(const std::vector<T>& w) {
    for (const T v : w)
        if (!std::isfinite(v)) return false;
    return true;
}

template <class T>
tenon::network<T> tiny_net(std::uint64_t seed) {
    return tenon::make_mlp<T>({2, 6, 1}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, seed);
}

std::vector<std::string> temporaries_of(const std::string& path) {
    std::vector<std::string> found;
    const std::filesystem::path p(path);
    for (const auto& entry : std::filesystem::directory_iterator(p.parent_path()))
        if (entry.path().filename().string().rfind("." + p.filename().string() + ".tenon-", 0) == 0) found.push_back(entry.path().string());
    return found;
}

std::string temp_path(const std::string& name) {
    return (std::filesystem::temp_directory_path() / ("tenon_fault_" + std::to_string(::getpid()) + "_" + name)).string();
}

// A pump model file; `seed` tells two files apart.
tenon::model_file<float> pump_file(std::uint64_t seed) {
    const auto t = pump_table(120, 5);
    auto model = tenon::fit_model<float>(t, condition_plan(), range(0, 90), range(90, 120), small_settings(seed));
    return tenon::make_model_file(model, t, range(0, 90), small_settings(seed));
}

// Passes everything to the host's file system, but fails one step with a
// chosen errno: writing stops after `room` bytes (a full disk), or fsync,
// close, rename or the directory fsync fail.
class failing_file_system : public tenon::file_system {
public:
    enum class step { none, write, sync, close, rename, sync_directory };
    failing_file_system(step s, int error, std::size_t room = 0) : step_(s), error_(error), room_(room) {}

    int create(const std::string& path) override { return real_.create(path); }
    bool write(int h, const std::uint8_t* data, std::size_t size) override {
        if (step_ != step::write) return real_.write(h, data, size);
        real_.write(h, data, std::min(size, room_));
        errno = error_;
        return false;
    }
    bool sync(int h) override { return step_ == step::sync ? fail() : real_.sync(h); }
    bool close(int h) override {
        const bool ok = real_.close(h);
        return step_ == step::close ? fail() : ok;
    }
    bool rename(const std::string& a, const std::string& b) override { return step_ == step::rename ? fail() : real_.rename(a, b); }
    bool sync_directory(const std::string& d) override { return step_ == step::sync_directory ? fail() : real_.sync_directory(d); }
    bool remove(const std::string& p) override { return real_.remove(p); }
    bool set_permissions(int h, const std::string& target) override { return real_.set_permissions(h, target); }

private:
    bool fail() {
        errno = error_;
        return false;
    }
    step step_;
    int error_;
    std::size_t room_;
    tenon::native_file_system real_;
};

// Identity forward; its backward adds `poison` (NaN or infinity) to the
// gradient when armed: a fault in the gradients with a finite loss.
template <class T>
class gradient_poison : public tenon::custom_operation<T> {
public:
    bool armed = false;
    T poison = std::numeric_limits<T>::quiet_NaN();
    const char* name() const noexcept override { return "gradient_poison"; }
    tenon::shape2 output_shape(const tenon::operand_list<T>& in) const override { return tenon::shape_of(in[0]); }
    void forward(const tenon::operand_list<T>& in, tenon::matrix<T>& out) const override {
        std::copy(in[0].data(), in[0].data() + in[0].size(), out.data());
    }
    void backward(const tenon::operand_list<T>&, const tenon::matrix<T>&, const tenon::matrix<T>& g, tenon::matrix<T>* const* grads) const override {
        if (!grads[0]) return;
        for (std::size_t k = 0; k < g.size(); ++k) grads[0]->data()[k] += g.data()[k] + (armed && k == 0 ? poison : T(0));
    }
};

template <class T>
class gradient_poison_layer : public tenon::layer<T> {
public:
    gradient_poison<T> op;
    tenon::var<T> forward(tenon::tape<T>& t, tenon::var<T> x, tenon::run_mode) override { return t.apply(op, {x}); }
    const char* kind() const noexcept override { return "gradient_poison"; }
    tenon::layer_record describe() const override { return this->base_record(); }
    std::size_t output_width(std::size_t w) const override { return w; }
};

}  // namespace

// --- files ----------------------------------------------------------------------------------

TEST_CASE("a full disk, or a failing fsync, close or rename, leaves the previous model file intact and says why") {
    const auto old_file = pump_file(1), new_file = pump_file(2);
    const std::string path = temp_path("disk.tnm");
    const auto old_bytes = tenon::model_file_to_bytes(old_file);
    const auto new_size = tenon::model_file_to_bytes(new_file).size();
    using step = failing_file_system::step;
    struct scenario {
        step where;
        int error;
        std::size_t room;
    };
    const scenario scenarios[] = {
        {step::write, ENOSPC, 0},
        {step::write, ENOSPC, 1},
        {step::write, ENOSPC, new_size / 2},
        {step::write, ENOSPC, new_size - 1},
        {step::write, EIO, 100},
        {step::sync, EIO, 0},
        {step::sync, ENOSPC, 0},
        {step::close, EIO, 0},
        {step::rename, EXDEV, 0},
        {step::rename, EACCES, 0},
        {step::rename, ENOSPC, 0},
    };
    std::size_t survived = 0;
    for (const auto& s : scenarios) {
        tenon::save_model_file(path, old_file);
        failing_file_system fs(s.where, s.error, s.room);
        try {
            tenon::save_model_file(path, new_file, fs);
            FAIL("the save did not report the fault");
        } catch (const tenon::error& e) {
            CHECK(e.code() == "deploy.file.io");
            const std::string what = e.what();
            CHECK(what.find(std::strerror(s.error)) != std::string::npos);
            CHECK(what.find("the previous file is unchanged") != std::string::npos);
            CHECK(what.find(path) != std::string::npos);
        }
        CHECK(tenon::read_file_bounded(path, 1 << 20) == old_bytes);
        CHECK(tenon::load_model_file<float>(path).metadata->seed == 1);
        CHECK(temporaries_of(path).empty());
        ++survived;
    }
    CHECK(survived == sizeof(scenarios) / sizeof(scenarios[0]));

    // After the rename only the directory fsync can fail: the new file is in
    // place and complete, and the message says its durability is in doubt.
    tenon::save_model_file(path, old_file);
    failing_file_system late(step::sync_directory, EIO);
    CHECK_THROWS_WITH_AS(tenon::save_model_file(path, new_file, late), doctest::Contains("may not survive a power loss"), tenon::error);
    CHECK(tenon::load_model_file<float>(path).metadata->seed == 2);
    CHECK(temporaries_of(path).empty());
    std::remove(path.c_str());
}

#if defined(__linux__)
TEST_CASE("the host's file system reports a full device (Linux /dev/full) as a failed write with ENOSPC") {
    // Linux's /dev/full accepts opens and fails every write with ENOSPC
    // (null(4) manual page): the native writer must report it, not loop.
    tenon::native_file_system fs;
    const int h = ::open("/dev/full", O_WRONLY | O_CLOEXEC);
    REQUIRE(h >= 0);
    const std::vector<std::uint8_t> bytes(4096, 7);
    errno = 0;
    CHECK_FALSE(fs.write(h, bytes.data(), bytes.size()));
    CHECK(errno == ENOSPC);
    CHECK(fs.close(h));
}
#endif

TEST_CASE("an allocation failure at any point of saving leaves the previous file and no temporary file") {
    const auto old_file = pump_file(1), new_file = pump_file(2);
    const std::string path = temp_path("alloc.tnm");
    std::size_t faults = 0;
    for (long n = 1;; ++n) {
        tenon::save_model_file(path, old_file);
        const long before = live.load();
        bool threw = false;
        arm(n);
        try {
            tenon::save_model_file(path, new_file);
        } catch (const std::bad_alloc&) {
            threw = true;
        }
        disarm();
        CHECK(live.load() == before);
        if (!threw) break;
        ++faults;
        CHECK(tenon::load_model_file<float>(path).metadata->seed == 1);
        CHECK(temporaries_of(path).empty());
    }
    CHECK(faults > 5);
    CHECK(tenon::load_model_file<float>(path).metadata->seed == 2);
    std::remove(path.c_str());
    MESSAGE("allocation failures injected while saving: " << faults);
}

// --- training -------------------------------------------------------------------------------

TEST_CASE_TEMPLATE(
    "an allocation failure at any point of a training run propagates, keeps the last step's weights, leaks nothing, and a retry completes", T, float,
    double) {
    const auto train = wave_rows<T>(24, 1), validation = wave_rows<T>(8, 2);
    tenon::training_options<T> o;
    o.epochs = 3;
    o.batch_size = 8;
    o.patience = 0;
    o.keep_best = false;  // so the network holds the last step's weights
    {
        // Warm-up: the matrix kernel's per-thread scratch grows once and stays.
        auto net = tiny_net<T>(3);
        tenon::adam<T> rule;
        tenon::constant_rate schedule(0.01);
        tenon::trainer<T>(net, rule, schedule, o).run(train, validation);
    }
    std::size_t faults = 0;
    for (long n = 1;; ++n) {
        const long before = live.load();
        bool threw = false;
        {
            auto net = tiny_net<T>(3);
            tenon::adam<T> rule;
            tenon::constant_rate schedule(0.01);
            std::vector<T> last_step = flat_weights(net);
            std::uint64_t steps_done = 0;
            tenon::training_options<T> opts = o;
            opts.on_batch = [&](const tenon::batch_progress&) {
                const pause_faults p;
                last_step = flat_weights(net);
                ++steps_done;
            };
            tenon::trainer<T> tr(net, rule, schedule, opts);
            arm(n);
            try {
                tr.run(train, validation);
            } catch (const std::bad_alloc&) {
                threw = true;
            }
            disarm();
            if (threw) {
                ++faults;
                // Documented state: the weights of the last completed step,
                // and the update rule's step count agrees with them.
                CHECK(flat_weights(net) == last_step);
                CHECK(rule.step_count() == steps_done);
                // The host lives on and may simply run again.
                const auto out = tr.run(train, validation);
                CHECK(out.reason == tenon::stop_reason::epoch_limit);
                CHECK(out.history.size() == 3);
                CHECK(all_finite(flat_weights(net)));
            }
        }
        CHECK(live.load() == before);  // nothing leaked, on either path
        if (!threw) break;
    }
    CHECK(faults > 20);
    MESSAGE("allocation failures injected into training runs: " << faults);
}

TEST_CASE("an allocation failure anywhere in fit_model propagates std::bad_alloc, leaks nothing, and a retry gives the same model") {
    const auto t = pump_table(80, 3);
    const auto train = range(0, 60), validation = range(60, 80);
    auto settings = small_settings(4);
    settings.epochs = 2;
    settings.ensemble = 1;  // every allocation is failed in turn: one network keeps the count small
    auto reference = tenon::fit_model<float>(t, condition_plan(), train, validation, settings);
    const auto expected = flat_weights(reference.net);
    // Count the allocations of one fit, then fail each of them in turn.
    long total = 0;
    {
        countdown = std::numeric_limits<long>::max();
        auto m = tenon::fit_model<float>(t, condition_plan(), train, validation, settings);
        total = std::numeric_limits<long>::max() - countdown.load();
        disarm();
    }
    REQUIRE_MESSAGE(total > 100, "fit_model made " << total << " allocations");
    std::vector<long> points;
    for (long n = 1; n <= total; ++n) points.push_back(n);
    std::size_t faults = 0;
    for (const long n : points) {
        const long before = live.load();
        arm(n);
        try {
            auto m = tenon::fit_model<float>(t, condition_plan(), train, validation, settings);
            disarm();
            FAIL("allocation " << n << " of " << total << " did not fail");
        } catch (const std::bad_alloc&) {
            ++faults;
        }
        disarm();
        CHECK(live.load() == before);
    }
    CHECK(faults == points.size());
    auto retry = tenon::fit_model<float>(t, condition_plan(), train, validation, settings);
    CHECK(flat_weights(retry.net) == expected);
    MESSAGE("allocation failures injected into fit_model: " << faults << " of " << total << " allocations");
}

TEST_CASE_TEMPLATE("NaN or infinity in the training data is refused before any step, with the weights untouched", T, float, double) {
    const T bad_values[] = {std::numeric_limits<T>::quiet_NaN(), std::numeric_limits<T>::infinity(), -std::numeric_limits<T>::infinity()};
    std::size_t refused = 0;
    for (const T bad : bad_values)
        for (int where = 0; where < 4; ++where) {  // training features, training targets, validation features, validation targets
            auto train = wave_rows<T>(24, 1), validation = wave_rows<T>(8, 2);
            auto& d = where < 2 ? train : validation;
            (where % 2 == 0 ? d.features : d.targets).data()[5 % (where % 2 == 0 ? d.features.size() : d.targets.size())] = bad;
            auto net = tiny_net<T>(3);
            const auto before = flat_weights(net);
            tenon::adam<T> rule;
            tenon::constant_rate schedule(0.01);
            tenon::training_options<T> o;
            o.epochs = 2;
            tenon::trainer<T> tr(net, rule, schedule, o);
            try {
                tr.run(train, validation);
                FAIL("non-finite data was accepted");
            } catch (const tenon::error& e) {
                CHECK(e.code() == "train.input.non_finite");
                CHECK(std::string(e.what()).find(where < 2 ? "training" : "validation") != std::string::npos);
                ++refused;
            }
            CHECK(flat_weights(net) == before);
            CHECK(rule.step_count() == 0);
        }
    CHECK(refused == 12);
}

TEST_CASE_TEMPLATE("NaN or infinity in the gradients rolls back to the last good epoch; the loss stays finite throughout", T, float, double) {
    for (const T poison : {std::numeric_limits<T>::quiet_NaN(), std::numeric_limits<T>::infinity(), -std::numeric_limits<T>::infinity()}) {
        const auto train = wave_rows<T>(32, 1), validation = wave_rows<T>(8, 2);
        tenon::network<T> net =
            tenon::make_mlp<T>({2, 6, 1}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 3);
        auto& layer = net.add(gradient_poison_layer<T>(), "poison");
        tenon::adam<T> rule;
        tenon::constant_rate schedule(0.01);
        std::vector<T> before_epoch3;
        std::vector<std::uint8_t> rule_before_epoch3;
        std::vector<double> batch_losses;
        tenon::training_options<T> o;
        o.epochs = 6;
        o.batch_size = 8;
        o.patience = 0;
        o.divergence_retries = 2;
        o.keep_best = false;
        o.on_batch = [&](const tenon::batch_progress& p) { batch_losses.push_back(p.loss); };
        o.on_epoch = [&](const tenon::epoch_summary& s) {
            if (s.epoch == 2) {
                layer.op.poison = poison;
                layer.op.armed = true;
                before_epoch3 = flat_weights(net);
                rule_before_epoch3 = rule.save_state();
            }
            return true;
        };
        tenon::trainer<T> tr(net, rule, schedule, o);
        const auto out = tr.run(train, validation);
        CHECK(out.reason == tenon::stop_reason::diverged);
        REQUIRE(out.history.size() == 3);
        CHECK(out.history.back().retries == 2);
        CHECK(flat_weights(net) == before_epoch3);
        CHECK(rule.save_state() == rule_before_epoch3);
        for (const double l : batch_losses) CHECK(std::isfinite(l));
        // Disarmed, the same objects train on.
        layer.op.armed = false;
        o.on_epoch = nullptr;
        tenon::trainer<T> again(net, rule, schedule, o);
        CHECK(again.run(train, validation).reason == tenon::stop_reason::epoch_limit);
        CHECK(all_finite(flat_weights(net)));
    }
}

TEST_CASE_TEMPLATE("cancellation at every epoch boundary keeps the best weights, and resuming loses nothing", T, float, double) {
    const auto train = wave_rows<T>(40, 1), validation = wave_rows<T>(10, 2);
    const std::size_t epochs = 6;
    tenon::training_options<T> o;
    o.epochs = epochs;
    o.batch_size = 8;
    o.patience = 0;
    o.keep_best = false;

    // The uninterrupted run, with the weights after every epoch.
    std::vector<std::vector<T>> after_epoch(1);
    std::vector<T> reference_final;
    {
        auto net = tiny_net<T>(9);
        tenon::adam<T> rule;
        tenon::constant_rate schedule(0.02);
        after_epoch[0] = flat_weights(net);
        auto opts = o;
        opts.on_epoch = [&](const tenon::epoch_summary&) {
            after_epoch.push_back(flat_weights(net));
            return true;
        };
        tenon::trainer<T>(net, rule, schedule, opts).run(train, validation);
        reference_final = flat_weights(net);
    }
    REQUIRE(after_epoch.size() == epochs + 1);

    std::size_t cancellations = 0;
    for (std::size_t k = 1; k < epochs; ++k) {
        // (a) Stopped by the epoch observer after epoch k, then resumed from
        // the trainer's progress: the same weights as the uninterrupted run.
        {
            auto net = tiny_net<T>(9);
            tenon::adam<T> rule;
            tenon::constant_rate schedule(0.02);
            auto opts = o;
            opts.on_epoch = [k](const tenon::epoch_summary& s) { return s.epoch < k; };
            tenon::trainer<T> first(net, rule, schedule, opts);
            const auto out = first.run(train, validation);
            CHECK(out.reason == tenon::stop_reason::cancelled);
            CHECK(out.history.size() == k);
            CHECK(flat_weights(net) == after_epoch[k]);
            const tenon::training_progress<T> progress = first.progress();
            CHECK(progress.epochs_done == k);
            auto resumed_options = o;
            resumed_options.resume = &progress;
            tenon::trainer<T>(net, rule, schedule, resumed_options).run(train, validation);
            CHECK(flat_weights(net) == reference_final);
        }
        // (b) The host's cancel flag, raised at the boundary after epoch k:
        // the trainer stops after the next batch and restores the best
        // validated epoch among 1..k.
        {
            auto net = tiny_net<T>(9);
            tenon::adam<T> rule;
            tenon::constant_rate schedule(0.02);
            std::atomic<bool> cancel{false};
            auto opts = o;
            opts.keep_best = true;
            opts.cancel = &cancel;
            opts.on_epoch = [&cancel, k](const tenon::epoch_summary& s) {
                if (s.epoch == k) cancel = true;
                return true;
            };
            const auto out = tenon::trainer<T>(net, rule, schedule, opts).run(train, validation);
            CHECK(out.reason == tenon::stop_reason::cancelled);
            CHECK(out.history.size() == k + 1);  // k validated epochs and the cut one
            REQUIRE(out.best_epoch >= 1);
            CHECK(out.best_epoch <= k);
            CHECK(flat_weights(net) == after_epoch[out.best_epoch]);
            CHECK(out.message.find("cancelled") != std::string::npos);
        }
        ++cancellations;
    }
    CHECK(cancellations == epochs - 1);
}

// --- the predictor --------------------------------------------------------------------------

TEST_CASE("NaN or infinity given to the predictor is refused per call; the next call works") {
    const auto file = pump_file(1);
    tenon::predictor<float> p(file, 4);
    std::vector<float> good(p.feature_count(), 0.25f);
    const auto expected = p.predict_prepared(good.data(), 1).at(0, 0);
    for (const float bad :
         {std::numeric_limits<float>::quiet_NaN(), std::numeric_limits<float>::infinity(), -std::numeric_limits<float>::infinity()}) {
        std::vector<float> row = good;
        row[1] = bad;
        tenon::prediction_view<float> out;
        const auto status = p.try_predict_prepared(row.data(), 1, out);
        CHECK_FALSE(status.ok());
        CHECK(std::string(status.code_text()) == "deploy.input.non_finite");
        CHECK(status.column == 1);
        try {
            p.predict_prepared(row.data(), 1);
            FAIL("a non-finite feature was accepted");
        } catch (const tenon::error& e) {
            CHECK(e.code() == "deploy.input.non_finite");
        }
        CHECK(p.predict_prepared(good.data(), 1).at(0, 0) == expected);
    }
}

TEST_CASE("an allocation failure while a holder's reader refreshes or a predictor is copied leaves a working predictor") {
    const auto t = pump_table(160, 11);
    auto small = small_settings(1), wide = small_settings(2);
    wide.hidden = {24, 16};  // larger buffers than the small model's
    auto first = tenon::fit_model<float>(t, condition_plan(), range(0, 120), range(120, 160), small);
    auto second = tenon::fit_model<float>(t, condition_plan(), range(0, 120), range(120, 160), wide);
    const tenon::predictor<float> p1(first, 4), p2(second, 4);
    const std::string_view row[3] = {"64", "21.5", "glycol"};
    tenon::predictor<float> probe = p1;
    const float out1 = probe.predict_cells(row, 1).at(0, 0);
    probe = p2;
    const float out2 = probe.predict_cells(row, 1).at(0, 0);
    REQUIRE_FALSE(same_bits(out1, out2));

    std::size_t faults = 0;
    for (long n = 1;; ++n) {
        const long before = live.load();
        bool threw = false;
        {
            tenon::predictor_holder<float> holder(p1);
            tenon::predictor<float> local = holder.get(4);
            holder.store(p2);
            arm(n);
            try {
                holder.refresh(local);
            } catch (const std::bad_alloc&) {
                threw = true;
            }
            disarm();
            tenon::prediction_view<float> out;
            REQUIRE(local.try_predict_cells(row, 1, out).ok());
            // Either still the old model, whole, or the new one, whole.
            CHECK(same_bits(out.at(0, 0), threw ? out1 : out2));
            if (threw) {
                // The next refresh, without a fault, takes the new model.
                CHECK(holder.refresh(local));
                REQUIRE(local.try_predict_cells(row, 1, out).ok());
                CHECK(same_bits(out.at(0, 0), out2));
            }
        }
        CHECK(live.load() == before);
        if (!threw) break;
        ++faults;
    }
    CHECK(faults > 3);

    std::size_t copy_faults = 0;
    for (long n = 1;; ++n) {
        bool threw = false;
        tenon::predictor<float> local = p1;
        arm(n);
        try {
            local = p2;
        } catch (const std::bad_alloc&) {
            threw = true;
        }
        disarm();
        tenon::prediction_view<float> out;
        REQUIRE(local.try_predict_cells(row, 1, out).ok());
        CHECK(same_bits(out.at(0, 0), threw ? out1 : out2));
        if (!threw) break;
        ++copy_faults;
    }
    CHECK(copy_faults > 3);
    MESSAGE("allocation failures injected into predictor swaps: " << faults << " refreshes, " << copy_faults << " copies");
}
