// Tests of the losses: worked values, weights, smoothing, gradients, errors.
#include <doctest/doctest.h>

#include <cmath>
#include <cstdint>
#include <string>
#include <vector>

#include <tenon/autodiff/gradient_check.hpp>
#include <tenon/core/random.hpp>
#include <tenon/losses/classification.hpp>
#include <tenon/losses/regression.hpp>

using tenon::make_matrix;
using tenon::matrix;

namespace {

template <class T>
matrix<T> random_matrix(std::size_t rows, std::size_t cols, std::uint64_t seed, double low = -1.0, double high = 1.0) {
    tenon::random_engine e(seed);
    matrix<T> m({rows, cols});
    for (std::size_t k = 0; k < m.size(); ++k) m.data()[k] = static_cast<T>(e.uniform<double>(low, high));
    return m;
}

// Rows that are probability distributions.
matrix<double> random_distribution(std::size_t rows, std::size_t cols, std::uint64_t seed) {
    matrix<double> m = random_matrix<double>(rows, cols, seed, 0.05, 1.0);
    for (std::size_t i = 0; i < rows; ++i) {
        double total = 0.0;
        for (std::size_t j = 0; j < cols; ++j) total += m(i, j);
        for (std::size_t j = 0; j < cols; ++j) m(i, j) /= total;
    }
    return m;
}

template <class T>
T loss_value(tenon::var<T> v) {
    REQUIRE(v.shape() == tenon::shape2{1, 1});
    return v.value()(0, 0);
}

template <class F>
std::string code_of(F&& f) {
    try {
        f();
    } catch (const tenon::error& e) {
        return e.code();
    }
    return "no error";
}

// Checks d(loss)/d(prediction) by finite differences.
template <class Build>
double gradient_error(const matrix<double>& start, Build&& build) {
    tenon::parameter<double> p("prediction", start);
    const auto r = tenon::check_gradients({&p}, [&](tenon::tape<double>& t) { return build(t, t.track(p)); });
    return r.max_rel_error;
}

}  // namespace

// ---------------------------------------------------------------- worked values

TEST_CASE_TEMPLATE("cross-entropy of a uniform prediction over K classes is ln K", T, float, double) {
    // Uniform softmax: -log(1/K) = ln K for any label (definition of cross-entropy).
    for (std::size_t k : {2u, 3u, 10u}) {
        tenon::tape<T> t;
        matrix<T> logits({4, k});
        logits.fill(T(0.7));
        const std::vector<std::size_t> labels = {0, k - 1, 1, 0};
        CHECK(loss_value(tenon::cross_entropy_loss(t, t.input(logits), labels)) == doctest::Approx(std::log(static_cast<double>(k))));
    }
}

TEST_CASE_TEMPLATE("cross-entropy stays finite for huge logits", T, float, double) {
    // log-softmax shifted by the row maximum (stable): logits 1000 and 0 give
    // a loss of about 1000 for the wrong label and about e^-1000 for the right one.
    tenon::tape<T> t;
    const auto logits = t.input(make_matrix<T>({{T(1000), T(0)}}));
    CHECK(loss_value(tenon::cross_entropy_loss(t, logits, std::vector<std::size_t>{1})) == doctest::Approx(1000.0));
    CHECK(loss_value(tenon::cross_entropy_loss(t, logits, std::vector<std::size_t>{0})) == doctest::Approx(0.0));
}

TEST_CASE_TEMPLATE("KL divergence of a distribution from itself is zero", T, float, double) {
    // KL(p || p) = 0 (Kullback & Leibler 1951; Gibbs' inequality holds with equality).
    const matrix<T> p = make_matrix<T>({{T(0.2), T(0.3), T(0.5)}, {T(0.6), T(0.4), T(0)}});
    tenon::tape<T> t;
    matrix<T> log_p({2, 3});
    for (std::size_t k = 0; k < p.size(); ++k) log_p.data()[k] = p.data()[k] > T(0) ? std::log(p.data()[k]) : T(-60);
    CHECK(loss_value(tenon::kl_divergence_loss(t, t.input(log_p), p)) == doctest::Approx(0.0).scale(1.0).epsilon(1e-5));
    matrix<T> q = p;
    q(1, 2) = T(1e-30);
    CHECK(loss_value(tenon::kl_divergence_probabilities_loss(t, t.input(q), p)) == doctest::Approx(0.0).scale(1.0).epsilon(1e-5));
    // A worked value: KL([0.5, 0.5] || [0.25, 0.75]) = 0.5 ln 2 + 0.5 ln (2/3).
    const matrix<T> half = make_matrix<T>({{T(0.5), T(0.5)}});
    const auto kl = tenon::kl_divergence_probabilities_loss(t, t.input(make_matrix<T>({{T(0.25), T(0.75)}})), half);
    CHECK(loss_value(kl) == doctest::Approx(0.5 * std::log(2.0) + 0.5 * std::log(2.0 / 3.0)));
}

