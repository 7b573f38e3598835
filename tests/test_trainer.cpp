// Tests of the trainer: learning, stop reasons, divergence guard, determinism.
#include <doctest/doctest.h>

#include <atomic>
#include <cmath>
#include <limits>
#include <vector>

#include <tenon/layers/network.hpp>
#include <tenon/train/trainer.hpp>
#include <tenon/update/rules.hpp>
#include <tenon/update/schedules.hpp>

namespace {

// y = sin(x0) + 0.5 x1^2 on [-2, 2]^2, an invented smooth target.
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

// Targets that are pure noise: nothing to learn, so validation stalls.
template <class T>
tenon::supervised_rows<T> noise_rows(std::size_t n, std::uint64_t seed) {
    tenon::random_engine rng(seed);
    tenon::supervised_rows<T> d;
    d.features = tenon::matrix<T>({n, 3});
    d.targets = tenon::matrix<T>({n, 1});
    for (std::size_t k = 0; k < d.features.size(); ++k) d.features.data()[k] = rng.normal<T>();
    for (std::size_t k = 0; k < d.targets.size(); ++k) d.targets.data()[k] = rng.normal<T>();
    return d;
}

template <class T>
tenon::network<T> small_net(std::size_t inputs, std::uint64_t seed) {
    return tenon::make_mlp<T>({inputs, 16, 16, 1}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, seed);
}

// A layer that passes its input through until armed, then adds NaN: it
// injects a non-finite value into the forward pass on demand.
template <class T>
class poison_layer : public tenon::layer<T> {
public:
    bool armed = false;
    tenon::var<T> forward(tenon::tape<T>& t, tenon::var<T> x, tenon::run_mode) override {
        return armed ? x + t.scalar(std::numeric_limits<T>::quiet_NaN()) : x;
    }
    const char* kind() const noexcept override { return "poison"; }
    tenon::layer_record describe() const override { return this->base_record(); }
    std::size_t output_width(std::size_t w) const override { return w; }
};

template <class T>
std::vector<T> flat_weights(tenon::network<T>& net) {
    std::vector<T> w;
    for (auto* p : net.parameters()) w.insert(w.end(), p->value().data(), p->value().data() + p->size());
    return w;
}

}  // namespace

TEST_CASE_TEMPLATE("training reduces the loss of a smooth regression well below the variance", T, float, double) {
    auto train = wave_rows<T>(512, 1), val = wave_rows<T>(128, 2);
    auto net = small_net<T>(2, 3);
    tenon::adam<T> rule;
    tenon::constant_rate schedule(0.01);
    tenon::training_options<T> o;
    o.epochs = 60;
    o.batch_size = 32;
    o.patience = 0;
    tenon::trainer<T> tr(net, rule, schedule, o);
    const auto out = tr.run(train, val);
    CHECK(out.reason == tenon::stop_reason::epoch_limit);
    REQUIRE(out.history.size() == 60);
    // The target's variance is about 0.5 (sin over [-2,2] plus a parabola);
    // a fitted network should bring the mean squared error far below it.
    CHECK(out.history.back().validation_loss < 0.02);
    CHECK(out.history.front().validation_loss > out.history.back().validation_loss);
    CHECK(out.best_epoch >= 1);
    CHECK(out.steps == 60u * 16u);
}

TEST_CASE_TEMPLATE("early stopping stops after `patience` stale epochs and restores the best weights", T, float, double) {
    auto train = noise_rows<T>(200, 5), val = noise_rows<T>(100, 6);
    auto net = small_net<T>(3, 7);
    tenon::adam<T> rule;
    tenon::constant_rate schedule(0.01);
    tenon::training_options<T> o;
    o.epochs = 500;
    o.patience = 4;
    tenon::trainer<T> tr(net, rule, schedule, o);
    const auto out = tr.run(train, val);
    CHECK(out.reason == tenon::stop_reason::no_improvement);
    CHECK(out.history.size() == out.best_epoch + 4);
    // The network now holds the best epoch's weights: its validation loss is
    // the best one recorded.
    double loss = 0, metric = 0;
    tr.assess(val, loss, metric);
    CHECK(loss == doctest::Approx(out.best_validation_loss).epsilon(1e-6));
    // The kept epoch is the first epoch of least validation loss in the
    // history (with min_improvement 0 any lower loss is an improvement), and
    // the loss reported as the best is that epoch's recorded loss.
    std::size_t first_least = 0;
    for (std::size_t i = 1; i < out.history.size(); ++i)
        if (out.history[i].validation_loss < out.history[first_least].validation_loss) first_least = i;
    CHECK(out.best_epoch == first_least + 1);
    CHECK(out.history[out.best_epoch - 1].validation_loss == out.best_validation_loss);
}

