// Tests of the update rules and the learning-rate schedules.
#include <doctest/doctest.h>

#include <cmath>
#include <cstdint>
#include <cstring>
#include <limits>
#include <memory>
#include <string>
#include <vector>

#include <Eigen/Dense>

#include <tenon/layers/network.hpp>
#include <tenon/losses/classification.hpp>
#include <tenon/losses/regression.hpp>
#include <tenon/core/parallel.hpp>
#include <tenon/update/rules.hpp>
#include <tenon/update/schedules.hpp>

using tenon::make_matrix;
using tenon::matrix;

namespace {

template <class F>
std::string code_of(F&& f) {
    try {
        f();
    } catch (const tenon::error& e) {
        return e.code();
    }
    return "no error";
}

template <class T>
void set_grad(tenon::parameter<T>& p, std::initializer_list<T> g) {
    std::size_t k = 0;
    for (T v : g) p.grad().data()[k++] = v;
}

// Rosenbrock 1960 ("An automatic method for finding the greatest or least
// value of a function", The Computer Journal 3(3)):
// f(x, y) = (1 - x)^2 + 100 (y - x^2)^2, minimum 0 at (1, 1).
template <class T>
tenon::var<T> rosenbrock(tenon::tape<T>& t, tenon::parameter<T>& x, tenon::parameter<T>& y) {
    const auto vx = t.track(x), vy = t.track(y);
    return tenon::sum(tenon::square(vx - T(1)) + T(100) * tenon::square(vy - tenon::square(vx)));
}

template <class T>
void minimize_rosenbrock(tenon::update_rule<T>& rule, const tenon::rate_schedule& schedule, std::uint64_t steps, tenon::parameter<T>& x,
                         tenon::parameter<T>& y) {
    tenon::tape<T> t;
    const std::vector<tenon::parameter<T>*> params = {&x, &y};
    for (std::uint64_t s = 0; s < steps; ++s) {
        t.clear();
        x.clear_gradient();
        y.clear_gradient();
        t.backward(rosenbrock(t, x, y));
        rule.apply(params, static_cast<T>(schedule.rate(s, 0)));
    }
}

}  // namespace

// ---------------------------------------------------------------- single steps

TEST_CASE_TEMPLATE("gradient descent, momentum and Nesterov steps follow their formulas", T, float, double) {
    tenon::parameter<T> w("w", make_matrix<T>({{T(1), T(-2)}}));
    const std::vector<tenon::parameter<T>*> params = {&w};
    set_grad(w, {T(0.5), T(-1)});
    tenon::gradient_descent<T> gd;
    gd.apply(params, T(0.1));
    CHECK(w.value()(0, 0) == doctest::Approx(0.95));
    CHECK(w.value()(0, 1) == doctest::Approx(-1.9));
    CHECK(gd.step_count() == 1);

    // Sutskever et al. 2013 eqs. 1-2: v1 = -lr g, v2 = mu v1 - lr g.
    tenon::parameter<T> m("m", make_matrix<T>({{T(0)}}));
    set_grad(m, {T(1)});
    tenon::momentum<T> classical({T(0.9), false});
    classical.apply({&m}, T(0.1));
    classical.apply({&m}, T(0.1));
    CHECK(m.value()(0, 0) == doctest::Approx(-0.1 - 0.19));
    CHECK(classical.buffer(0, 0)(0, 0) == doctest::Approx(-0.19));
    CHECK(std::string(classical.buffer_name(0)) == "velocity");

    // Nesterov (Bengio et al. 2013 form): w += mu v_new - lr g.
    tenon::parameter<T> n("n", make_matrix<T>({{T(0)}}));
    set_grad(n, {T(1)});
    tenon::momentum<T> nesterov({T(0.9), true});
    nesterov.apply({&n}, T(0.1));
    CHECK(n.value()(0, 0) == doctest::Approx(0.9 * -0.1 - 0.1));
    nesterov.apply({&n}, T(0.1));
    CHECK(n.value()(0, 0) == doctest::Approx(-0.19 + 0.9 * -0.19 - 0.1));
    CHECK(std::string(nesterov.kind()) == "nesterov");
}

TEST_CASE_TEMPLATE("Adam's first step moves each weight by about the learning rate times the gradient's sign", T, float, double) {
    // Kingma & Ba 2015, section 2.1: |step| is about alpha when bias-corrected
    // m and v come from one gradient (m_hat / sqrt(v_hat) = g / |g|).
    tenon::parameter<T> w("w", make_matrix<T>({{T(1), T(1), T(1), T(1)}}));
    set_grad(w, {T(3), T(-0.001), T(250), T(-7)});
    tenon::adam<T> rule;
    const T lr = T(0.01);
    rule.apply({&w}, lr);
    const T signs[] = {T(1), T(-1), T(1), T(-1)};
    for (std::size_t k = 0; k < 4; ++k) CHECK(T(1) - w.value()(0, k) == doctest::Approx(static_cast<double>(lr * signs[k])).epsilon(1e-4));
    CHECK(std::string(rule.buffer_name(1)) == "second_moment");
    CHECK(rule.buffer(0, 0)(0, 0) == doctest::Approx(0.3));  // (1 - beta1) g
}

