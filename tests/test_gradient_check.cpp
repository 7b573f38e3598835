// Every tape operation against central finite differences, in double.
//
// tenon::check_gradients compares the tape's gradients with
// (f(x + h) - f(x - h)) / 2h (central differences; Nocedal & Wright,
// "Numerical Optimization", 2nd ed. 2006, section 8.1). Each check uses the
// loss sum(op(inputs) * W) with a fixed random weight W, so every element of
// the output carries a different upstream gradient (a plain sum would give
// every output element the gradient 1 and hide transposition mistakes).
// Inputs stay away from kinks (relu, abs, clamp bounds) and inside domains
// (log, sqrt positive), where the derivative is not defined or not smooth.
#include <doctest/doctest.h>

#include <array>
#include <cmath>
#include <functional>
#include <string>
#include <utility>
#include <vector>

#include <tenon/tenon.hpp>

using tenon::make_matrix;
using tenon::matrix;
using tenon::shape2;
using tenon::tape;
using tenon::var;

namespace {

constexpr double max_relative_error = 1e-6;  // required by the foundation issue

// Entries uniform in [low, high), redrawn while closer than `margin` to any of `kinks`.
matrix<double> random_matrix(tenon::random_engine& rng, shape2 s, double low, double high, const std::vector<double>& kinks = {},
                             double margin = 0.05) {
    matrix<double> m({s.rows, s.cols});
    for (std::size_t k = 0; k < m.size(); ++k) {
        double v;
        bool near_kink;
        do {
            v = rng.uniform<double>(low, high);
            near_kink = false;
            for (double kink : kinks) near_kink = near_kink || std::abs(v - kink) < margin;
        } while (near_kink);
        m.data()[k] = v;
    }
    return m;
}

// Edge shapes (1x1, 1xN, Nx1) and a few random shapes from a seeded engine.
std::vector<shape2> test_shapes(tenon::random_engine& rng) {
    std::vector<shape2> shapes = {{1, 1}, {1, 5}, {4, 1}};
    for (int i = 0; i < 3; ++i) shapes.push_back({static_cast<std::size_t>(2 + rng.below(4)), static_cast<std::size_t>(2 + rng.below(4))});
    return shapes;
}

std::string describe(shape2 s) { return tenon::to_string(s); }

// loss = sum(f(tracked parameters) * W) for a constant W of the output's shape.
using recorder = std::function<var<double>(tape<double>&, std::vector<var<double>>&)>;

double check_op(std::vector<tenon::parameter<double>*> params, const recorder& op, tenon::random_engine& rng) {
    // Output shape (and so W's shape) from one probe recording.
    tape<double> probe;
    std::vector<var<double>> probe_vars;
    for (auto* p : params) probe_vars.push_back(probe.track(*p));
    const shape2 out = op(probe, probe_vars).shape();
    const matrix<double> weight = random_matrix(rng, out, -1.5, 1.5);

    const auto report = tenon::check_gradients(params, [&](tape<double>& t) {
        std::vector<var<double>> vars;
        for (auto* p : params) vars.push_back(t.track(*p));
        return tenon::sum(op(t, vars) * t.input(weight));
    });
    REQUIRE(report.parameters.size() == params.size());
    return report.max_rel_error;
}

struct unary_case {
    const char* name;
    double low, high;
    std::vector<double> kinks;
    std::function<var<double>(var<double>)> op;
};

}  // namespace

TEST_CASE("gradient check agrees with a correct gradient") {
    tenon::parameter<double> w("w", make_matrix<double>({{0.3, -0.7}, {1.1, 0.4}}));
    const auto x = make_matrix<double>({{1.0, 2.0}, {-0.5, 0.25}, {0.0, 1.0}});
    const auto good = tenon::check_gradients({&w}, [&](tape<double>& t) { return tenon::mean(tenon::tanh(tenon::matmul(t.input(x), t.track(w)))); });
    REQUIRE(good.parameters.size() == 1);
    CHECK(good.parameters[0].name == "w");
    CHECK(good.max_rel_error < max_relative_error);
    CHECK(good.max_abs_error < 1e-9);
}