TEST_CASE_TEMPLATE("Huber loss is half the squared error inside delta and linear outside", T, float, double) {
    // Huber 1964: r^2/2 for |r| <= delta, delta (|r| - delta/2) beyond.
    tenon::tape<T> t;
    tenon::loss_options<T> o;
    o.delta = T(1.5);
    o.reduction = tenon::loss_reduction::sum;
    const matrix<T> zero = make_matrix<T>({{T(0)}});
    auto huber_at = [&](T r) { return loss_value(tenon::huber_loss(t, t.input(make_matrix<T>({{r}})), zero, o)); };
    CHECK(huber_at(T(1)) == doctest::Approx(0.5));
    CHECK(huber_at(T(-1.5)) == doctest::Approx(0.5 * 1.5 * 1.5));
    CHECK(huber_at(T(4)) == doctest::Approx(1.5 * (4.0 - 0.75)));
    CHECK(huber_at(T(-10)) == doctest::Approx(1.5 * (10.0 - 0.75)));
    // Linear outside: equal steps of the residual give equal steps of the loss.
    CHECK(huber_at(T(6)) - huber_at(T(5)) == doctest::Approx(huber_at(T(5)) - huber_at(T(4))));
}

TEST_CASE_TEMPLATE("binary cross-entropy of logit 0 is ln 2", T, float, double) {
    // sigmoid(0) = 1/2, so -log(1/2) = ln 2 for target 0 or 1.
    tenon::tape<T> t;
    const auto z = t.input(make_matrix<T>({{T(0), T(0)}}));
    CHECK(loss_value(tenon::binary_cross_entropy_loss(t, z, make_matrix<T>({{T(1), T(0)}}))) == doctest::Approx(std::log(2.0)));
    // Stable far out: logit 200 with target 0 costs 200, with target 1 about e^-200.
    const auto big = t.input(make_matrix<T>({{T(200)}}));
    CHECK(loss_value(tenon::binary_cross_entropy_loss(t, big, make_matrix<T>({{T(0)}}))) == doctest::Approx(200.0));
    CHECK(loss_value(tenon::binary_cross_entropy_loss(t, big, make_matrix<T>({{T(1)}}))) == doctest::Approx(0.0));
}

TEST_CASE_TEMPLATE("L1 and L2 losses with mean and sum reductions", T, float, double) {
    tenon::tape<T> t;
    const auto p = t.input(make_matrix<T>({{T(1), T(2)}, {T(3), T(4)}}));
    const matrix<T> y = make_matrix<T>({{T(0), T(4)}, {T(3), T(1)}});
    CHECK(loss_value(tenon::l1_loss(t, p, y)) == doctest::Approx((1.0 + 2.0 + 0.0 + 3.0) / 4.0));
    CHECK(loss_value(tenon::l2_loss(t, p, y)) == doctest::Approx((1.0 + 4.0 + 0.0 + 9.0) / 4.0));
    tenon::loss_options<T> sum;
    sum.reduction = tenon::loss_reduction::sum;
    CHECK(loss_value(tenon::l2_loss(t, p, y, sum)) == doctest::Approx(14.0));
    // Sample weights {3, 1}: weighted mean over elements = (3 * 5 + 1 * 9) / (2 * 4).
    tenon::loss_options<T> weighted;
    weighted.sample_weights = {T(3), T(1)};
    CHECK(loss_value(tenon::l2_loss(t, p, y, weighted)) == doctest::Approx((3.0 * 5.0 + 9.0) / 8.0));
    weighted.reduction = tenon::loss_reduction::sum;
    CHECK(loss_value(tenon::l2_loss(t, p, y, weighted)) == doctest::Approx(3.0 * 5.0 + 9.0));
}