TEST_CASE_TEMPLATE("Adam's reordered step equals Algorithm 1 of Kingma & Ba 2015 within a few roundings", T, float, double) {
    // rules.hpp computes lr sqrt(1 - b2^t) / (1 - b1^t) m / (sqrt(v) + eps sqrt(1 - b2^t)),
    // the paper's own reordering (end of its section 2); here Algorithm 1 is
    // written out literally in double for 200 steps of 64 weights with
    // gradients spanning six decades, and the two trajectories compared.
    const std::size_t n = 64;
    tenon::parameter<T> p("w", tenon::shape2{1, n});
    tenon::random_engine rng(11);
    std::vector<double> w(n), m(n, 0.0), v(n, 0.0);
    for (std::size_t k = 0; k < n; ++k) w[k] = static_cast<double>(p.value().data()[k] = rng.normal(T(0), T(1)));
    tenon::adam<T> rule;
    const double lr = 1e-3, b1 = 0.9, b2 = 0.999, eps = 1e-8;
    double worst = 0.0;
    for (int t = 1; t <= 200; ++t) {
        for (std::size_t k = 0; k < n; ++k) {
            const double scale = std::pow(10.0, static_cast<double>(k % 7) - 4.0);  // 1e-4 .. 1e2
            p.grad().data()[k] = static_cast<T>(scale * (w[k] - 0.5) + scale * rng.normal(0.0, 0.1));
        }
        rule.apply({&p}, static_cast<T>(lr));
        for (std::size_t k = 0; k < n; ++k) {
            const double g = static_cast<double>(p.grad().data()[k]);
            m[k] = b1 * m[k] + (1 - b1) * g;
            v[k] = b2 * v[k] + (1 - b2) * g * g;
            const double m_hat = m[k] / (1 - std::pow(b1, t)), v_hat = v[k] / (1 - std::pow(b2, t));
            w[k] -= lr * m_hat / (std::sqrt(v_hat) + eps);
            worst = std::max(worst, std::abs(w[k] - static_cast<double>(p.value().data()[k])));
        }
    }
    // Each step moves a weight by at most about lr; the float trajectory
    // carries about one rounding of the weight per step (200 steps, |w| < 3).
    CHECK(worst < (sizeof(T) == 4 ? 200 * 3 * 6e-8 : 1e-12));
}

TEST_CASE_TEMPLATE("update rules give the same bits on one thread and on an executor's threads, clearing the gradients or not", T, float, double) {
    // Parameters of 40,000 and 70 elements (a band of rows per thread, and
    // one whole on the calling thread) and a frozen one. With set_clears_gradients(true) the weights are the
    // same and every trainable gradient is zero after each step (adam clears
    // in its own pass, the others through update_and_clear's default).
    const auto run = [](tenon::executor* workers, const char* which, bool clears) {
        tenon::parameter<T> a("a", tenon::shape2{200, 200}), b("b", tenon::shape2{1, 70}), frozen("f", tenon::shape2{3, 3});
        frozen.set_trainable(false);
        tenon::random_engine rng(5);
        for (auto* p : {&a, &b})
            for (std::size_t k = 0; k < p->size(); ++k) p->value().data()[k] = rng.normal(T(0), T(1));
        std::unique_ptr<tenon::update_rule<T>> rule;
        if (std::string(which) == "adam")
            rule = std::make_unique<tenon::adam<T>>();
        else if (std::string(which) == "rmsprop")
            rule = std::make_unique<tenon::rmsprop<T>>();
        else if (std::string(which) == "adagrad")
            rule = std::make_unique<tenon::adagrad<T>>();
        else
            rule = std::make_unique<tenon::momentum<T>>();
        rule->set_executor(workers);
        rule->set_clears_gradients(clears);
        CHECK(rule->clears_gradients() == clears);
        for (int step = 0; step < 4; ++step) {
            for (auto* p : {&a, &b, &frozen})
                for (std::size_t k = 0; k < p->size(); ++k) p->grad().data()[k] = rng.normal(T(0), T(0.3));
            const T frozen_gradient = frozen.grad()(1, 1);
            rule->apply({&a, &b, &frozen}, T(0.01));
            std::size_t nonzero = 0;
            for (auto* p : {&a, &b})
                for (std::size_t k = 0; k < p->size(); ++k) nonzero += p->grad().data()[k] != T(0);
            CHECK(nonzero == (clears ? 0u : a.size() + b.size()));
            CHECK(frozen.grad()(1, 1) == frozen_gradient);  // a frozen parameter's gradient is left alone
        }
        std::vector<T> out(a.value().data(), a.value().data() + a.size());
        out.insert(out.end(), b.value().data(), b.value().data() + b.size());
        return out;
    };
    tenon::thread_pool two(2), three(3);
    for (const char* which : {"adam", "rmsprop", "adagrad", "momentum"}) {
        CAPTURE(which);
        const auto alone = run(nullptr, which, false);
        for (const bool clears : {false, true}) {
            CAPTURE(clears);
            const auto cleared_alone = run(nullptr, which, clears);
            CHECK(std::memcmp(alone.data(), cleared_alone.data(), alone.size() * sizeof(T)) == 0);
            for (tenon::thread_pool* pool : {&two, &three}) {
                CAPTURE(pool->concurrency());
                const auto shared = run(pool, which, clears);
                REQUIRE(alone.size() == shared.size());
                CHECK(std::memcmp(alone.data(), shared.data(), alone.size() * sizeof(T)) == 0);
            }
        }
    }
}