TEST_CASE("patience in steps and a minimum of steps hold early stopping back") {
    // A learning rate of 0 leaves the weights as they are: the validation
    // loss never improves on epoch 1's, so every stop below is set by the
    // counts alone. 64 rows in batches of 32: 2 steps an epoch.
    auto train = noise_rows<double>(64, 11), val = noise_rows<double>(40, 12);
    const auto run = [&](std::size_t patience_steps, std::size_t min_steps) {
        auto net = small_net<double>(3, 13);
        tenon::gradient_descent<double> rule;
        tenon::constant_rate schedule(0.0);
        tenon::training_options<double> o;
        o.epochs = 1000;
        o.patience = 2;
        o.patience_steps = patience_steps;
        o.min_steps = min_steps;
        tenon::trainer<double> tr(net, rule, schedule, o);
        return tr.run(train, val);
    };
    const auto epochs_only = run(0, 0);
    CHECK(epochs_only.best_epoch == 1);
    CHECK(epochs_only.history.size() == 3);  // 2 stale epochs after the best
    const auto by_steps = run(20, 0);
    CHECK(by_steps.reason == tenon::stop_reason::no_improvement);
    CHECK(by_steps.steps == 2 + 20);  // 20 steps after the best epoch's 2
    CHECK(by_steps.history.size() == 11);
    const auto at_least = run(20, 60);
    CHECK(at_least.steps == 60);
    CHECK(at_least.best_epoch == 1);
}

TEST_CASE("a smoothed validation curve keeps the epoch where the smoothed loss is least") {
    // Exponential smoothing s_k = a s_(k-1) + (1 - a) loss_k with s_1 = loss_1
    // (Brown 1956, exponential smoothing): recomputed here from the history.
    auto train = wave_rows<double>(128, 14), val = wave_rows<double>(24, 15);
    auto net = small_net<double>(2, 16);
    tenon::adam<double> rule;
    tenon::constant_rate schedule(0.02);
    tenon::training_options<double> o;
    o.epochs = 60;
    o.patience = 5;
    o.smoothing = 0.6;
    tenon::trainer<double> tr(net, rule, schedule, o);
    const auto out = tr.run(train, val);
    double smoothed = 0, least = 0;
    std::size_t kept = 0;
    for (std::size_t i = 0; i < out.history.size(); ++i) {
        const double v = out.history[i].validation_loss;
        smoothed = i == 0 ? v : 0.6 * smoothed + 0.4 * v;
        if (i == 0 || smoothed < least) {
            least = smoothed;
            kept = i + 1;
        }
    }
    CHECK(out.best_epoch == kept);
    CHECK(out.best_validation_loss == out.history[kept - 1].validation_loss);
    o.smoothing = 1.0;
    CHECK_THROWS_WITH(tenon::trainer<double>(net, rule, schedule, o), doctest::Contains("smoothing must be in [0, 1)"));
}

TEST_CASE("the time budget is read from the injected clock") {
    auto train = wave_rows<double>(100, 1), val = wave_rows<double>(20, 2);
    auto net = small_net<double>(2, 3);
    tenon::gradient_descent<double> rule;
    tenon::constant_rate schedule(0.01);
    double now = 1000.0;
    tenon::training_options<double> o;
    o.epochs = 1000;
    o.batch_size = 10;  // 10 batches per epoch
    o.patience = 0;
    o.time_budget_seconds = 25.0;
    o.clock = [&now] { return now; };
    // Every batch "takes" one second of the fake clock.
    o.on_batch = [&now](const tenon::batch_progress&) { now += 1.0; };
    tenon::trainer<double> tr(net, rule, schedule, o);
    const auto out = tr.run(train, val);
    CHECK(out.reason == tenon::stop_reason::time_budget);
    CHECK(out.steps == 25);  // stopped after the batch that reached 25 s
    CHECK(out.history.size() == 3);
    CHECK(out.best_epoch == 2);  // the third epoch was cut short and not validated
    CHECK(out.seconds == doctest::Approx(25.0));
}