TEST_CASE("elementwise unary operations match finite differences") {
    const std::vector<unary_case> cases = {
        {"exp", -2.0, 2.0, {}, [](var<double> x) { return tenon::exp(x); }},
        {"log", 0.3, 3.0, {}, [](var<double> x) { return tenon::log(x); }},
        {"square", -2.0, 2.0, {}, [](var<double> x) { return tenon::square(x); }},
        {"sqrt", 0.3, 3.0, {}, [](var<double> x) { return tenon::sqrt(x); }},
        {"abs", -2.0, 2.0, {0.0}, [](var<double> x) { return tenon::abs(x); }},
        {"pow 2.5", 0.3, 2.0, {}, [](var<double> x) { return tenon::pow(x, 2.5); }},
        {"pow -1.5", 0.3, 2.0, {}, [](var<double> x) { return tenon::pow(x, -1.5); }},
        {"pow 3 (negative base)", -2.0, 2.0, {}, [](var<double> x) { return tenon::pow(x, 3.0); }},
        {"tanh", -3.0, 3.0, {}, [](var<double> x) { return tenon::tanh(x); }},
        {"sigmoid", -4.0, 4.0, {}, [](var<double> x) { return tenon::sigmoid(x); }},
        {"relu", -2.0, 2.0, {0.0}, [](var<double> x) { return tenon::relu(x); }},
        {"leaky_relu", -2.0, 2.0, {0.0}, [](var<double> x) { return tenon::leaky_relu(x, 0.1); }},
        {"elu", -3.0, 2.0, {0.0}, [](var<double> x) { return tenon::elu(x, 1.3); }},
        {"softplus", -5.0, 5.0, {}, [](var<double> x) { return tenon::softplus(x); }},
        {"gelu", -3.0, 3.0, {}, [](var<double> x) { return tenon::gelu(x); }},
        {"gelu_tanh", -3.0, 3.0, {}, [](var<double> x) { return tenon::gelu_tanh(x); }},
        {"clamp", -1.5, 1.5, {-0.5, 0.7}, [](var<double> x) { return tenon::clamp(x, -0.5, 0.7); }},
        {"scale", -2.0, 2.0, {}, [](var<double> x) { return tenon::scale(x, -1.7); }},
        {"shift", -2.0, 2.0, {}, [](var<double> x) { return tenon::shift(x, 0.3); }},
        {"operator-", -2.0, 2.0, {}, [](var<double> x) { return -x; }},
        {"x * c, c + x", -2.0, 2.0, {}, [](var<double> x) { return (x * 2.0) + (0.5 + x) - 1.0; }},
        {"logsumexp_rows", -3.0, 3.0, {}, [](var<double> x) { return tenon::logsumexp_rows(x); }},
        {"log_softmax_rows", -3.0, 3.0, {}, [](var<double> x) { return tenon::log_softmax_rows(x); }},
        {"sum", -2.0, 2.0, {}, [](var<double> x) { return tenon::sum(x); }},
        {"mean", -2.0, 2.0, {}, [](var<double> x) { return tenon::mean(x); }},
        {"sum axis 0", -2.0, 2.0, {}, [](var<double> x) { return tenon::sum(x, 0); }},
        {"sum axis 1", -2.0, 2.0, {}, [](var<double> x) { return tenon::sum(x, 1); }},
        {"mean axis 0", -2.0, 2.0, {}, [](var<double> x) { return tenon::mean(x, 0); }},
        {"mean axis 1", -2.0, 2.0, {}, [](var<double> x) { return tenon::mean(x, 1); }},
    };
    tenon::random_engine rng(20240601);
    const auto shapes = test_shapes(rng);
    for (const auto& c : cases) {
        for (shape2 s : shapes) {
            tenon::parameter<double> x("x", random_matrix(rng, s, c.low, c.high, c.kinks));
            const double err = check_op(
                {&x}, [&](tape<double>&, std::vector<var<double>>& v) { return c.op(v[0]); }, rng);
            CHECK_MESSAGE(err < max_relative_error, c.name << " on " << describe(s) << ": relative error " << err);
        }
    }
}