TEST_CASE_TEMPLATE("Adam's vector pass gives the scalar loop's bits, with clipping, weight decay and special values", T, float, double) {
    // One parameter of 67 elements goes through the widest vector pass the
    // CPU has (AVX-512, AVX2 or NEON) for all but its tail; 67 parameters of
    // one element each take the scalar loop alone. Same values, same bits
    // (up to which NaN a NaN result carries).
    const T specials[] = {T(0), -T(0), std::numeric_limits<T>::denorm_min(), T(1e-30), T(40), T(-3)};
    const std::size_t n = 67;
    tenon::random_engine rng(77);
    tenon::parameter<T> whole("whole", tenon::shape2{1, n});
    std::vector<std::unique_ptr<tenon::parameter<T>>> singles;
    for (std::size_t k = 0; k < n; ++k) {
        singles.push_back(std::make_unique<tenon::parameter<T>>("single" + std::to_string(k), tenon::shape2{1, 1}));
        const T w = rng.below(5) == 0 ? specials[rng.below(6)] : rng.normal(T(0), T(1));
        whole.value().data()[k] = w;
        singles[k]->value().data()[0] = w;
    }
    tenon::update_options<T> options;
    options.clip_value = T(0.5);
    options.weight_decay = T(0.01);
    tenon::adam<T> vector_rule({}, options), scalar_rule({}, options);
    std::vector<tenon::parameter<T>*> single_pointers;
    for (auto& p : singles) single_pointers.push_back(p.get());
    for (int step = 0; step < 5; ++step) {
        for (std::size_t k = 0; k < n; ++k) {
            const T g = rng.below(5) == 0 ? specials[rng.below(6)] : rng.normal(T(0), T(2));
            whole.grad().data()[k] = g;
            singles[k]->grad().data()[0] = g;
        }
        vector_rule.apply({&whole}, T(0.01));
        scalar_rule.apply(single_pointers, T(0.01));
    }
    std::size_t differing = 0;
    for (std::size_t k = 0; k < n; ++k) {
        const T a = whole.value().data()[k], b = singles[k]->value().data()[0];
        differing += std::memcmp(&a, &b, sizeof(T)) != 0 && !(std::isnan(a) && std::isnan(b));
    }
    CHECK(differing == 0);
}

TEST_CASE_TEMPLATE("apply_and_check tells whether every gradient was finite, from Adam's own pass or a scan", T, float, double) {
    // 37 elements: whole vectors of every width and a scalar tail; the bad
    // element sits in a vector, in the tail, or nowhere.
    const T inf = std::numeric_limits<T>::infinity(), nan = std::numeric_limits<T>::quiet_NaN();
    for (const bool scanning_rule : {true, false}) {
        for (const std::size_t at : {std::size_t(3), std::size_t(36), std::size_t(99)}) {
            for (const T bad : {nan, inf, -inf}) {
                CAPTURE(scanning_rule);
                CAPTURE(at);
                tenon::parameter<T> p("w", tenon::shape2{1, 37}), frozen("f", tenon::shape2{1, 5});
                for (std::size_t k = 0; k < 37; ++k) p.grad().data()[k] = T(0.1) * static_cast<T>(k);
                if (at < 37) p.grad().data()[at] = bad;
                frozen.grad().fill(nan);  // frozen parameters are neither updated nor looked at
                frozen.set_trainable(false);
                std::unique_ptr<tenon::update_rule<T>> rule;
                if (scanning_rule)
                    rule = std::make_unique<tenon::adam<T>>();
                else
                    rule = std::make_unique<tenon::rmsprop<T>>();
                const bool finite = rule->apply_and_check({&p, &frozen}, T(0.01));
                CHECK(finite == (at >= 37));
                if (!scanning_rule && at < 37) CHECK(p.value()(0, 0) == T(0));  // the scan comes first: nothing moved
            }
        }
    }
}