TEST_CASE("cancellation from the host stops after the current batch") {
    auto train = wave_rows<float>(100, 1), val = wave_rows<float>(20, 2);
    auto net = small_net<float>(2, 3);
    tenon::adam<float> rule;
    tenon::constant_rate schedule(0.01);
    std::atomic<bool> cancel{false};
    tenon::training_options<float> o;
    o.epochs = 100;
    o.batch_size = 10;
    o.cancel = &cancel;
    o.on_batch = [&cancel](const tenon::batch_progress& p) {
        if (p.epoch == 2 && p.batch == 4) cancel = true;
    };
    tenon::trainer<float> tr(net, rule, schedule, o);
    const auto out = tr.run(train, val);
    CHECK(out.reason == tenon::stop_reason::cancelled);
    CHECK(out.steps == 14);
    CHECK(out.best_epoch == 1);
}

TEST_CASE("an epoch observer can stop training") {
    auto train = wave_rows<double>(50, 1), val = wave_rows<double>(20, 2);
    auto net = small_net<double>(2, 3);
    tenon::adam<double> rule;
    tenon::constant_rate schedule(0.01);
    tenon::training_options<double> o;
    o.epochs = 100;
    o.on_epoch = [](const tenon::epoch_summary& s) { return s.epoch < 3; };
    tenon::trainer<double> tr(net, rule, schedule, o);
    const auto out = tr.run(train, val);
    CHECK(out.reason == tenon::stop_reason::cancelled);
    CHECK(out.history.size() == 3);
}

TEST_CASE_TEMPLATE("the divergence guard lowers the learning rate and recovers", T, float, double) {
    // Gradient descent on a least-squares problem diverges geometrically when
    // the step exceeds 2 / L, L the largest eigenvalue of the Hessian
    // (Nocedal & Wright 2006, section 3.3); here L is about E[x^2] ~ 1.3, so
    // a rate of 1000 overflows within one epoch of single-row steps, and ten
    // halvings bring it back into the stable range.
    auto train = wave_rows<T>(128, 1), val = wave_rows<T>(32, 2);
    auto net = tenon::make_mlp<T>({2, 1}, tenon::activation::identity, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 3);
    tenon::gradient_descent<T> rule;
    tenon::constant_rate schedule(1000.0);
    tenon::training_options<T> o;
    o.epochs = 3;
    o.batch_size = 1;
    o.patience = 0;
    o.divergence_retries = 40;
    tenon::trainer<T> tr(net, rule, schedule, o);
    const auto out = tr.run(train, val);
    CHECK(out.reason == tenon::stop_reason::epoch_limit);
    REQUIRE(out.history.size() == 3);
    CHECK(out.history.front().retries > 0);
    CHECK(out.history.back().learning_rate < 2.0);
    CHECK(std::isfinite(out.history.back().validation_loss));
    for (auto w : flat_weights(net)) CHECK(std::isfinite(w));
}

TEST_CASE_TEMPLATE("injected NaN exhausts the retries and stops with the last good weights", T, float, double) {
    auto train = wave_rows<T>(64, 1), val = wave_rows<T>(16, 2);
    tenon::network<T> net = small_net<T>(2, 3);
    auto& poison = net.add(poison_layer<T>(), "poison");
    tenon::adam<T> rule;
    tenon::constant_rate schedule(0.01);
    std::vector<T> before_epoch3;
    tenon::training_options<T> o;
    o.epochs = 10;
    o.patience = 0;
    o.divergence_retries = 2;
    o.on_epoch = [&](const tenon::epoch_summary& s) {
        if (s.epoch == 2) {
            poison.armed = true;  // every forward pass from epoch 3 on yields NaN
            before_epoch3 = flat_weights(net);
        }
        return true;
    };
    o.keep_best = false;
    tenon::trainer<T> tr(net, rule, schedule, o);
    const auto out = tr.run(train, val);
    CHECK(out.reason == tenon::stop_reason::diverged);
    REQUIRE(out.history.size() == 3);
    CHECK(out.history.back().retries == 2);
    CHECK(out.message.find("non-finite") != std::string::npos);
    CHECK(flat_weights(net) == before_epoch3);
}