TEST_CASE_TEMPLATE("label smoothing and class weights in cross-entropy", T, float, double) {
    tenon::tape<T> t;
    const matrix<T> z = make_matrix<T>({{T(2), T(0), T(-1)}, {T(0.5), T(1), T(0)}});
    const std::vector<std::size_t> labels = {0, 1};
    auto log_softmax = [&](std::size_t i, std::size_t j) {
        double s = 0.0;
        for (std::size_t k = 0; k < 3; ++k) s += std::exp(static_cast<double>(z(i, k)));
        return static_cast<double>(z(i, j)) - std::log(s);
    };
    // Smoothing 0.3 over K = 3: target 0.8 on the label, 0.1 elsewhere
    // (Szegedy et al. 2016, section 7).
    tenon::loss_options<T> smooth;
    smooth.label_smoothing = T(0.3);
    double expected = 0.0;
    for (std::size_t i = 0; i < 2; ++i)
        for (std::size_t j = 0; j < 3; ++j) expected -= (j == labels[i] ? 0.8 : 0.1) * log_softmax(i, j) / 2.0;
    CHECK(loss_value(tenon::cross_entropy_loss(t, t.input(z), labels, smooth)) == doctest::Approx(expected));
    // The same through probability targets.
    const matrix<T> one_hot = make_matrix<T>({{T(1), T(0), T(0)}, {T(0), T(1), T(0)}});
    CHECK(loss_value(tenon::cross_entropy_loss(t, t.input(z), one_hot, smooth)) == doctest::Approx(expected));

    // Class weights {1, 4, 1}: weighted mean (1 l_0 + 4 l_1) / 5.
    tenon::loss_options<T> weighted;
    weighted.class_weights = {T(1), T(4), T(1)};
    const double weighted_expected = (-log_softmax(0, 0) - 4.0 * log_softmax(1, 1)) / 5.0;
    CHECK(loss_value(tenon::cross_entropy_loss(t, t.input(z), labels, weighted)) == doctest::Approx(weighted_expected));
    CHECK(loss_value(tenon::cross_entropy_loss(t, t.input(z), one_hot, weighted)) == doctest::Approx(weighted_expected));
    // Sample weights multiply in: {2, 1} -> (2 l_0 + 4 l_1) / 6.
    weighted.sample_weights = {T(2), T(1)};
    CHECK(loss_value(tenon::cross_entropy_loss(t, t.input(z), labels, weighted)) ==
          doctest::Approx((-2.0 * log_softmax(0, 0) - 4.0 * log_softmax(1, 1)) / 6.0));
}

TEST_CASE_TEMPLATE("binary cross-entropy with class weights and smoothing", T, float, double) {
    tenon::tape<T> t;
    const matrix<T> z = make_matrix<T>({{T(1), T(-2)}});
    const matrix<T> y = make_matrix<T>({{T(1), T(0)}});
    auto softplus = [](double x) { return std::log1p(std::exp(x)); };
    const double l_pos = softplus(1.0) - 1.0, l_neg = softplus(-2.0);
    tenon::loss_options<T> o;
    o.class_weights = {T(1), T(3)};  // {negative, positive}
    CHECK(loss_value(tenon::binary_cross_entropy_loss(t, t.input(z), y, o)) == doctest::Approx((3.0 * l_pos + l_neg) / 4.0));
    tenon::loss_options<T> s;
    s.label_smoothing = T(0.2);  // targets become 0.9 and 0.1
    const double expected = (softplus(1.0) - 0.9 * 1.0 + softplus(-2.0) - 0.1 * -2.0) / 2.0;
    CHECK(loss_value(tenon::binary_cross_entropy_loss(t, t.input(z), y, s)) == doctest::Approx(expected));
}

// ---------------------------------------------------------------- gradients