TEST_CASE_TEMPLATE("RMSprop, Adagrad and AdamW steps follow their formulas", T, float, double) {
    tenon::parameter<T> a("a", make_matrix<T>({{T(1)}}));
    set_grad(a, {T(2)});
    tenon::rmsprop<T> rms;
    rms.apply({&a}, T(0.01));
    // s = 0.1 * 4; step = lr g / sqrt(s).
    CHECK(a.value()(0, 0) == doctest::Approx(1.0 - 0.01 * 2.0 / std::sqrt(0.4)));

    // Duchi et al. 2011: s = g1^2 + g2^2.
    tenon::parameter<T> b("b", make_matrix<T>({{T(1)}}));
    tenon::adagrad<T> ada;
    set_grad(b, {T(3)});
    ada.apply({&b}, T(0.1));
    CHECK(b.value()(0, 0) == doctest::Approx(1.0 - 0.1));
    set_grad(b, {T(4)});
    ada.apply({&b}, T(0.1));
    CHECK(b.value()(0, 0) == doctest::Approx(0.9 - 0.1 * 4.0 / 5.0));

    // Loshchilov & Hutter 2019: with a zero gradient only the decay acts: w -= lr lambda w.
    tenon::parameter<T> c("c", make_matrix<T>({{T(2)}}));
    tenon::adamw<T> decoupled(T(0.1));
    decoupled.apply({&c}, T(0.5));
    CHECK(c.value()(0, 0) == doctest::Approx(2.0 - 0.5 * 0.1 * 2.0));
    CHECK(std::string(decoupled.kind()) == "adamw");
    // Coupled L2 decay, by contrast, enters the gradient (and Adam's normalization).
    tenon::parameter<T> d("d", make_matrix<T>({{T(2)}}));
    tenon::update_options<T> coupled;
    coupled.weight_decay = T(0.1);
    tenon::gradient_descent<T> gd(coupled);
    gd.apply({&d}, T(0.5));
    CHECK(d.value()(0, 0) == doctest::Approx(2.0 - 0.5 * 0.1 * 2.0));
}

TEST_CASE_TEMPLATE("clipping by value and by global norm", T, float, double) {
    tenon::parameter<T> p("p", make_matrix<T>({{T(0), T(0)}}));
    tenon::parameter<T> q("q", make_matrix<T>({{T(0)}}));
    tenon::update_options<T> by_value;
    by_value.clip_value = T(1);
    tenon::gradient_descent<T> clipped(by_value);
    set_grad(p, {T(5), T(-0.5)});
    clipped.apply({&p}, T(1));
    CHECK(p.value()(0, 0) == doctest::Approx(-1.0));
    CHECK(p.value()(0, 1) == doctest::Approx(0.5));

    // Pascanu et al. 2013, Algorithm 1: the gradients (3, 0) and (4) have global
    // norm 5; clipped to norm 1 they become (0.6, 0) and (0.8).
    p.value().fill(T(0));
    tenon::update_options<T> by_norm;
    by_norm.clip_global_norm = T(1);
    tenon::gradient_descent<T> normed(by_norm);
    set_grad(p, {T(3), T(0)});
    set_grad(q, {T(4)});
    normed.apply({&p, &q}, T(1));
    CHECK(p.value()(0, 0) == doctest::Approx(-0.6));
    CHECK(q.value()(0, 0) == doctest::Approx(-0.8));
    // Under the limit, nothing changes.
    set_grad(p, {T(0.3), T(0)});
    set_grad(q, {T(0.4)});
    normed.apply({&p, &q}, T(1));
    CHECK(q.value()(0, 0) == doctest::Approx(-1.2));
}

TEST_CASE_TEMPLATE("frozen parameters are not updated", T, float, double) {
    tenon::parameter<T> w("w", make_matrix<T>({{T(1)}}));
    tenon::parameter<T> frozen("frozen", make_matrix<T>({{T(1)}}));
    frozen.set_trainable(false);
    set_grad(w, {T(1)});
    set_grad(frozen, {T(1)});
    tenon::adam<T> rule;
    rule.apply({&w, &frozen}, T(0.1));
    CHECK(w.value()(0, 0) != T(1));
    CHECK(frozen.value()(0, 0) == T(1));
}

// ---------------------------------------------------------------- convergence

TEST_CASE_TEMPLATE("Adam and momentum reach the Rosenbrock minimum (1, 1)", T, float, double) {
    // Start at (-1.2, 1), Rosenbrock's own starting point (Rosenbrock 1960).
    {
        tenon::parameter<T> x("x", make_matrix<T>({{T(-1.2)}})), y("y", make_matrix<T>({{T(1)}}));
        tenon::adam<T> rule;
        const tenon::cosine_restarts schedule(0.02, 1e-5, 20000);
        minimize_rosenbrock(rule, schedule, 20000, x, y);
        CHECK(std::abs(x.value()(0, 0) - T(1)) < T(1e-3));
        CHECK(std::abs(y.value()(0, 0) - T(1)) < T(1e-3));
    }
    {
        tenon::parameter<T> x("x", make_matrix<T>({{T(-1.2)}})), y("y", make_matrix<T>({{T(1)}}));
        tenon::momentum<T> rule({T(0.9), false});
        const tenon::constant_rate schedule(2e-4);
        minimize_rosenbrock(rule, schedule, 60000, x, y);
        CHECK(std::abs(x.value()(0, 0) - T(1)) < T(1e-3));
        CHECK(std::abs(y.value()(0, 0) - T(1)) < T(1e-3));
    }
}