TEST_CASE_TEMPLATE("the same seed gives bit-identical weights and history", T, float, double) {
    auto train = wave_rows<T>(100, 1), val = wave_rows<T>(30, 2);
    auto run = [&](std::uint64_t seed) {
        auto net = small_net<T>(2, 3);
        tenon::adam<T> rule;
        tenon::constant_rate schedule(0.01);
        tenon::training_options<T> o;
        o.epochs = 5;
        o.batch_size = 16;
        o.seed = seed;
        tenon::trainer<T> tr(net, rule, schedule, o);
        const auto out = tr.run(train, val);
        std::vector<double> losses;
        for (const auto& e : out.history) losses.push_back(e.validation_loss);
        return std::make_pair(flat_weights(net), losses);
    };
    const auto a = run(11), b = run(11), c = run(12);
    CHECK(a.first == b.first);
    CHECK(a.second == b.second);
    CHECK(a.first != c.first);  // another seed shuffles differently
}

TEST_CASE("a classifier trained with cross-entropy separates two interleaved classes") {
    // Two classes on concentric rings (invented): not linearly separable, so
    // the hidden layer must do the work.
    tenon::random_engine rng(21);
    auto rings = [&](std::size_t n) {
        tenon::supervised_rows<double> d;
        d.features = tenon::matrix<double>({n, 2});
        d.class_count = 2;
        for (std::size_t i = 0; i < n; ++i) {
            const std::size_t c = i % 2;
            const double r = (c == 0 ? 0.5 : 1.5) + rng.uniform(-0.2, 0.2), a = rng.uniform(0.0, 6.283185307179586);
            d.features(i, 0) = r * std::cos(a);
            d.features(i, 1) = r * std::sin(a);
            d.labels.push_back(c);
        }
        return d;
    };
    auto train = rings(400), val = rings(200);
    auto net = tenon::make_mlp<double>({2, 16, 2}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 4);
    tenon::adam<double> rule;
    tenon::constant_rate schedule(0.02);
    tenon::training_options<double> o;
    o.loss = tenon::loss_kind::cross_entropy;
    o.epochs = 80;
    o.patience = 20;
    tenon::trainer<double> tr(net, rule, schedule, o);
    const auto out = tr.run(train, val);
    double loss = 0, accuracy = 0;
    tr.assess(val, loss, accuracy);
    CHECK(accuracy > 0.97);
    CHECK(out.best_epoch > 0);
}

TEST_CASE("trainer inputs that cannot work are clear errors") {
    auto net = small_net<double>(2, 3);
    tenon::adam<double> rule;
    tenon::constant_rate schedule(0.01);
    tenon::training_options<double> o;
    auto good = wave_rows<double>(10, 1);
    tenon::supervised_rows<double> empty;
    {
        tenon::trainer<double> tr(net, rule, schedule, o);
        CHECK_THROWS_WITH_AS(tr.run(empty, empty), "[train.rows.empty] trainer: the training rows are empty", tenon::error);
        auto bad = good;
        bad.features(3, 1) = std::numeric_limits<double>::quiet_NaN();
        CHECK_THROWS_WITH_AS(tr.run(bad, empty), "[train.input.non_finite] trainer: training feature at row 3, column 1 is nan", tenon::error);
        auto wide = wave_rows<double>(10, 1);
        wide.features = tenon::matrix<double>({10, 3});
        wide.features.fill(0.0);
        CHECK_THROWS_WITH_AS(tr.run(good, wide), "[core.shape.mismatch] trainer: validation features have 3 columns, the training features 2",
                             tenon::error);
        auto labelled = good;
        labelled.class_count = 2;
        labelled.labels.assign(10, 0);
        CHECK_THROWS_WITH_AS(tr.run(labelled, empty), "[train.option.invalid] trainer: class labels need the cross-entropy loss, not l2",
                             tenon::error);
    }
    o.batch_size = 0;
    CHECK_THROWS_WITH_AS(tenon::trainer<double>(net, rule, schedule, o), "[train.option.invalid] trainer: batch_size must be at least 1",
                         tenon::error);
}