TEST_CASE("every loss's gradient agrees with finite differences") {
    const matrix<double> start = random_matrix<double>(4, 3, 5, -2.0, 2.0);
    const matrix<double> target = random_matrix<double>(4, 3, 6, -2.0, 2.0);
    const matrix<double> probabilities = random_distribution(4, 3, 7);
    const matrix<double> binary = random_matrix<double>(4, 3, 8, 0.0, 1.0);
    const std::vector<std::size_t> labels = {2, 0, 1, 2};

    std::vector<tenon::loss_options<double>> variants(4);
    variants[1].reduction = tenon::loss_reduction::sum;
    variants[2].sample_weights = {0.5, 2.0, 1.0, 0.0};
    variants[3].sample_weights = {1.0, 3.0, 0.5, 2.0};
    variants[3].reduction = tenon::loss_reduction::sum;
    for (std::size_t v = 0; v < variants.size(); ++v) {
        CAPTURE(v);
        auto o = variants[v];
        CHECK(gradient_error(start, [&](auto& t, auto p) { return tenon::l1_loss(t, p, target, o); }) < 1e-6);
        CHECK(gradient_error(start, [&](auto& t, auto p) { return tenon::l2_loss(t, p, target, o); }) < 1e-6);
        o.delta = 0.7;  // both branches occur for residuals in [-4, 4]
        CHECK(gradient_error(start, [&](auto& t, auto p) { return tenon::huber_loss(t, p, target, o); }) < 1e-6);
        o.delta = 1.0;
        CHECK(gradient_error(start, [&](auto& t, auto p) { return tenon::kl_divergence_loss(t, p, probabilities, o); }) < 1e-6);
        const matrix<double> positive = random_distribution(4, 3, 9);
        CHECK(gradient_error(positive, [&](auto& t, auto p) { return tenon::kl_divergence_probabilities_loss(t, p, probabilities, o); }) < 1e-6);
        o.class_weights = {1.0, 2.0, 0.5};
        o.label_smoothing = 0.1;
        CHECK(gradient_error(start, [&](auto& t, auto p) { return tenon::cross_entropy_loss(t, p, labels, o); }) < 1e-6);
        CHECK(gradient_error(start, [&](auto& t, auto p) { return tenon::cross_entropy_loss(t, p, probabilities, o); }) < 1e-6);
        o.class_weights = {1.0, 2.5};
        CHECK(gradient_error(start, [&](auto& t, auto p) { return tenon::binary_cross_entropy_loss(t, p, binary, o); }) < 1e-6);
        o.class_weights.clear();
        CHECK(gradient_error(start, [&](auto& t, auto p) { return tenon::binary_cross_entropy_loss(t, p, binary, o); }) < 1e-6);
    }
}

// ---------------------------------------------------------------- errors

TEST_CASE_TEMPLATE("bad loss inputs fail with their error codes", T, float, double) {
    tenon::tape<T> t;
    const auto z = t.input(make_matrix<T>({{T(1), T(2)}, {T(0), T(1)}}));
    const matrix<T> y = make_matrix<T>({{T(1), T(0)}, {T(0), T(1)}});
    CHECK(code_of([&] { tenon::cross_entropy_loss(t, z, std::vector<std::size_t>{0, 2}); }) == "model.loss.label_range");
    CHECK(code_of([&] { tenon::cross_entropy_loss(t, z, std::vector<std::size_t>{0}); }) == "core.shape.mismatch");
    CHECK(code_of([&] { tenon::l2_loss(t, z, make_matrix<T>({{T(1), T(0)}})); }) == "core.shape.mismatch");

    tenon::loss_options<T> o;
    o.sample_weights = {T(1)};
    CHECK(code_of([&] { tenon::l2_loss(t, z, y, o); }) == "model.loss.weights");
    o.sample_weights = {T(1), T(-1)};
    CHECK(code_of([&] { tenon::l1_loss(t, z, y, o); }) == "model.loss.weights");
    o.sample_weights = {T(0), T(0)};
    CHECK(code_of([&] { tenon::l2_loss(t, z, y, o); }) == "model.loss.weights");
    o.sample_weights.clear();
    o.class_weights = {T(1), T(1), T(1)};
    CHECK(code_of([&] { tenon::cross_entropy_loss(t, z, std::vector<std::size_t>{0, 1}, o); }) == "model.loss.weights");
    o.class_weights = {T(1), T(1)};
    CHECK(code_of([&] { tenon::l2_loss(t, z, y, o); }) == "model.loss.option");
    o.class_weights.clear();
    o.label_smoothing = T(1);
    CHECK(code_of([&] { tenon::cross_entropy_loss(t, z, y, o); }) == "model.loss.option");
    o.label_smoothing = T(0.1);
    CHECK(code_of([&] { tenon::huber_loss(t, z, y, o); }) == "model.loss.option");
    CHECK(code_of([&] { tenon::kl_divergence_loss(t, z, y, o); }) == "model.loss.option");
    o.label_smoothing = T(0);
    o.delta = T(0);
    CHECK(code_of([&] { tenon::huber_loss(t, z, y, o); }) == "model.loss.option");

    CHECK(code_of([&] { tenon::cross_entropy_loss(t, z, make_matrix<T>({{T(0.5), T(0.6)}, {T(0), T(1)}})); }) == "model.loss.target");
    CHECK(code_of([&] { tenon::kl_divergence_loss(t, z, make_matrix<T>({{T(-0.5), T(1.5)}, {T(0), T(1)}})); }) == "model.loss.target");
    CHECK(code_of([&] { tenon::binary_cross_entropy_loss(t, z, make_matrix<T>({{T(2), T(0)}, {T(0), T(1)}})); }) == "model.loss.target");
}
