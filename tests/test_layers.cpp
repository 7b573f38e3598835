// Tests of the layers, the initializers and the network.
#include <doctest/doctest.h>

#include <cmath>
#include <cstdint>
#include <functional>
#include <string>
#include <vector>

#include <tenon/autodiff/gradient_check.hpp>
#include <tenon/layers/network.hpp>

using tenon::make_matrix;
using tenon::matrix;
using tenon::run_mode;

namespace {

template <class T>
matrix<T> random_matrix(std::size_t rows, std::size_t cols, std::uint64_t seed, double low = -1.0, double high = 1.0) {
    tenon::random_engine e(seed);
    matrix<T> m({rows, cols});
    for (std::size_t k = 0; k < m.size(); ++k) m.data()[k] = static_cast<T>(e.uniform<double>(low, high));
    return m;
}

// Loss used for gradient checks: a fixed random linear functional of the
// output, so every output element has a distinct, non-zero weight.
tenon::var<double> probe(tenon::tape<double>& t, tenon::var<double> y) {
    const auto s = y.shape();
    return tenon::sum(y * t.input(random_matrix<double>(s.rows, s.cols, 991)));
}

template <class L>
double layer_gradient_error(L& l, const matrix<double>& x, run_mode mode, const std::function<void()>& before = {}) {
    std::vector<tenon::parameter<double>*> params;
    l.collect_parameters(params);
    tenon::parameter<double> input("input", x);
    params.push_back(&input);
    const auto report = tenon::check_gradients(params, [&](tenon::tape<double>& t) {
        if (before) before();
        return probe(t, l.forward(t, t.track(input), mode));
    });
    return report.max_rel_error;
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

}  // namespace

// ---------------------------------------------------------------- initializers

TEST_CASE_TEMPLATE("initializers give bit-identical values for a seed", T, float, double) {
    // These numbers pin cross-platform determinism: they were printed once
    // (seed 42, fan_in 3, fan_out 5, first four values) and must come out bit
    // for bit on every standard library and compiler. Float weights are the
    // double draws rounded once.
    struct expected_values {
        tenon::initializer init;
        double values[4];
    };
    const expected_values table[] = {
        {{tenon::init_scheme::glorot, tenon::init_distribution::uniform},
         {-0.72077047703504427, -0.20961235457150795, 0.31184433546874413, 0.73558975891964251}},
        {{tenon::init_scheme::glorot, tenon::init_distribution::normal},
         {-0.36310956912239284, -0.10559845911597993, 0.11081135075179666, 0.26138584387800728}},
        {{tenon::init_scheme::he, tenon::init_distribution::uniform},
         {-1.1770132602655197, -0.34229554165569298, 0.50923966738381665, 1.201213046246677}},
        {{tenon::init_scheme::he, tenon::init_distribution::normal},
         {-0.59295544338114714, -0.17244156163886776, 0.18095417803364994, 0.42684129565860268}},
        {{tenon::init_scheme::lecun, tenon::init_distribution::uniform},
         {-0.83227405788023567, -0.24203949867466279, 0.36008682205627873, 0.84938589065077519}},
        {{tenon::init_scheme::lecun, tenon::init_distribution::normal},
         {-0.41928281495628505, -0.12193459759324139, 0.12795392637163167, 0.30182237465064998}},
    };
    for (const auto& row : table) {
        CAPTURE(tenon::init_scheme_name(row.init.scheme));
        CAPTURE(tenon::init_distribution_name(row.init.distribution));
        tenon::random_engine engine(42);
        matrix<T> m({2, 2});
        tenon::initialize(m, row.init, 3, 5, engine);
        for (int k = 0; k < 4; ++k) CHECK(m.data()[k] == static_cast<T>(row.values[k]));
    }
}

TEST_CASE_TEMPLATE("each initializer's empirical variance matches its formula", T, float, double) {
    // Glorot & Bengio 2010 eq. 16: 2 / (fan_in + fan_out); He et al. 2015
    // eq. 10: 2 / fan_in; LeCun et al. 1998 section 4.6: 1 / fan_in.
    const std::size_t fan_in = 200, fan_out = 300;
    const struct {
        tenon::initializer init;
        double variance;
    } table[] = {
        {{tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 2.0 / (fan_in + fan_out)},
        {{tenon::init_scheme::glorot, tenon::init_distribution::normal}, 2.0 / (fan_in + fan_out)},
        {{tenon::init_scheme::he, tenon::init_distribution::uniform}, 2.0 / fan_in},
        {{tenon::init_scheme::he, tenon::init_distribution::normal}, 2.0 / fan_in},
        {{tenon::init_scheme::lecun, tenon::init_distribution::uniform}, 1.0 / fan_in},
        {{tenon::init_scheme::lecun, tenon::init_distribution::normal}, 1.0 / fan_in},
    };
    for (const auto& row : table) {
        CAPTURE(tenon::init_scheme_name(row.init.scheme));
        CAPTURE(tenon::init_distribution_name(row.init.distribution));
        tenon::random_engine engine(7);
        matrix<T> m({fan_in, fan_out});
        tenon::initialize(m, row.init, fan_in, fan_out, engine);
        double total = 0.0, squares = 0.0;
        for (std::size_t k = 0; k < m.size(); ++k) {
            total += static_cast<double>(m.data()[k]);
            squares += static_cast<double>(m.data()[k]) * static_cast<double>(m.data()[k]);
        }
        const double n = static_cast<double>(m.size());
        const double mean = total / n;
        const double variance = squares / n - mean * mean;
        // 60000 draws: the sample variance's relative standard error is about
        // sqrt(2 / n) = 0.6% for normals, less for uniforms; 3% is 5 sigma.
        CHECK(variance == doctest::Approx(row.variance).epsilon(0.03));
        CHECK(std::abs(mean) < 4.0 * std::sqrt(row.variance / n));
        CHECK(tenon::init_variance(row.init.scheme, fan_in, fan_out) == doctest::Approx(row.variance));
    }
}

TEST_CASE_TEMPLATE("zeros and constant initializers, and initializer names", T, float, double) {
    tenon::random_engine engine(1);
    matrix<T> m({3, 2});
    tenon::initialize(m, tenon::initializer{tenon::init_scheme::constant, {}, 0.25}, 3, 2, engine);
    for (std::size_t k = 0; k < m.size(); ++k) CHECK(m.data()[k] == T(0.25));
    tenon::initialize(m, tenon::initializer{tenon::init_scheme::zeros}, 3, 2, engine);
    for (std::size_t k = 0; k < m.size(); ++k) CHECK(m.data()[k] == T(0));
    CHECK(tenon::parse_init_scheme("he") == tenon::init_scheme::he);
    CHECK(tenon::parse_init_distribution("normal") == tenon::init_distribution::normal);
    const tenon::initializer parsed = tenon::parse_initializer("he", "normal");
    CHECK((parsed.scheme == tenon::init_scheme::he && parsed.distribution == tenon::init_distribution::normal));
    // One name per method: a method and its distribution are never spelled
    // as one word.
    CHECK(code_of([] { tenon::parse_initializer("he-normal"); }) == "model.record.unknown_kind");
    CHECK(code_of([] { tenon::parse_init_scheme("gaussian"); }) == "model.record.unknown_kind");
    CHECK(code_of([] { tenon::parse_init_distribution("triangular"); }) == "model.record.unknown_kind");
}

// ---------------------------------------------------------------- dense

TEST_CASE_TEMPLATE("dense layer computes x W + b", T, float, double) {
    tenon::dense<T> d(2, 3);
    d.weights().assign(make_matrix<T>({{T(1), T(2), T(3)}, {T(-1), T(0), T(0.5)}}));
    d.bias().assign(make_matrix<T>({{T(0.5), T(-0.5), T(1)}}));
    tenon::tape<T> t;
    const auto y = d.forward(t, t.input(make_matrix<T>({{T(1), T(1)}, {T(2), T(0)}})), run_mode::training);
    const auto& v = y.value();
    CHECK(v(0, 0) == doctest::Approx(0.5));
    CHECK(v(0, 1) == doctest::Approx(1.5));
    CHECK(v(0, 2) == doctest::Approx(4.5));
    CHECK(v(1, 0) == doctest::Approx(2.5));
    CHECK(v(1, 2) == doctest::Approx(7.0));
    CHECK(code_of([&] { d.forward(t, t.input(make_matrix<T>({{T(1), T(2), T(3)}})), run_mode::training); }) == "core.shape.mismatch");
    CHECK(code_of([] { tenon::dense<T>(0, 3); }) == "model.layer.option");
}

TEST_CASE("dense layer gradients agree with finite differences") {
    tenon::random_engine engine(3);
    tenon::dense<double> d(4, 3, engine, {}, tenon::initializer{tenon::init_scheme::constant, {}, 0.1});
    CHECK(layer_gradient_error(d, random_matrix<double>(5, 4, 11), run_mode::training) < 1e-6);
    tenon::dense<double> no_bias(4, 2, engine, {}, {}, false);
    CHECK(layer_gradient_error(no_bias, random_matrix<double>(3, 4, 12), run_mode::training) < 1e-6);
}

// ---------------------------------------------------------------- activations

TEST_CASE("every activation layer's gradient agrees with finite differences") {
    // Inputs avoid 0, where relu, leaky_relu and elu have a kink.
    matrix<double> x = random_matrix<double>(4, 5, 21, -2.0, 2.0);
    for (std::size_t k = 0; k < x.size(); ++k)
        if (std::abs(x.data()[k]) < 0.05) x.data()[k] = 0.3;
    for (int i = 0; i <= static_cast<int>(tenon::activation::log_softmax); ++i) {
        const auto a = static_cast<tenon::activation>(i);
        CAPTURE(tenon::activation_name(a));
        tenon::activation_layer<double> l(a);
        CHECK(layer_gradient_error(l, x, run_mode::training) < 1e-6);
    }
}

TEST_CASE_TEMPLATE("activation layers compute their functions", T, float, double) {
    tenon::tape<T> t;
    const auto x = t.input(make_matrix<T>({{T(-1), T(2)}}));
    auto value = [&](tenon::activation a, double c) {
        tenon::activation_layer<T> l(a, c);
        return l.forward(t, x, run_mode::inference).value();
    };
    CHECK(value(tenon::activation::relu, 0)(0, 0) == T(0));
    CHECK(value(tenon::activation::leaky_relu, 0.1)(0, 0) == doctest::Approx(-0.1));
    CHECK(value(tenon::activation::elu, 1.0)(0, 0) == doctest::Approx(std::expm1(-1.0)));
    CHECK(value(tenon::activation::identity, 0)(0, 1) == T(2));
    const auto s = value(tenon::activation::softmax, 0);
    CHECK(s(0, 0) + s(0, 1) == doctest::Approx(1.0));
    CHECK(s(0, 1) == doctest::Approx(std::exp(2.0) / (std::exp(-1.0) + std::exp(2.0))));
    CHECK(tenon::parse_activation("gelu_tanh") == tenon::activation::gelu_tanh);
    CHECK(code_of([] { tenon::parse_activation("swish"); }) == "model.record.unknown_kind");
    CHECK(code_of([] { tenon::activation_layer<T>(tenon::activation::elu, std::nan("")); }) == "model.layer.option");
}

// ---------------------------------------------------------------- dropout

TEST_CASE_TEMPLATE("dropout drops at its rate, scales the rest and is off at inference", T, float, double) {
    const double rate = 0.3;
    tenon::dropout<T> d(rate, 5);
    tenon::tape<T> t;
    matrix<T> x({200, 50});
    x.fill(T(1));
    const auto y = d.forward(t, t.input(x), run_mode::training);
    std::size_t dropped = 0;
    const T kept = static_cast<T>(1.0 / (1.0 - rate));
    for (std::size_t k = 0; k < x.size(); ++k) {
        const T v = y.value().data()[k];
        CHECK((v == T(0) || v == kept));
        dropped += v == T(0);
    }
    // 10000 Bernoulli(0.3) draws: standard error 0.0046; allow 5 sigma.
    CHECK(static_cast<double>(dropped) / static_cast<double>(x.size()) == doctest::Approx(rate).epsilon(0.08));
    // A new mask at every training forward.
    const matrix<T> first = d.last_mask();
    d.forward(t, t.input(x), run_mode::training);
    CHECK(first != d.last_mask());
    // Inference passes the value through unchanged.
    const auto z = d.forward(t, t.input(x), run_mode::inference);
    CHECK(z.value() == x);
    // The same seed gives the same masks.
    tenon::dropout<T> again(rate, 5);
    again.forward(t, t.input(x), run_mode::training);
    CHECK(again.last_mask() == first);
    CHECK(code_of([] { tenon::dropout<T>(1.0); }) == "model.layer.option");
    CHECK(code_of([] { tenon::dropout<T>(-0.1); }) == "model.layer.option");
}

TEST_CASE("dropout gradient agrees with finite differences for a fixed mask") {
    tenon::dropout<double> d(0.4, 9);
    CHECK(layer_gradient_error(d, random_matrix<double>(6, 4, 31), run_mode::training, [&] { d.engine().reseed(9); }) < 1e-6);
}

// ---------------------------------------------------------------- normalization

TEST_CASE_TEMPLATE("layer normalization gives each row mean 0 and variance 1", T, float, double) {
    // Ba, Kiros & Hinton 2016, eq. 4, with gain 1 and bias 0.
    tenon::layer_norm<T> ln(6);
    tenon::tape<T> t;
    const auto y = ln.forward(t, t.input(random_matrix<T>(3, 6, 41, -3.0, 5.0)), run_mode::training);
    for (std::size_t i = 0; i < 3; ++i) {
        double m = 0.0, v = 0.0;
        for (std::size_t j = 0; j < 6; ++j) m += static_cast<double>(y.value()(i, j)) / 6.0;
        for (std::size_t j = 0; j < 6; ++j) v += std::pow(static_cast<double>(y.value()(i, j)) - m, 2.0) / 6.0;
        CHECK(m == doctest::Approx(0.0).epsilon(1e-4).scale(1.0));
        CHECK(v == doctest::Approx(1.0).epsilon(1e-3));  // epsilon 1e-5 shifts it slightly
    }
    CHECK(code_of([] { tenon::layer_norm<T>(4, 0.0); }) == "model.layer.option");
    CHECK(code_of([] { tenon::layer_norm<T>(0); }) == "model.layer.option");
}

TEST_CASE("layer normalization gradients agree with finite differences") {
    tenon::layer_norm<double> ln(5);
    ln.gain().assign(random_matrix<double>(1, 5, 51, 0.5, 1.5));
    ln.bias().assign(random_matrix<double>(1, 5, 52));
    CHECK(layer_gradient_error(ln, random_matrix<double>(4, 5, 53), run_mode::training) < 1e-6);
}

TEST_CASE_TEMPLATE("batch normalization updates population estimates and uses them at inference", T, float, double) {
    // Ioffe & Szegedy 2015, Algorithm 1 (training) and Algorithm 2 (inference).
    tenon::batch_norm<T> bn(2, 0.5);
    tenon::tape<T> t;
    const matrix<T> x = make_matrix<T>({{T(1), T(10)}, {T(3), T(20)}, {T(5), T(60)}});
    const auto y = bn.forward(t, t.input(x), run_mode::training);
    // Column 0: mean 3, biased variance 8/3; normalized (1 - 3) / sqrt(8/3 + 1e-5).
    CHECK(y.value()(0, 0) == doctest::Approx(-2.0 / std::sqrt(8.0 / 3.0 + 1e-5)));
    // Population mean: 0.5 * 0 + 0.5 * 3; population variance: 0.5 * 1 + 0.5 * (3/2) * (8/3) (unbiased).
    CHECK(bn.population_mean().value()(0, 0) == doctest::Approx(1.5));
    CHECK(bn.population_variance().value()(0, 0) == doctest::Approx(0.5 + 0.5 * 4.0));
    CHECK(bn.population_mean().value()(0, 1) == doctest::Approx(15.0));

    // Inference: the population estimates, not the batch's.
    bn.population_mean().assign(make_matrix<T>({{T(2), T(-1)}}));
    bn.population_variance().assign(make_matrix<T>({{T(4), T(0.25)}}));
    const auto z = bn.forward(t, t.input(x), run_mode::inference);
    for (std::size_t i = 0; i < 3; ++i) {
        CHECK(z.value()(i, 0) == doctest::Approx((x(i, 0) - 2.0) / std::sqrt(4.0 + 1e-5)));
        CHECK(z.value()(i, 1) == doctest::Approx((x(i, 1) + 1.0) / std::sqrt(0.25 + 1e-5)));
    }
    // Inference leaves the population estimates alone.
    CHECK(bn.population_mean().value()(0, 0) == T(2));
    CHECK(!bn.population_mean().trainable());

    CHECK(code_of([&] { bn.forward(t, t.input(make_matrix<T>({{T(1), T(2)}})), run_mode::training); }) == "model.batch_norm.batch_too_small");
    CHECK(code_of([] { tenon::batch_norm<T>(2, 0.0); }) == "model.layer.option");
}

TEST_CASE("batch normalization gradients agree with finite differences in both modes") {
    tenon::batch_norm<double> bn(3);
    bn.gain().assign(random_matrix<double>(1, 3, 61, 0.5, 1.5));
    bn.bias().assign(random_matrix<double>(1, 3, 62));
    CHECK(layer_gradient_error(bn, random_matrix<double>(5, 3, 63), run_mode::training) < 1e-6);
    bn.population_variance().assign(random_matrix<double>(1, 3, 64, 0.5, 2.0));
    CHECK(layer_gradient_error(bn, random_matrix<double>(5, 3, 65), run_mode::inference) < 1e-6);
}

// ---------------------------------------------------------------- residual

TEST_CASE_TEMPLATE("a residual block adds its input to its inner output", T, float, double) {
    tenon::residual<T> block;
    auto& d = block.add(tenon::dense<T>(2, 2, false));
    d.weights().assign(make_matrix<T>({{T(1), T(0)}, {T(0), T(2)}}));
    block.add(tenon::activation_layer<T>(tenon::activation::relu));
    tenon::tape<T> t;
    const auto y = block.forward(t, t.input(make_matrix<T>({{T(1), T(-1)}})), run_mode::training);
    CHECK(y.value()(0, 0) == T(2));  // 1 + relu(1)
    CHECK(y.value()(0, 1) == T(-1));  // -1 + relu(-2)
    tenon::residual<T> widening;
    widening.add(tenon::dense<T>(2, 3));
    CHECK(code_of([&] { widening.forward(t, t.input(make_matrix<T>({{T(1), T(-1)}})), run_mode::training); }) == "core.shape.mismatch");
}

TEST_CASE("residual block gradients agree with finite differences") {
    tenon::random_engine engine(71);
    tenon::residual<double> block;
    block.add(tenon::dense<double>(3, 4, engine));
    block.add(tenon::activation_layer<double>(tenon::activation::tanh));
    block.add(tenon::dense<double>(4, 3, engine));
    CHECK(layer_gradient_error(block, random_matrix<double>(4, 3, 72), run_mode::training) < 1e-6);
}

// ---------------------------------------------------------------- linear bypass

TEST_CASE_TEMPLATE("a linear bypass adds x W to its inner output", T, float, double) {
    tenon::linear_bypass<T> block(2, 1);
    auto& d = block.add(tenon::dense<T>(2, 1, false));
    d.weights().assign(make_matrix<T>({{T(1)}, {T(1)}}));
    block.add(tenon::activation_layer<T>(tenon::activation::relu));
    block.linear_weights().assign(make_matrix<T>({{T(3)}, {T(-2)}}));
    tenon::tape<T> t;
    const auto y = block.forward(t, t.input(make_matrix<T>({{T(1), T(2)}, {T(-1), T(-2)}})), run_mode::training);
    CHECK(y.value()(0, 0) == T(2));  // relu(1 + 2) + (3 - 4)
    CHECK(y.value()(1, 0) == T(1));  // relu(-3) + (-3 + 4)
    CHECK(block.output_width(2) == 1);
    CHECK(code_of([&] { (void)block.output_width(3); }) == "core.shape.mismatch");
    CHECK(code_of([] { tenon::linear_bypass<T> empty(0, 1); }) == "model.layer.option");
}

TEST_CASE("linear bypass gradients agree with finite differences") {
    tenon::random_engine engine(73);
    tenon::linear_bypass<double> block(3, 2);
    block.add(tenon::dense<double>(3, 4, engine));
    block.add(tenon::activation_layer<double>(tenon::activation::tanh));
    block.add(tenon::dense<double>(4, 2, engine));
    block.linear_weights().assign(random_matrix<double>(3, 2, 74));
    CHECK(layer_gradient_error(block, random_matrix<double>(5, 3, 75), run_mode::training) < 1e-6);
}

TEST_CASE_TEMPLATE("an MLP with a linear path draws the plain MLP's weights and round-trips its record", T, float, double) {
    const tenon::initializer init{tenon::init_scheme::he, tenon::init_distribution::uniform};
    auto plain = tenon::make_mlp<T>({4, 6, 2}, tenon::activation::relu, init, 9);
    auto with_path = tenon::make_mlp<T>({4, 6, 2}, tenon::activation::relu, init, 9, tenon::activation::identity, true);
    CHECK(with_path.parameter_count() == plain.parameter_count() + 4 * 2);
    CHECK(with_path.find("bypass.hidden1.weights").value() == plain.find("hidden1.weights").value());
    CHECK(with_path.find("bypass.output.weights").value() == plain.find("output.weights").value());
    for (std::size_t k = 0; k < 8; ++k) CHECK(with_path.find("bypass.linear_weights").value().data()[k] == T(0));
    with_path.find("bypass.linear_weights").value().fill(T(0.5));
    // Zero linear weights: the same outputs as the plain MLP; then the path adds x W.
    const matrix<T> x = random_matrix<T>(3, 4, 10);
    auto rebuilt = tenon::network_from_bytes<T>(with_path.architecture_bytes());
    CHECK(rebuilt.describe() == with_path.describe());
    rebuilt.restore(with_path.snapshot());
    with_path.set_mode(run_mode::inference);
    rebuilt.set_mode(run_mode::inference);
    tenon::tape<T> t;
    const matrix<T> a = with_path.forward(t, x).value(), b = rebuilt.forward(t, x).value();
    CHECK(a == b);
    CHECK(tenon::record_value_count(with_path.describe()) == with_path.parameter_count());
    // Without a hidden layer there is nothing to bypass: a plain linear layer.
    CHECK(tenon::make_mlp<T>({4, 2}, tenon::activation::relu, init, 9, tenon::activation::identity, true).parameter_count() == 10);
}

// ---------------------------------------------------------------- network

TEST_CASE_TEMPLATE("an MLP names its parameters and counts them", T, float, double) {
    auto net = tenon::make_mlp<T>({3, 5, 2}, tenon::activation::relu, {tenon::init_scheme::he, tenon::init_distribution::normal}, 42);
    // 3*5 + 5 + 5*2 + 2 (weights and biases of two dense layers).
    CHECK(net.parameter_count() == 32);
    const auto& params = net.parameters();
    REQUIRE(params.size() == 4);
    CHECK(params[0]->name() == "hidden1.weights");
    CHECK(params[1]->name() == "hidden1.bias");
    CHECK(params[2]->name() == "output.weights");
    CHECK(net.find("output.bias").shape() == tenon::shape2{1, 2});
    CHECK(net.layer_count() == 3);
    CHECK(net.layer_at(1).name() == "hidden1_act");
    CHECK(net.output_width(3) == 2);
    CHECK(code_of([&] { net.find("hidden2.weights"); }) == "model.network.unknown_parameter");
    CHECK(code_of([&] { net.output_width(4); }) == "core.shape.mismatch");
    CHECK(code_of([] { tenon::make_mlp<T>({3}, tenon::activation::relu, {}, 1); }) == "model.layer.option");

    // The same seed gives the same weights.
    auto twin = tenon::make_mlp<T>({3, 5, 2}, tenon::activation::relu, {tenon::init_scheme::he, tenon::init_distribution::normal}, 42);
    CHECK(twin.find("hidden1.weights").value() == net.find("hidden1.weights").value());
}

TEST_CASE_TEMPLATE("network naming: automatic, nested and unique", T, float, double) {
    tenon::network<T> net;
    net.add(tenon::dense<T>(2, 4));
    auto& block = net.add(tenon::residual<T>(), "block");
    block.add(tenon::layer_norm<T>(4), "norm");
    block.add(tenon::activation_layer<T>(tenon::activation::tanh));
    net.add(tenon::batch_norm<T>(4));
    CHECK(net.layer_at(0).name() == "dense1");
    CHECK(net.find("block.norm.gain").size() == 4);
    CHECK(block.layer_at(1).name() == "tanh2");
    CHECK(net.find("batch_norm3.population_mean").size() == 4);
    CHECK(net.state_count() == 8);
    CHECK(net.parameter_count() == 2 * 4 + 4 + 4 + 4 + 4 + 4);
    CHECK(code_of([&] { net.add(tenon::dense<T>(4, 1), "dense1"); }) == "model.network.duplicate_name");
    CHECK(code_of([&] { net.add(tenon::dense<T>(4, 1), "a.b"); }) == "model.layer.option");
}

TEST_CASE_TEMPLATE("network mode switches dropout and batch normalization", T, float, double) {
    tenon::network<T> net;
    net.add(tenon::dropout<T>(0.5, 3));
    matrix<T> x({4, 8});
    x.fill(T(1));
    tenon::tape<T> t;
    CHECK(net.mode() == run_mode::training);
    CHECK(net.forward(t, x).value() != x);
    net.set_mode(run_mode::inference);
    CHECK(net.forward(t, x).value() == x);
}

TEST_CASE_TEMPLATE("a snapshot restores every parameter and population estimate", T, float, double) {
    tenon::network<T> net;
    tenon::random_engine engine(5);
    net.add(tenon::dense<T>(3, 2, engine));
    net.add(tenon::batch_norm<T>(2));
    tenon::network_snapshot<T> saved;
    net.snapshot_into(saved);
    const matrix<T> before = net.find("dense1.weights").value();
    tenon::tape<T> t;
    net.forward(t, random_matrix<T>(4, 3, 81));  // moves the population estimates
    net.find("dense1.weights").value().fill(T(9));
    CHECK(net.find("batch_norm2.population_mean").value() != saved.values[4]);
    net.restore(saved);
    CHECK(net.find("dense1.weights").value() == before);
    CHECK(net.find("batch_norm2.population_mean").value() == saved.values[4]);

    tenon::network<T> other;
    other.add(tenon::dense<T>(3, 2));
    CHECK(code_of([&] { other.restore(saved); }) == "model.network.snapshot_mismatch");
    tenon::network<T> wider;
    wider.add(tenon::dense<T>(3, 3));
    wider.add(tenon::batch_norm<T>(3));
    CHECK(code_of([&] { wider.restore(saved); }) == "model.network.snapshot_mismatch");
}

TEST_CASE_TEMPLATE("an architecture round-trips through bytes and rebuilds the same network", T, float, double) {
    tenon::network<T> net;
    tenon::random_engine engine(8);
    net.add(tenon::dense<T>(3, 4, engine), "hidden1");
    net.add(tenon::activation_layer<T>(tenon::activation::leaky_relu, 0.2));
    auto& block = net.add(tenon::residual<T>(), "block");
    block.add(tenon::layer_norm<T>(4, 1e-3));
    block.add(tenon::dense<T>(4, 4, engine, {}, {}, false));
    net.add(tenon::dropout<T>(0.25, 77));
    net.add(tenon::batch_norm<T>(4, 0.2, 1e-4));
    net.add(tenon::dense<T>(4, 2, engine), "output");

    const auto bytes = net.architecture_bytes();
    auto rebuilt = tenon::network_from_bytes<T>(bytes);
    CHECK(rebuilt.describe() == net.describe());
    CHECK(rebuilt.architecture_bytes() == bytes);
    CHECK(rebuilt.parameter_count() == net.parameter_count());
    for (std::size_t i = 0; i < net.parameters().size(); ++i) CHECK(rebuilt.parameters()[i]->name() == net.parameters()[i]->name());

    // With the weights copied over, both compute the same outputs.
    rebuilt.restore(net.snapshot());
    net.set_mode(run_mode::inference);
    rebuilt.set_mode(run_mode::inference);
    tenon::tape<T> t;
    const matrix<T> x = random_matrix<T>(5, 3, 91);
    const matrix<T> a = net.forward(t, x).value();
    CHECK(rebuilt.forward(t, x).value() == a);
}

TEST_CASE("damaged architecture bytes fail with their error codes") {
    tenon::network<double> net;
    net.add(tenon::dense<double>(2, 3));
    net.add(tenon::activation_layer<double>(tenon::activation::relu));
    const auto bytes = net.architecture_bytes();

    // Every proper prefix is truncated (or, where a count is cut short, malformed).
    for (std::size_t n = 0; n < bytes.size(); ++n) {
        const std::vector<std::uint8_t> cut(bytes.begin(), bytes.begin() + static_cast<std::ptrdiff_t>(n));
        const std::string code = code_of([&] { tenon::network_from_bytes<double>(cut); });
        CHECK((code == "model.record.truncated" || code == "model.record.malformed"));
    }
    auto bad_magic = bytes;
    bad_magic[0] ^= 0xFF;
    CHECK(code_of([&] { tenon::network_from_bytes<double>(bad_magic); }) == "model.record.malformed");
    auto trailing = bytes;
    trailing.push_back(0);
    CHECK(code_of([&] { tenon::network_from_bytes<double>(trailing); }) == "model.record.malformed");

    // A huge declared count is refused before any allocation.
    std::vector<std::uint8_t> huge;
    tenon::byte_writer w(huge);
    w.u32(0x4C6E6574u);
    w.u8(1);
    w.text("network");
    w.text("");
    w.u32(0xFFFFFFFFu);
    CHECK(code_of([&] { tenon::record_from_bytes(huge); }) == "model.record.malformed");

    // Matrix sides: an empty matrix with a side of 2^63 once passed the size
    // check and overflowed the storage's signed strides (found by fuzzing
    // the model-file loader; fuzz/regressions/model_file/matrix-side-overflow).
    const auto sides_of = [](std::uint64_t rows, std::uint64_t cols, std::size_t payload) {
        std::vector<std::uint8_t> b;
        tenon::byte_writer sw(b);
        sw.u64(rows);
        sw.u64(cols);
        b.resize(b.size() + payload);
        tenon::byte_reader r(b, "matrix test");
        return r.matrix_sides(4, "a matrix");
    };
    CHECK(code_of([&] { sides_of(0, std::uint64_t(1) << 63, 0); }) == "model.record.malformed");
    CHECK(code_of([&] { sides_of((std::uint64_t(1) << 32) + 1, 0, 0); }) == "model.record.malformed");
    CHECK(code_of([&] { sides_of(3, 5, 59); }) == "model.record.malformed");
    CHECK(sides_of(3, 5, 60) == std::pair<std::size_t, std::size_t>(3, 5));
#if SIZE_MAX > 0xFFFFFFFFu
    CHECK(sides_of(0, std::uint64_t(1) << 32, 0) == std::pair<std::size_t, std::size_t>(0, std::size_t(1) << 32));
#else
    // Where size_t has 32 bits (armhf), a side of 2^32 does not fit it.
    CHECK_THROWS_WITH_AS(sides_of(0, std::uint64_t(1) << 32, 0),
                         "[model.record.malformed] matrix test: a matrix of 0x4294967296 values declared at byte 0 has a side above 4294967295",
                         tenon::error);
#endif
    // Counts and indices read as u64 must fit size_t: 2^32 - 1 always does,
    // 2^32 only where size_t has 64 bits, 2^64 - 1 nowhere tenon builds.
    const auto size_of = [](std::uint64_t v) {
        std::vector<std::uint8_t> b;
        tenon::byte_writer sw(b);
        sw.u64(v);
        tenon::byte_reader r(b, "size test");
        return r.u64_size("a row index");
    };
    CHECK(size_of(0xFFFFFFFFu) == std::size_t(0xFFFFFFFFu));
    if (sizeof(std::size_t) >= 8) {
        CHECK(static_cast<std::uint64_t>(size_of(std::uint64_t(1) << 32)) == std::uint64_t(1) << 32);
    } else {
        CHECK_THROWS_WITH_AS(size_of(std::uint64_t(1) << 32),
                             "[model.record.malformed] size test: a row index 4294967296 at byte 0 does not fit this platform's 32-bit sizes",
                             tenon::error);
    }
    CHECK_THROWS_WITH_AS(
        sides_of(0, std::uint64_t(1) << 63, 0),
        sizeof(std::size_t) >= 8
            ? "[model.record.malformed] matrix test: a matrix of 0x9223372036854775808 values declared at byte 0 has a side above 2^32"
            : "[model.record.malformed] matrix test: a matrix of 0x9223372036854775808 values declared at byte 0 has a side above 4294967295",
        tenon::error);

    tenon::layer_record unknown;
    unknown.kind = "network";
    unknown.children.push_back(tenon::layer_record{"convolution", "c1", {}, {}, {}});
    CHECK(code_of([&] { tenon::make_network<double>(unknown); }) == "model.record.unknown_kind");
    CHECK(code_of([&] { tenon::make_network<double>(unknown.children[0]); }) == "model.record.unknown_kind");
    tenon::layer_record missing;
    missing.kind = "network";
    missing.children.push_back(tenon::layer_record{"dense", "d1", {{"inputs", 2.0}}, {}, {}});
    CHECK(code_of([&] { tenon::make_network<double>(missing); }) == "model.record.missing_field");
    tenon::layer_record fractional{"dense", "d1", {{"inputs", 2.5}, {"outputs", 1.0}, {"bias", 1.0}}, {}, {}};
    CHECK(code_of([&] { tenon::make_layer<double>(fractional); }) == "model.record.malformed");

    // Nesting deeper than the reader allows.
    tenon::layer_record deep{"residual", "r", {}, {}, {}};
    for (int i = 0; i < 20; ++i) deep = tenon::layer_record{"residual", "r", {}, {}, {deep}};
    CHECK(code_of([&] { tenon::record_from_bytes(tenon::to_bytes(deep)); }) == "model.record.malformed");
}

// A dense layer followed by relu, leaky_relu, elu, tanh or sigmoid runs as one
// fused tape node (tape::affine_activation); the network's results must be
// the bits of the layers recorded one by one.
TEST_CASE_TEMPLATE("network forward fuses dense + activation without changing values or gradients", T, float, double) {
    using tenon::activation;
    struct expectation {
        activation hidden;
        bool fused;
    };
    const expectation cases[] = {{activation::relu, true},  {activation::leaky_relu, true}, {activation::elu, true},
                                 {activation::tanh, true},  {activation::sigmoid, true},    {activation::softplus, false},
                                 {activation::gelu, false}, {activation::softmax, false}};
    for (const auto& c : cases) {
        const std::string hidden_name = tenon::activation_name(c.hidden);
        CAPTURE(hidden_name);
        auto net = tenon::make_mlp<T>({6, 8, 7, 3}, c.hidden, {tenon::init_scheme::he, tenon::init_distribution::normal}, 5, activation::sigmoid);
        tenon::random_engine engine(9);
        matrix<T> input({10, 6}), weights({10, 3});
        for (std::size_t k = 0; k < input.size(); ++k) input.data()[k] = engine.uniform<T>(T(-2), T(2));
        for (std::size_t k = 0; k < weights.size(); ++k) weights.data()[k] = engine.uniform<T>(T(-1), T(1));
        for (auto* p : net.parameters()) p->value().data()[0] += T(0.25);  // non-zero biases too
        for (auto* p : net.parameters())
            for (std::size_t k = 0; k < p->value().size(); ++k) p->value().data()[k] += T(0.01) * static_cast<T>(k % 7);

        tenon::tape<T> fused;
        const auto x1 = fused.variable(input);
        fused.backward(tenon::sum(net.forward(fused, x1) * fused.input(weights)));
        std::vector<matrix<T>> grads_fused;
        for (auto* p : net.parameters()) {
            grads_fused.push_back(p->grad());
            p->clear_gradient();
        }

        tenon::tape<T> apart;
        auto x2 = apart.variable(input);
        auto y = x2;
        for (std::size_t i = 0; i < net.layer_count(); ++i) y = net.layer_at(i).forward(apart, y, run_mode::training);
        apart.backward(tenon::sum(y * apart.input(weights)));

        // A fused pair records product, bias add and activation as one node:
        // two fewer per pair. The sigmoid output layer is always fused, the
        // two hidden layers when their activation is.
        CHECK(apart.size() - fused.size() == (c.fused ? 6u : 2u));
        REQUIRE(net.parameters().size() == grads_fused.size());
        for (std::size_t i = 0; i < grads_fused.size(); ++i) {
            const auto& g = net.parameters()[i]->grad();
            for (std::size_t k = 0; k < g.size(); ++k) REQUIRE(g.data()[k] == grads_fused[i].data()[k]);
        }
        for (std::size_t k = 0; k < fused.grad(x1).size(); ++k) REQUIRE(fused.grad(x1).data()[k] == apart.grad(x2).data()[k]);
        // The layers (and so the architecture record) do not change.
        CHECK(net.layer_count() == 6u);
    }
}

TEST_CASE("a network with fused dense + tanh layers passes the finite-difference check") {
    auto net = tenon::make_mlp<double>({4, 5, 3}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 3,
                                       tenon::activation::sigmoid);
    matrix<double> input({6, 4});
    tenon::random_engine engine(4);
    for (std::size_t k = 0; k < input.size(); ++k) input.data()[k] = engine.uniform<double>(-1.5, 1.5);
    const auto report = tenon::check_gradients(net.parameters(), [&](tenon::tape<double>& t) { return tenon::sum(net.forward(t, input)); });
    CHECK(report.max_rel_error < 1e-6);
}