TEST_CASE_TEMPLATE("a dense layer trained by gradient descent on L2 loss reaches the least-squares solution", T, float, double) {
    // Reference: the least-squares fit computed independently by Eigen's QR
    // decomposition of [X 1] (Golub & Van Loan 2013, "Matrix Computations",
    // section 5.3); gradient descent on the mean squared error converges to it.
    const std::size_t n = 40, d = 3;
    tenon::random_engine engine(17);
    matrix<T> x({n, d}), y({n, 1});
    Eigen::MatrixXd a(n, d + 1);
    Eigen::VectorXd b(n);
    for (std::size_t i = 0; i < n; ++i) {
        double target = 0.3;
        for (std::size_t j = 0; j < d; ++j) {
            const double v = engine.uniform<double>(-1.0, 1.0);
            x(i, j) = static_cast<T>(v);
            a(static_cast<Eigen::Index>(i), static_cast<Eigen::Index>(j)) = static_cast<double>(x(i, j));
            target += (1.0 + static_cast<double>(j)) * v;
        }
        target += 0.2 * engine.normal<double>();
        y(i, 0) = static_cast<T>(target);
        a(static_cast<Eigen::Index>(i), static_cast<Eigen::Index>(d)) = 1.0;
        b(static_cast<Eigen::Index>(i)) = static_cast<double>(y(i, 0));
    }
    const Eigen::VectorXd reference = a.colPivHouseholderQr().solve(b);

    tenon::dense<T> layer(d, 1);
    tenon::gradient_descent<T> rule;
    std::vector<tenon::parameter<T>*> params;
    layer.collect_parameters(params);
    tenon::tape<T> t;
    for (int step = 0; step < 3000; ++step) {
        t.clear();
        for (auto* p : params) p->clear_gradient();
        t.backward(tenon::l2_loss(t, layer.forward(t, t.input(x), tenon::run_mode::training), y));
        rule.apply(params, T(0.2));
    }
    for (std::size_t j = 0; j < d; ++j) {
        CHECK(static_cast<double>(layer.weights().value()(j, 0)) == doctest::Approx(reference(static_cast<Eigen::Index>(j))).epsilon(1e-4));
    }
    CHECK(static_cast<double>(layer.bias().value()(0, 0)) == doctest::Approx(reference(static_cast<Eigen::Index>(d))).epsilon(1e-4));
}

TEST_CASE_TEMPLATE("a logistic model on linearly separable data reaches zero training error", T, float, double) {
    // Two classes split by the line x0 + 2 x1 = 0.5 with a margin; gradient
    // descent on binary cross-entropy separates them (the logistic loss of a
    // separable set has no finite minimum, the error reaches 0).
    const std::size_t n = 60;
    tenon::random_engine engine(23);
    matrix<T> x({n, 2}), y({n, 1});
    for (std::size_t i = 0; i < n; ++i) {
        double u, v, s;
        do {
            u = engine.uniform<double>(-1.0, 1.0);
            v = engine.uniform<double>(-1.0, 1.0);
            s = u + 2.0 * v - 0.5;
        } while (std::abs(s) < 0.1);
        x(i, 0) = static_cast<T>(u);
        x(i, 1) = static_cast<T>(v);
        y(i, 0) = s > 0 ? T(1) : T(0);
    }
    auto net = tenon::make_mlp<T>({2, 1}, tenon::activation::identity, {tenon::init_scheme::zeros}, 1);
    tenon::adam<T> rule;
    tenon::tape<T> t;
    for (int step = 0; step < 2000; ++step) {
        t.clear();
        net.clear_gradients();
        t.backward(tenon::binary_cross_entropy_loss(t, net.forward(t, x), y));
        rule.apply(net.parameters(), T(0.05));
    }
    t.clear();
    const auto logits = net.forward(t, x);
    std::size_t errors = 0;
    for (std::size_t i = 0; i < n; ++i) errors += (logits.value()(i, 0) > T(0)) != (y(i, 0) > T(0.5));
    CHECK(errors == 0);
}

// ---------------------------------------------------------------- state