TEST_CASE("binary operations with broadcasting match finite differences") {
    struct binary_case {
        const char* name;
        std::function<var<double>(var<double>, var<double>)> op;
    };
    const std::vector<binary_case> cases = {
        {"add", [](var<double> a, var<double> b) { return a + b; }},
        {"subtract", [](var<double> a, var<double> b) { return a - b; }},
        {"multiply", [](var<double> a, var<double> b) { return a * b; }},
        {"divide", [](var<double> a, var<double> b) { return a / b; }},
    };
    tenon::random_engine rng(77);
    const auto shapes = test_shapes(rng);
    for (const auto& c : cases) {
        for (shape2 s : shapes) {
            // Same shape, 1xN row bias, Nx1 column, 1x1 scalar, each on either
            // side, and the outer broadcast of a column with a row.
            const std::vector<std::pair<shape2, shape2>> pairs = {
                {s, s}, {s, {1, s.cols}}, {s, {s.rows, 1}}, {s, {1, 1}}, {{1, s.cols}, s}, {{s.rows, 1}, s}, {{1, 1}, s}, {{s.rows, 1}, {1, s.cols}},
            };
            for (const auto& pr : pairs) {
                tenon::parameter<double> a("a", random_matrix(rng, pr.first, -2.0, 2.0));
                // Divisors with magnitude in [0.5, 2] keep 1/b smooth.
                tenon::parameter<double> b("b", random_matrix(rng, pr.second, -2.0, 2.0, {0.0}, 0.5));
                const double err = check_op(
                    {&a, &b}, [&](tape<double>&, std::vector<var<double>>& v) { return c.op(v[0], v[1]); }, rng);
                CHECK_MESSAGE(err < max_relative_error,
                              c.name << " " << describe(pr.first) << " with " << describe(pr.second) << ": relative error " << err);
            }
        }
    }
}

TEST_CASE("matmul with every transpose combination matches finite differences") {
    tenon::random_engine rng(5150);
    std::vector<std::array<std::size_t, 3>> sizes = {{1, 1, 1}, {1, 4, 1}, {3, 1, 2}, {1, 3, 5}, {4, 2, 1}};
    for (int i = 0; i < 3; ++i)
        sizes.push_back(
            {static_cast<std::size_t>(1 + rng.below(5)), static_cast<std::size_t>(1 + rng.below(5)), static_cast<std::size_t>(1 + rng.below(5))});
    for (const auto& sz : sizes) {
        const std::size_t m = sz[0], k = sz[1], n = sz[2];
        for (int mode = 0; mode < 4; ++mode) {
            const bool ta = (mode & 1) != 0, tb = (mode & 2) != 0;
            tenon::parameter<double> a("a", random_matrix(rng, ta ? shape2{k, m} : shape2{m, k}, -1.0, 1.0));
            tenon::parameter<double> b("b", random_matrix(rng, tb ? shape2{n, k} : shape2{k, n}, -1.0, 1.0));
            const double err = check_op(
                {&a, &b}, [&](tape<double>&, std::vector<var<double>>& v) { return tenon::matmul(v[0], v[1], ta, tb); }, rng);
            CHECK_MESSAGE(err < max_relative_error,
                          "m=" << m << " k=" << k << " n=" << n << " ta=" << ta << " tb=" << tb << ": relative error " << err);
        }
    }
}