TEST_CASE_TEMPLATE("update rule state round-trips through bytes exactly", T, float, double) {
    auto run = [](tenon::update_rule<T>& rule, tenon::update_rule<T>& resumed) {
        auto net = tenon::make_mlp<T>({3, 4, 2}, tenon::activation::tanh, {}, 4);
        tenon::random_engine engine(6);
        matrix<T> x({8, 3}), y({8, 2});
        for (std::size_t k = 0; k < x.size(); ++k) x.data()[k] = static_cast<T>(engine.uniform<double>(-1, 1));
        for (std::size_t k = 0; k < y.size(); ++k) y.data()[k] = static_cast<T>(engine.uniform<double>(-1, 1));
        tenon::tape<T> t;
        auto step = [&](tenon::update_rule<T>& r) {
            t.clear();
            net.clear_gradients();
            t.backward(tenon::l2_loss(t, net.forward(t, x), y));
            r.apply(net.parameters(), T(0.05));
        };
        for (int i = 0; i < 5; ++i) step(rule);
        const auto bytes = rule.save_state();
        const auto saved = net.snapshot();
        for (int i = 0; i < 5; ++i) step(rule);
        const auto uninterrupted = net.snapshot();
        net.restore(saved);
        resumed.load_state(bytes);
        CHECK(resumed.step_count() == 5);
        CHECK(resumed.save_state() == bytes);
        for (int i = 0; i < 5; ++i) step(resumed);
        const auto continued = net.snapshot();
        for (std::size_t i = 0; i < continued.values.size(); ++i) CHECK(continued.values[i] == uninterrupted.values[i]);
    };
    {
        tenon::adam<T> a, b;
        run(a, b);
    }
    {
        tenon::momentum<T> a({T(0.8), true}), b({T(0.8), true});
        run(a, b);
    }
    {
        tenon::rmsprop<T> a, b;
        run(a, b);
    }
    {
        tenon::adagrad<T> a, b;
        run(a, b);
    }
    {
        tenon::adamw<T> a(T(0.05)), b(T(0.05));
        run(a, b);
    }
}

TEST_CASE("an update rule returns to an in-memory copy of its state bit for bit") {
    tenon::parameter<float> w("w", make_matrix<float>({{1.0f, -2.0f, 0.5f}}));
    tenon::parameter<float> v("v", make_matrix<float>({{3.0f}}));
    const auto step = [&](tenon::update_rule<float>& rule, float g) {
        w.grad().fill(g);
        v.grad().fill(-g);
        rule.apply({&w, &v}, 0.01f);
    };
    tenon::adam<float> rule;
    tenon::adam<float>::state_copy copy;
    rule.copy_state_into(copy);  // before any step: not laid out
    step(rule, 0.3f);
    step(rule, -0.7f);
    const std::vector<std::uint8_t> at_two = rule.save_state();
    rule.copy_state_into(copy);
    step(rule, 1.5f);
    CHECK(rule.save_state() != at_two);
    rule.restore_state(copy);
    CHECK(rule.save_state() == at_two);  // step counter and both moments
    CHECK(rule.step_count() == 2);

    // A copy from another layout (here: none yet) is taken over whole.
    tenon::adam<float> fresh;
    tenon::adam<float>::state_copy empty;
    fresh.copy_state_into(empty);
    rule.restore_state(empty);
    CHECK(rule.step_count() == 0);
    CHECK(rule.parameter_count() == 0);
    rule.restore_state(copy);
    CHECK(rule.save_state() == at_two);

    // Another buffer count is refused and the state kept.
    tenon::momentum<float> other;
    step(other, 0.2f);
    tenon::momentum<float>::state_copy one_buffer;
    other.copy_state_into(one_buffer);
    CHECK(code_of([&] { rule.restore_state(one_buffer); }) == "model.update.state_mismatch");
    CHECK(rule.save_state() == at_two);

    // A copy whose buffer does not have its parameter's shape is refused too.
    tenon::adam<float>::state_copy damaged = copy;
    damaged.buffers[1] = tenon::matrix<float>({2, 2});
    CHECK(code_of([&] { rule.restore_state(damaged); }) == "model.update.state_mismatch");
    CHECK(rule.save_state() == at_two);
}

TEST_CASE("update rule state errors") {
    tenon::parameter<double> w("w", make_matrix<double>({{1.0, 2.0}}));
    tenon::parameter<double> v("v", make_matrix<double>({{1.0}}));
    tenon::adam<double> rule;
    rule.apply({&w}, 0.1);
    CHECK(code_of([&] { rule.apply({&w, &v}, 0.1); }) == "model.update.state_mismatch");
    CHECK(code_of([&] { rule.apply({&v}, 0.1); }) == "model.update.state_mismatch");
    CHECK(code_of([&] { rule.apply({&w}, -0.1); }) == "model.update.option");
    const auto bytes = rule.save_state();
    tenon::rmsprop<double> other;
    CHECK(code_of([&] { other.load_state(bytes); }) == "model.update.state_mismatch");
    for (std::size_t n = 0; n < bytes.size(); ++n) {
        const std::vector<std::uint8_t> cut(bytes.begin(), bytes.begin() + static_cast<std::ptrdiff_t>(n));
        tenon::adam<double> fresh;
        const std::string code = code_of([&] { fresh.load_state(cut); });
        CHECK((code == "model.record.truncated" || code == "model.record.malformed"));
        CHECK(fresh.step_count() == 0);
    }
    auto bad = bytes;
    bad[0] ^= 0x1;
    CHECK(code_of([&] { rule.load_state(bad); }) == "model.record.malformed");
    CHECK(rule.step_count() == 1);  // unchanged by the failed load
    rule.reset();
    CHECK(rule.step_count() == 0);
    rule.apply({&v}, 0.1);  // a new layout after reset
    CHECK(rule.parameter_count() == 1);
    CHECK(code_of([&] { rule.buffer(1, 0); }) == "core.argument.invalid");

    CHECK(code_of([] { tenon::adam<double>({1.0, 0.999, 1e-8, 0.0}); }) == "model.update.option");
    CHECK(code_of([] { tenon::momentum<double>({1.5, false}); }) == "model.update.option");
    CHECK(code_of([] { tenon::rmsprop<double>({0.9, 0.0}); }) == "model.update.option");
    CHECK(code_of([] { tenon::adagrad<double>({-1.0}); }) == "model.update.option");
    CHECK(code_of([] { tenon::adamw<double>(0.0); }) == "model.update.option");
    tenon::update_options<double> o;
    o.clip_value = -1.0;
    CHECK(code_of([&] { tenon::gradient_descent<double> g(o); }) == "model.update.option");
}

// ---------------------------------------------------------------- schedules

TEST_CASE("learning-rate schedules give their formulas' rates") {
    CHECK(tenon::constant_rate(0.1).rate(1000, 7) == 0.1);

    const tenon::step_decay steps(1.0, 0.5, 10);
    CHECK(steps.rate(0, 9) == 1.0);
    CHECK(steps.rate(0, 10) == 0.5);
    CHECK(steps.rate(0, 25) == 0.25);

    const tenon::exponential_decay exponential(2.0, 0.9);
    CHECK(exponential.rate(0, 3) == doctest::Approx(2.0 * 0.729));

    // Loshchilov & Hutter 2017, eq. 5: maximum at each restart, midpoint at
    // half a period, and periods 10, 20, 40 with T_mult = 2.
    const tenon::cosine_restarts cosine(1.0, 0.1, 10, 2);
    CHECK(cosine.rate(0, 0) == doctest::Approx(1.0));
    CHECK(cosine.rate(5, 0) == doctest::Approx(0.55));
    CHECK(cosine.rate(9, 0) < 0.15);
    CHECK(cosine.rate(10, 0) == doctest::Approx(1.0));
    CHECK(cosine.rate(20, 0) == doctest::Approx(0.55));
    CHECK(cosine.rate(30, 0) == doctest::Approx(1.0));
    const tenon::cosine_restarts fixed(1.0, 0.0, 4);
    CHECK(fixed.rate(6, 0) == doctest::Approx(0.5));

    // Goyal et al. 2017, section 2.2: linear ramp to the target rate.
    const tenon::linear_warmup warm(std::make_unique<tenon::constant_rate>(0.4), 4);
    CHECK(warm.rate(0, 0) == doctest::Approx(0.1));
    CHECK(warm.rate(3, 0) == doctest::Approx(0.4));
    CHECK(warm.rate(100, 0) == doctest::Approx(0.4));
}

TEST_CASE("the stall reduction lowers the rate when the metric stops improving") {
    tenon::stall_reduction_options o;
    o.initial_rate = 1.0;
    o.rate_multiplier = 0.5;
    o.tolerated_reports = 2;
    o.floor_fraction = 0.2;
    tenon::stall_reduction s(o);
    for (double loss : {5.0, 4.0, 3.0}) s.report_metric(loss);
    CHECK(s.rate(0, 0) == 1.0);
    s.report_metric(3.0);
    s.report_metric(3.1);
    CHECK(s.rate(0, 0) == 1.0);  // two reports without improvement: still patient
    const auto bytes = s.save_state();
    s.report_metric(3.0);
    CHECK(s.rate(0, 0) == 0.5);  // the third one reduces
    for (int i = 0; i < 6; ++i) s.report_metric(3.0);
    CHECK(s.rate(0, 0) == 0.2);  // floored at 0.2 of the initial rate
    s.report_metric(1.0);
    CHECK(s.best() == 1.0);

    // Restored state continues exactly.
    tenon::stall_reduction restored(o);
    restored.load_state(bytes);
    CHECK(restored.reports_without_improvement() == 2);
    restored.report_metric(3.0);
    CHECK(restored.rate(0, 0) == 0.5);

    // Watching a metric that should grow.
    tenon::stall_reduction_options up = o;
    up.maximize = true;
    up.tolerated_reports = 0;
    tenon::stall_reduction accuracy(up);
    accuracy.report_metric(0.5);
    accuracy.report_metric(0.6);
    CHECK(accuracy.rate(0, 0) == 1.0);
    accuracy.report_metric(0.55);
    CHECK(accuracy.rate(0, 0) == 0.5);
    CHECK(code_of([&] { accuracy.report_metric(std::nan("")); }) == "model.schedule.option");

    // A warm-up passes reports and state to the schedule it wraps.
    tenon::linear_warmup warm(std::make_unique<tenon::stall_reduction>(up), 2);
    warm.report_metric(0.5);
    warm.report_metric(0.4);
    CHECK(warm.rate(5, 0) == 0.5);
    tenon::linear_warmup warm_copy(std::make_unique<tenon::stall_reduction>(up), 2);
    warm_copy.load_state(warm.save_state());
    CHECK(warm_copy.rate(5, 0) == 0.5);
}