TEST_CASE("a composite graph with reuse and both leaf kinds matches finite differences") {
    // A two-layer perceptron with a log-softmax cross-entropy style loss; the
    // hidden value is used twice (reverse accumulation must add both uses).
    tenon::random_engine rng(8);
    tenon::parameter<double> w1("w1", random_matrix(rng, {3, 4}, -1.0, 1.0));
    tenon::parameter<double> b1("b1", random_matrix(rng, {1, 4}, -0.5, 0.5));
    tenon::parameter<double> w2("w2", random_matrix(rng, {4, 3}, -1.0, 1.0));
    const auto x = random_matrix(rng, {5, 3}, -2.0, 2.0);
    const auto targets = random_matrix(rng, {5, 3}, 0.0, 1.0);
    const auto report = tenon::check_gradients({&w1, &b1, &w2}, [&](tape<double>& t) {
        const auto h = tenon::tanh(tenon::matmul(t.input(x), t.track(w1)) + t.track(b1));
        const auto logits = tenon::matmul(h * h + h, t.track(w2));
        const auto picked = tenon::log_softmax_rows(logits) * t.input(targets.data(), 5, 3);
        return tenon::scale(tenon::mean(tenon::sum(picked, 1)), -1.0);
    });
    REQUIRE(report.parameters.size() == 3);
    CHECK(report.parameters[1].name == "b1");
    CHECK(report.max_rel_error < max_relative_error);
}

// ---------------------------------------------------------------------------
// Host-defined operations: a host adds ops without editing the library.

namespace {

// y = x^3 elementwise; dy/dx = 3 x^2.
template <class T>
class cube_operation final : public tenon::custom_operation<T> {
public:
    const char* name() const noexcept override { return "cube"; }
    shape2 output_shape(const tenon::operand_list<T>& in) const override {
        if (in.size() != 1) tenon::raise(tenon::codes::core_argument_invalid, "cube: expects one input");
        return tenon::shape_of(in[0]);
    }
    void forward(const tenon::operand_list<T>& in, matrix<T>& out) const override {
        for (std::size_t k = 0; k < out.size(); ++k) {
            const T x = in[0].data()[k];
            out.data()[k] = x * x * x;
        }
    }
    void backward(const tenon::operand_list<T>& in, const matrix<T>&, const matrix<T>& g, matrix<T>* const* grads) const override {
        if (!grads[0]) return;
        for (std::size_t k = 0; k < g.size(); ++k) {
            const T x = in[0].data()[k];
            grads[0]->data()[k] += g.data()[k] * T(3) * x * x;
        }
    }
};

// Deliberately wrong: claims d(x^3)/dx = 2 x^2.
template <class T>
class wrong_cube_operation final : public tenon::custom_operation<T> {
public:
    const char* name() const noexcept override { return "wrong_cube"; }
    shape2 output_shape(const tenon::operand_list<T>& in) const override { return tenon::shape_of(in[0]); }
    void forward(const tenon::operand_list<T>& in, matrix<T>& out) const override {
        for (std::size_t k = 0; k < out.size(); ++k) {
            const T x = in[0].data()[k];
            out.data()[k] = x * x * x;
        }
    }
    void backward(const tenon::operand_list<T>& in, const matrix<T>&, const matrix<T>& g, matrix<T>* const* grads) const override {
        for (std::size_t k = 0; k < g.size(); ++k) {
            const T x = in[0].data()[k];
            grads[0]->data()[k] += g.data()[k] * T(2) * x * x;
        }
    }
};

// Row-wise weighted sum y_i = sum_j x_ij w_j of a rows x cols input and a
// 1 x cols weight row: dy_i/dx_ij = w_j, dy_i/dw_j = x_ij.
template <class T>
class weighted_sum_operation final : public tenon::custom_operation<T> {
public:
    const char* name() const noexcept override { return "weighted_sum"; }
    shape2 output_shape(const tenon::operand_list<T>& in) const override {
        if (in.size() != 2) tenon::raise(tenon::codes::core_argument_invalid, "weighted_sum: expects two inputs");
        const shape2 sx = tenon::shape_of(in[0]);
        tenon::require_shape(tenon::shape_of(in[1]), {1, sx.cols}, "weighted_sum weights");
        return {sx.rows, 1};
    }
    void forward(const tenon::operand_list<T>& in, matrix<T>& out) const override {
        const std::size_t rows = in[0].shape()[0], cols = in[0].shape()[1];
        for (std::size_t i = 0; i < rows; ++i) {
            T acc = T(0);
            for (std::size_t j = 0; j < cols; ++j) acc += in[0](i, j) * in[1](0, j);
            out(i, 0) = acc;
        }
    }
    void backward(const tenon::operand_list<T>& in, const matrix<T>&, const matrix<T>& g, matrix<T>* const* grads) const override {
        const std::size_t rows = in[0].shape()[0], cols = in[0].shape()[1];
        for (std::size_t i = 0; i < rows; ++i) {
            for (std::size_t j = 0; j < cols; ++j) {
                if (grads[0]) (*grads[0])(i, j) += g(i, 0) * in[1](0, j);
                if (grads[1]) (*grads[1])(0, j) += g(i, 0) * in[0](i, j);
            }
        }
    }
};

}  // namespace