TEST_CASE("the stall reduction's defaults: five tolerated reports, halving, a 0.1% margin, a floor at 1/1024") {
    // The values and their reasons are beside stall_reduction_options.
    const tenon::stall_reduction_options o;
    CHECK(o.rate_multiplier == 0.5);
    CHECK(o.tolerated_reports == 5);
    CHECK(o.relative_margin == 1e-3);
    CHECK(o.settle_reports == 0);
    CHECK(o.floor_fraction == 1.0 / 1024.0);
    tenon::stall_reduction s;
    s.report_metric(1.0);
    for (int i = 0; i < 5; ++i) s.report_metric(0.9995);  // better by less than 0.1%: no improvement
    CHECK(s.rate(0, 0) == 1e-3);
    s.report_metric(0.9985);  // better by more than 0.1%: the count restarts
    CHECK(s.reports_without_improvement() == 0);
    for (int i = 0; i < 5; ++i) s.report_metric(1.0);
    CHECK(s.rate(0, 0) == 1e-3);
    s.report_metric(1.0);  // the sixth report without improvement halves the rate
    CHECK(s.rate(0, 0) == 0.5e-3);
    for (int i = 0; i < 6 * 20; ++i) s.report_metric(1.0);  // twenty more cuts are due; the floor stops them after ten
    CHECK(s.rate(0, 0) == doctest::Approx(1e-3 / 1024.0));
}

TEST_CASE("schedule option and state errors") {
    CHECK(code_of([] { tenon::constant_rate(-1.0); }) == "model.schedule.option");
    CHECK(code_of([] { tenon::step_decay(1.0, 0.5, 0); }) == "model.schedule.option");
    CHECK(code_of([] { tenon::exponential_decay(1.0, 1.5); }) == "model.schedule.option");
    CHECK(code_of([] { tenon::cosine_restarts(0.1, 0.2, 10); }) == "model.schedule.option");
    CHECK(code_of([] { tenon::linear_warmup(nullptr, 3); }) == "model.schedule.option");
    tenon::stall_reduction_options o;
    o.rate_multiplier = 1.0;
    CHECK(code_of([&] { tenon::stall_reduction s(o); }) == "model.schedule.option");
    o.rate_multiplier = 0.5;
    o.floor_fraction = 1.5;
    CHECK(code_of([&] { tenon::stall_reduction s(o); }) == "model.schedule.option");

    tenon::stall_reduction s;
    const auto bytes = tenon::constant_rate(0.1).save_state();
    CHECK(code_of([&] { s.load_state(bytes); }) == "model.schedule.option");
    auto own = s.save_state();
    own.pop_back();
    CHECK(code_of([&] { s.load_state(own); }) == "model.record.truncated");
    own = s.save_state();
    own.push_back(0);
    CHECK(code_of([&] { s.load_state(own); }) == "model.record.malformed");
}

// ---------------------------------------------------------------- error registry

TEST_CASE("every model error code is listed in the registry") {
    // Each code below is triggered by a test in test_layers.cpp,
    // test_losses.cpp or this file.
    const char* mine[] = {"model.layer.option",
                          "model.batch_norm.batch_too_small",
                          "model.network.duplicate_name",
                          "model.network.unknown_parameter",
                          "model.network.snapshot_mismatch",
                          "model.record.truncated",
                          "model.record.malformed",
                          "model.record.missing_field",
                          "model.record.unknown_kind",
                          "model.loss.label_range",
                          "model.loss.weights",
                          "model.loss.target",
                          "model.loss.option",
                          "model.update.option",
                          "model.update.state_mismatch",
                          "model.schedule.option"};
    std::size_t in_registry = 0;
    for (const auto* e = tenon::error_registry_begin(); e != tenon::error_registry_end(); ++e) {
        if (std::string(e->code).rfind("model.", 0) == 0) ++in_registry;
    }
    CHECK(in_registry == sizeof(mine) / sizeof(mine[0]));
    for (const char* code : mine) {
        bool found = false;
        for (const auto* e = tenon::error_registry_begin(); e != tenon::error_registry_end(); ++e) found = found || std::string(e->code) == code;
        CHECK_MESSAGE(found, code);
    }
}