TEST_CASE("host-defined operations recorded with tape::apply match finite differences") {
    const cube_operation<double> cube;
    const weighted_sum_operation<double> weighted_sum;
    tenon::random_engine rng(404);
    for (shape2 s : test_shapes(rng)) {
        tenon::parameter<double> x("x", random_matrix(rng, s, -1.5, 1.5));
        const double cube_err = check_op(
            {&x}, [&](tape<double>& t, std::vector<var<double>>& v) { return t.apply(cube, {v[0]}); }, rng);
        CHECK_MESSAGE(cube_err < max_relative_error, "cube on " << describe(s) << ": " << cube_err);

        tenon::parameter<double> w("w", random_matrix(rng, {1, s.cols}, -1.5, 1.5));
        const double ws_err = check_op(
            {&x, &w},
            [&](tape<double>& t, std::vector<var<double>>& v) {
                // Feed the custom op from a built-in op and feed a built-in op from it.
                return tenon::tanh(t.apply(weighted_sum, {tenon::sigmoid(v[0]), v[1]}));
            },
            rng);
        CHECK_MESSAGE(ws_err < max_relative_error, "weighted_sum on " << describe(s) << ": " << ws_err);
    }
}

TEST_CASE("the gradient check catches a wrong gradient") {
    const wrong_cube_operation<double> wrong;
    tenon::parameter<double> x("x", make_matrix<double>({{0.5, -1.2, 2.0}}));
    const auto report = tenon::check_gradients({&x}, [&](tape<double>& t) { return tenon::sum(t.apply(wrong, {t.track(x)})); });
    // 2x^2 against 3x^2: the relative error is 1/3 wherever x^2 is not tiny.
    CHECK(report.max_rel_error == doctest::Approx(1.0 / 3.0).epsilon(1e-6));
    CHECK(report.parameters[0].max_abs_error > 1.0);

    // A frozen parameter gets no analytic gradient, which the check reports too.
    tenon::parameter<double> frozen("frozen", make_matrix<double>({{0.5, 1.5}}));
    frozen.set_trainable(false);
    const auto frozen_report = tenon::check_gradients({&frozen}, [&](tape<double>& t) { return tenon::sum(tenon::square(t.track(frozen))); });
    CHECK(frozen_report.max_rel_error == doctest::Approx(1.0));
}

TEST_CASE("stop_gradient passes the value and no gradient") {
    // d/dx sum(x * stop_gradient(x)) = stop_gradient(x) = x, not 2x.
    tenon::parameter<double> x("x", make_matrix<double>({{0.5, -1.5}, {2.0, 3.0}}));
    tape<double> t;
    const auto v = t.track(x);
    const auto held = tenon::stop_gradient(v);
    CHECK(held.value()(1, 0) == 2.0);
    t.backward(tenon::sum(v * held));
    for (std::size_t k = 0; k < 4; ++k) CHECK(x.grad().data()[k] == x.value().data()[k]);

    // Through stop_gradient alone nothing flows, and backward is harmless.
    x.clear_gradient();
    t.clear();
    const auto only = tenon::sum(tenon::exp(tenon::stop_gradient(t.track(x))));
    CHECK_NOTHROW(t.backward(only));
    for (std::size_t k = 0; k < 4; ++k) CHECK(x.grad().data()[k] == 0.0);
}
