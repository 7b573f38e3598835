// Tests of the autodiff tape: values and derivatives against closed forms,
// numerical stability, errors, the finite check, reuse and accumulation.
#include <doctest/doctest.h>

#include <cmath>
#include <cstdint>
#include <iterator>
#include <limits>
#include <string>
#include <vector>

#include <tenon/tenon.hpp>

using tenon::make_matrix;
using tenon::matrix;
using tenon::shape2;
using tenon::tape;
using tenon::var;

namespace {

template <class F>
tenon::error expect_error(F&& f) {
    try {
        f();
    } catch (const tenon::error& e) {
        return e;
    }
    FAIL("expected a tenon::error, nothing was thrown");
    return tenon::error("none", "none");
}

bool contains(const std::string& text, const std::string& part) { return text.find(part) != std::string::npos; }

// Relative tolerance for comparing T results with double formulas.
template <class T>
double tolerance() {
    return std::is_same_v<T, float> ? 2e-6 : 1e-13;
}

const double points[] = {-2.5, -1.0, -0.3, 0.2, 0.9, 2.2};

template <class T>
matrix<T> point_row() {
    matrix<T> m({1, std::size(points)});
    for (std::size_t k = 0; k < std::size(points); ++k) m.data()[k] = static_cast<T>(points[k]);
    return m;
}

// Value and derivative of an elementwise op at `points` (derivative by
// backward from sum(op(x)), so the upstream gradient is 1 per element).
template <class T, class Op>
void value_and_derivative(Op op, std::vector<double>& values, std::vector<double>& derivatives) {
    tape<T> t;
    const auto x = t.variable(point_row<T>());
    const auto y = op(x);
    t.backward(tenon::sum(y));
    values.clear();
    derivatives.clear();
    for (std::size_t k = 0; k < std::size(points); ++k) {
        values.push_back(static_cast<double>(y.value().data()[k]));
        derivatives.push_back(static_cast<double>(t.grad(x).data()[k]));
    }
}

// A host-defined operation for the tests below: 1/x, which is infinite at 0.
template <class T>
class reciprocal_operation final : public tenon::custom_operation<T> {
public:
    const char* name() const noexcept override { return "reciprocal"; }
    shape2 output_shape(const tenon::operand_list<T>& in) const override { return tenon::shape_of(in[0]); }
    void forward(const tenon::operand_list<T>& in, matrix<T>& out) const override {
        for (std::size_t k = 0; k < out.size(); ++k) out.data()[k] = T(1) / in[0].data()[k];
    }
    void backward(const tenon::operand_list<T>& in, const matrix<T>& out, const matrix<T>& g, matrix<T>* const* grads) const override {
        if (!grads[0]) return;
        for (std::size_t k = 0; k < g.size(); ++k) grads[0]->data()[k] -= g.data()[k] * out.data()[k] * out.data()[k];
        (void)in;
    }
};

// Adds all of its inputs (of one shape); used to exceed the input limit.
template <class T>
class total_operation final : public tenon::custom_operation<T> {
public:
    const char* name() const noexcept override { return "total"; }
    shape2 output_shape(const tenon::operand_list<T>& in) const override { return tenon::shape_of(in[0]); }
    void forward(const tenon::operand_list<T>& in, matrix<T>& out) const override {
        out.fill(T(0));
        for (std::size_t i = 0; i < in.size(); ++i)
            for (std::size_t k = 0; k < out.size(); ++k) out.data()[k] += in[i].data()[k];
    }
    void backward(const tenon::operand_list<T>& in, const matrix<T>&, const matrix<T>& g, matrix<T>* const* grads) const override {
        for (std::size_t i = 0; i < in.size(); ++i)
            if (grads[i])
                for (std::size_t k = 0; k < g.size(); ++k) grads[i]->data()[k] += g.data()[k];
    }
};

}  // namespace

// ---------------------------------------------------------------------------
// closed forms

TEST_CASE_TEMPLATE("a value used twice receives both gradient contributions", T, float, double) {
    // d/dw sum(w * w) = 2w (elementary calculus).
    tenon::parameter<T> w("w", make_matrix<T>({{T(1.5), T(-2)}}));
    tape<T> t;
    const auto v = t.track(w);
    t.backward(tenon::sum(v * v));
    CHECK(w.grad()(0, 0) == doctest::Approx(3.0));
    CHECK(w.grad()(0, 1) == doctest::Approx(-4.0));
}

TEST_CASE_TEMPLATE("tanh, sigmoid and softplus derivatives follow their closed forms", T, float, double) {
    std::vector<double> value, derivative;
    const double tol = tolerance<T>();

    // tanh' = 1 - tanh^2 (elementary calculus).
    value_and_derivative<T>([](var<T> x) { return tenon::tanh(x); }, value, derivative);
    for (std::size_t k = 0; k < std::size(points); ++k) {
        const double th = std::tanh(points[k]);
        CHECK(value[k] == doctest::Approx(th).epsilon(tol));
        CHECK(derivative[k] == doctest::Approx(1.0 - th * th).epsilon(tol * 4));
    }

    // sigmoid s = 1 / (1 + e^-x), s' = s (1 - s) (elementary calculus).
    value_and_derivative<T>([](var<T> x) { return tenon::sigmoid(x); }, value, derivative);
    for (std::size_t k = 0; k < std::size(points); ++k) {
        const double s = 1.0 / (1.0 + std::exp(-points[k]));
        CHECK(value[k] == doctest::Approx(s).epsilon(tol));
        CHECK(derivative[k] == doctest::Approx(s * (1.0 - s)).epsilon(tol * 4));
    }

    // softplus(x) = ln(1 + e^x), softplus' = sigmoid (elementary calculus).
    value_and_derivative<T>([](var<T> x) { return tenon::softplus(x); }, value, derivative);
    for (std::size_t k = 0; k < std::size(points); ++k) {
        CHECK(value[k] == doctest::Approx(std::log1p(std::exp(points[k]))).epsilon(tol));
        CHECK(derivative[k] == doctest::Approx(1.0 / (1.0 + std::exp(-points[k]))).epsilon(tol * 4));
    }

    // ELU (Clevert, Unterthiner & Hochreiter 2016, eq. 15-16): alpha (e^x - 1)
    // and alpha e^x for x <= 0, x and 1 for x > 0.
    const double alpha = 0.75;
    value_and_derivative<T>([&](var<T> x) { return tenon::elu(x, static_cast<T>(alpha)); }, value, derivative);
    for (std::size_t k = 0; k < std::size(points); ++k) {
        const double x = points[k];
        CHECK(value[k] == doctest::Approx(x > 0 ? x : alpha * std::expm1(x)).epsilon(tol));
        CHECK(derivative[k] == doctest::Approx(x > 0 ? 1.0 : alpha * std::exp(x)).epsilon(tol * 4));
    }

    // Leaky ReLU (Maas, Hannun & Ng 2013): slope * x for x < 0.
    value_and_derivative<T>([](var<T> x) { return tenon::leaky_relu(x, T(0.25)); }, value, derivative);
    for (std::size_t k = 0; k < std::size(points); ++k) {
        const double x = points[k];
        CHECK(value[k] == doctest::Approx(x > 0 ? x : 0.25 * x).epsilon(tol));
        CHECK(derivative[k] == (x > 0 ? 1.0 : 0.25));
    }
}

TEST_CASE_TEMPLATE("GELU value and derivative follow Hendrycks & Gimpel 2016", T, float, double) {
    // Hendrycks & Gimpel 2016, "Gaussian Error Linear Units (GELUs)", section 2:
    // GELU(x) = x Phi(x) = 0.5 x (1 + erf(x / sqrt 2)), whose derivative is
    // Phi(x) + x phi(x) with phi(x) = e^(-x^2/2) / sqrt(2 pi); and the
    // approximation 0.5 x (1 + tanh(sqrt(2/pi) (x + 0.044715 x^3))).
    const double pi = std::acos(-1.0);
    const double c = std::sqrt(2.0 / pi);
    const double tol = tolerance<T>();
    std::vector<double> value, derivative;

    value_and_derivative<T>([](var<T> x) { return tenon::gelu(x); }, value, derivative);
    for (std::size_t k = 0; k < std::size(points); ++k) {
        const double x = points[k];
        const double cdf = 0.5 * (1.0 + std::erf(x / std::sqrt(2.0)));
        const double pdf = std::exp(-0.5 * x * x) / std::sqrt(2.0 * pi);
        CHECK(value[k] == doctest::Approx(x * cdf).epsilon(tol * 4));
        CHECK(derivative[k] == doctest::Approx(cdf + x * pdf).epsilon(tol * 4));
    }

    value_and_derivative<T>([](var<T> x) { return tenon::gelu_tanh(x); }, value, derivative);
    for (std::size_t k = 0; k < std::size(points); ++k) {
        const double x = points[k];
        const double th = std::tanh(c * (x + 0.044715 * x * x * x));
        // d/dx: 0.5 (1 + th) + 0.5 x (1 - th^2) c (1 + 3 * 0.044715 x^2) (chain rule).
        const double d = 0.5 * (1.0 + th) + 0.5 * x * (1.0 - th * th) * c * (1.0 + 3.0 * 0.044715 * x * x);
        CHECK(value[k] == doctest::Approx(0.5 * x * (1.0 + th)).epsilon(tol * 4));
        CHECK(derivative[k] == doctest::Approx(d).epsilon(tol * 4));
    }
}

TEST_CASE_TEMPLATE("log-sum-exp of [1000, 1001] is 1001 + ln(1 + e^-1)", T, float, double) {
    // ln(e^1000 + e^1001) = 1001 + ln(1 + e^-1) ~ 1001.3133 (algebra); a naive
    // evaluation overflows e^1000 even in double.
    tape<T> t;
    const auto x = t.variable(make_matrix<T>({{T(1000), T(1001)}}));
    const auto lse = tenon::logsumexp_rows(x);
    REQUIRE(lse.shape() == shape2{1, 1});
    const double expected = 1001.0 + std::log1p(std::exp(-1.0));
    CHECK(static_cast<double>(lse.value()(0, 0)) == doctest::Approx(expected).epsilon(1e-7));
    CHECK(static_cast<double>(lse.value()(0, 0)) == doctest::Approx(1001.3133).epsilon(1e-7));
    // Its gradient is the softmax: [1 / (1 + e), e / (1 + e)].
    t.backward(tenon::sum(lse));
    const double e = std::exp(1.0);
    CHECK(static_cast<double>(t.grad(x)(0, 0)) == doctest::Approx(1.0 / (1.0 + e)).epsilon(1e-6));
    CHECK(static_cast<double>(t.grad(x)(0, 1)) == doctest::Approx(e / (1.0 + e)).epsilon(1e-6));
}

TEST_CASE_TEMPLATE("log_softmax stays finite for logits of +-1e4", T, float, double) {
    tape<T> t;
    t.set_check_finite(true);  // would throw on any NaN or infinity
    const auto x = t.variable(make_matrix<T>({{T(1e4), T(-1e4), T(0)}, {T(-1e4), T(-1e4), T(-1e4)}}));
    const auto y = tenon::log_softmax_rows(x);
    CHECK(static_cast<double>(y.value()(0, 0)) == doctest::Approx(0.0));
    CHECK(static_cast<double>(y.value()(0, 1)) == doctest::Approx(-2e4));
    CHECK(static_cast<double>(y.value()(0, 2)) == doctest::Approx(-1e4));
    // Three equal logits: log(1/3) each.
    for (std::size_t j = 0; j < 3; ++j) CHECK(static_cast<double>(y.value()(1, j)) == doctest::Approx(-std::log(3.0)).epsilon(1e-6));
    CHECK_NOTHROW(t.backward(tenon::sum(y)));
    for (std::size_t k = 0; k < 6; ++k) CHECK(std::isfinite(t.grad(x).data()[k]));
}

TEST_CASE_TEMPLATE("forward values of broadcasting, reductions and matmul", T, float, double) {
    tape<T> t;
    const auto x = t.input(make_matrix<T>({{T(1), T(2), T(3)}, {T(4), T(5), T(6)}}));
    const auto row = t.input(make_matrix<T>({{T(10), T(20), T(30)}}));
    const auto col = t.input(make_matrix<T>({{T(100)}, {T(200)}}));
    const auto one = t.scalar(T(2));

    const auto with_row = x + row;
    CHECK(with_row.value()(1, 2) == T(36));
    const auto with_col = x - col;
    CHECK(with_col.value()(1, 0) == T(-196));
    const auto with_scalar = x / one;
    CHECK(with_scalar.value()(0, 2) == T(1.5));
    const auto outer = col * row;  // 2x1 times 1x3 broadcasts to 2x3
    CHECK(outer.shape() == shape2{2, 3});
    CHECK(outer.value()(1, 2) == T(6000));

    CHECK(tenon::sum(x).value()(0, 0) == T(21));
    CHECK(tenon::mean(x).value()(0, 0) == T(3.5));
    const auto s0 = tenon::sum(x, 0), s1 = tenon::sum(x, 1), m0 = tenon::mean(x, 0), m1 = tenon::mean(x, 1);
    CHECK(s0.shape() == shape2{1, 3});
    CHECK(s0.value()(0, 1) == T(7));
    CHECK(s1.shape() == shape2{2, 1});
    CHECK(s1.value()(1, 0) == T(15));
    CHECK(m0.value()(0, 2) == T(4.5));
    CHECK(m1.value()(0, 0) == T(2));

    // [1 2 3; 4 5 6] [1 2 3; 4 5 6]^T = [14 32; 32 77]
    const auto gram = tenon::matmul(x, x, false, true);
    CHECK(gram.shape() == shape2{2, 2});
    CHECK(gram.value()(0, 1) == T(32));
    CHECK(gram.value()(1, 1) == T(77));
    // x^T x is 3x3 with (2, 2) = 9 + 36.
    const auto cross = tenon::matmul(x, x, true, false);
    CHECK(cross.shape() == shape2{3, 3});
    CHECK(cross.value()(2, 2) == T(45));
    CHECK(tenon::clamp(x, T(2), T(5)).value()(1, 2) == T(5));
    CHECK(tenon::clamp(x, T(2), T(5)).value()(0, 0) == T(2));
    const T raw[] = {T(1), T(4), T(9)};
    CHECK(tenon::sqrt(t.input(raw, 1, 3)).value()(0, 2) == T(3));
    CHECK(tenon::pow(x, T(2)).value()(1, 1) == T(25));
}

// ---------------------------------------------------------------------------
// errors

TEST_CASE_TEMPLATE("shape mismatches name both shapes", T, float, double) {
    tape<T> t;
    const auto a = t.input(matrix<T>({2, 3}, T(1)));
    const auto b = t.input(matrix<T>({3, 2}, T(1)));
    const auto c = t.input(matrix<T>({4, 5}, T(1)));

    const tenon::error add_error = expect_error([&] { tenon::add(a, b); });
    CHECK(add_error.code() == "core.shape.mismatch");
    CHECK(contains(add_error.what(), "add"));
    CHECK(contains(add_error.what(), "2x3"));
    CHECK(contains(add_error.what(), "3x2"));
    CHECK(expect_error([&] { tenon::multiply(a, t.input(matrix<T>({1, 2}, T(1)))); }).code() == "core.shape.mismatch");

    const tenon::error mm_error = expect_error([&] { tenon::matmul(a, c); });
    CHECK(mm_error.code() == "core.shape.mismatch");
    CHECK(contains(mm_error.what(), "matmul"));
    CHECK(contains(mm_error.what(), "2x3"));
    CHECK(contains(mm_error.what(), "4x5"));
    // With the transposes applied the shapes chain; without, they do not.
    CHECK_NOTHROW(tenon::matmul(a, b));
    CHECK_NOTHROW(tenon::matmul(a, a, true, false));
    CHECK(expect_error([&] { tenon::matmul(a, c, true, true); }).code() == "core.shape.mismatch");

    const auto empty_row = t.input(matrix<T>({3, 0}));
    CHECK(expect_error([&] { tenon::logsumexp_rows(empty_row); }).code() == "core.shape.mismatch");
    CHECK(expect_error([&] { tenon::log_softmax_rows(empty_row); }).code() == "core.shape.mismatch");

    tenon::parameter<T> p("bias", shape2{1, 3});
    const tenon::error assign_error = expect_error([&] { p.assign(matrix<T>({2, 3}, T(0))); });
    CHECK(assign_error.code() == "core.shape.mismatch");
    CHECK(contains(assign_error.what(), "bias"));
}

TEST_CASE_TEMPLATE("backward from a value that is not 1x1 is refused", T, float, double) {
    tape<T> t;
    const auto x = t.variable(matrix<T>({2, 2}, T(1)));
    const tenon::error e = expect_error([&] { t.backward(tenon::exp(x)); });
    CHECK(e.code() == "autodiff.backward.not_scalar");
    CHECK(contains(e.what(), "2x2"));
    CHECK(contains(e.what(), "exp"));
}

TEST_CASE_TEMPLATE("values from a cleared or another tape are refused", T, float, double) {
    tape<T> t, other;
    const auto stale = t.variable(matrix<T>({1, 2}, T(1)));
    t.clear();
    const auto fresh = t.variable(matrix<T>({1, 2}, T(2)));  // same node id as `stale`
    REQUIRE(fresh.id() == stale.id());
    for (const auto& e : {expect_error([&] { tenon::exp(stale); }), expect_error([&] { stale.value(); }), expect_error([&] { t.grad(stale); }),
                          expect_error([&] { fresh + stale; }), expect_error([&] { t.backward(tenon::sum(stale)); })}) {
        CHECK(e.code() == "autodiff.value.foreign");
        CHECK(contains(e.what(), "cleared"));
    }

    const auto elsewhere = other.variable(matrix<T>({1, 2}, T(3)));
    const tenon::error e = expect_error([&] { tenon::add(fresh, elsewhere); });
    CHECK(e.code() == "autodiff.value.foreign");
    CHECK(contains(e.what(), "another tape"));
    CHECK(expect_error([&] { t.backward(tenon::sum(elsewhere)); }).code() == "autodiff.value.foreign");
    CHECK(expect_error([&] { tenon::matmul(fresh, elsewhere, false, true); }).code() == "autodiff.value.foreign");

    // A var recorded on no tape at all.
    const var<T> nothing;
    CHECK_FALSE(nothing.valid());
    CHECK(expect_error([&] { nothing.value(); }).code() == "autodiff.value.foreign");
    CHECK(expect_error([&] { tenon::tanh(nothing); }).code() == "autodiff.value.foreign");
}

TEST_CASE_TEMPLATE("a custom operation takes at most four inputs", T, float, double) {
    const total_operation<T> total;
    tape<T> t;
    const auto a = t.variable(matrix<T>({1, 2}, T(1)));
    const auto four = t.apply(total, {a, a, a, a});
    CHECK(four.value()(0, 1) == T(4));
    t.backward(tenon::sum(four));
    CHECK(t.grad(a)(0, 0) == T(4));  // four uses, four contributions

    const tenon::error e = expect_error([&] { t.apply(total, {a, a, a, a, a}); });
    CHECK(e.code() == "autodiff.custom.too_many_inputs");
    CHECK(contains(e.what(), "total"));
    CHECK(contains(e.what(), "5 inputs"));
}

TEST_CASE_TEMPLATE("invalid arguments: clamp bounds, reduction axis", T, float, double) {
    tape<T> t;
    const auto x = t.variable(matrix<T>({2, 2}, T(1)));
    const tenon::error clamp_error = expect_error([&] { tenon::clamp(x, T(1), T(-1)); });
    CHECK(clamp_error.code() == "core.argument.invalid");
    CHECK(contains(clamp_error.what(), "clamp"));
    CHECK_NOTHROW(tenon::clamp(x, T(0.5), T(0.5)));

    const tenon::error axis_error = expect_error([&] { tenon::sum(x, 2); });
    CHECK(axis_error.code() == "core.argument.invalid");
    CHECK(contains(axis_error.what(), "got 2"));
    CHECK(expect_error([&] { tenon::mean(x, -1); }).code() == "core.argument.invalid");
}

TEST_CASE_TEMPLATE("the tape's recording functions refuse kinds they do not compute", T, float, double) {
    tape<T> t;
    const auto x = t.variable(matrix<T>({2, 2}, T(1)));
    const tenon::error e = expect_error([&] { t.unary(tenon::op_kind::add, x); });
    CHECK(e.code() == "core.argument.invalid");
    CHECK(contains(e.what(), "'add'"));
    CHECK(expect_error([&] { t.unary(tenon::op_kind::matmul, x); }).code() == "core.argument.invalid");
    CHECK(expect_error([&] { t.unary(tenon::op_kind::sum_axis, x); }).code() == "core.argument.invalid");
    CHECK(expect_error([&] { t.binary(tenon::op_kind::exp, x, x); }).code() == "core.argument.invalid");
    CHECK(expect_error([&] { t.reduce_axis(tenon::op_kind::sum_all, x, 0); }).code() == "core.argument.invalid");
    // The spelled-out kinds still work through the generic entry points.
    CHECK(t.unary(tenon::op_kind::exp, x).value()(0, 0) == doctest::Approx(std::exp(1.0)));
    CHECK(t.binary(tenon::op_kind::subtract, x, x).value()(1, 1) == T(0));
    CHECK(t.reduce_axis(tenon::op_kind::mean_axis, x, 1).shape() == shape2{2, 1});
}

// ---------------------------------------------------------------------------
// the finite check

TEST_CASE_TEMPLATE("the finite check names the first operation producing NaN or infinity", T, float, double) {
    {
        tape<T> t;
        t.set_check_finite(true);
        CHECK(t.check_finite());
        const auto x = t.input(make_matrix<T>({{T(1), T(0)}}));  // operation #0
        const tenon::error e = expect_error([&] { tenon::log(x); });  // operation #1: log 0 = -inf
        CHECK(e.code() == "autodiff.non_finite");
        CHECK(contains(e.what(), "operation #1 (log)"));
        CHECK(contains(e.what(), "column 1"));
    }
    {
        // sqrt(0) = 0 is finite, but its derivative 1 / (2 sqrt 0) is not.
        tape<T> t;
        t.set_check_finite(true);
        const auto x = t.variable(make_matrix<T>({{T(4), T(0)}}));  // #0
        const auto r = tenon::sqrt(x);  // #1
        const tenon::error e = expect_error([&] { t.backward(tenon::sum(r)); });
        CHECK(e.code() == "autodiff.non_finite");
        CHECK(contains(e.what(), "backward through operation #1 (sqrt)"));
    }
    {
        // A host-defined operation is reported by its own name.
        const reciprocal_operation<T> reciprocal;
        tape<T> t;
        t.set_check_finite(true);
        const auto x = t.variable(make_matrix<T>({{T(2), T(0)}}));
        const tenon::error e = expect_error([&] { t.apply(reciprocal, {x}); });
        CHECK(e.code() == "autodiff.non_finite");
        CHECK(contains(e.what(), "operation #1 (reciprocal)"));
    }
    {
        // Overflow to infinity is caught at the operation that overflows.
        tape<T> t;
        t.set_check_finite(true);
        const auto big = t.input(make_matrix<T>({{std::numeric_limits<T>::max(), T(1)}}));  // #0
        const tenon::error e = expect_error([&] { big + big; });  // #1: overflows to +inf
        CHECK(e.code() == "autodiff.non_finite");
        CHECK(contains(e.what(), "operation #1 (add)"));
        CHECK(contains(e.what(), "column 0"));
    }
}

TEST_CASE_TEMPLATE("a side branch off the path to the loss does not poison gradients", T, float, double) {
    // sqrt(0) = 0 is a finite value whose derivative is infinite. When that
    // node does not feed the loss, its upstream gradient is zero and backward
    // must skip it rather than add 0 * inf = NaN into the shared input.
    tape<T> t;
    t.set_check_finite(true);
    const auto x = t.variable(make_matrix<T>({{T(4), T(0)}}));
    const auto side = tenon::sqrt(x);  // e.g. a monitored value
    const auto loss = tenon::sum(tenon::square(x));
    CHECK_NOTHROW(t.backward(loss));
    CHECK(t.grad(x)(0, 0) == T(8));
    CHECK(t.grad(x)(0, 1) == T(0));
    CHECK(t.grad(side)(0, 1) == T(0));
}

TEST_CASE_TEMPLATE("with the finite check off, non-finite values pass silently", T, float, double) {
    tape<T> t;
    CHECK_FALSE(t.check_finite());
    const auto x = t.variable(make_matrix<T>({{T(1), T(0)}}));
    const auto l = tenon::log(x);
    CHECK(std::isinf(l.value()(0, 1)));
    const auto r = tenon::sqrt(x);
    CHECK_NOTHROW(t.backward(tenon::sum(r)));
    CHECK(std::isinf(t.grad(x)(0, 1)));
}

// ---------------------------------------------------------------------------
// reuse, accumulation, frozen parameters

namespace {

// One training-step graph: mean(tanh(x W + b)^2), recorded on a cleared tape.
// Returns the data() pointers of every recorded value, in recording order.
template <class T>
std::vector<const T*> record_step(tape<T>& t, tenon::parameter<T>& w, tenon::parameter<T>& b, const matrix<T>& x, T& loss_value) {
    t.clear();
    std::vector<var<T>> vars;
    vars.push_back(t.input(x));
    vars.push_back(t.track(w));
    vars.push_back(t.track(b));
    vars.push_back(tenon::matmul(vars[0], vars[1]));
    vars.push_back(vars[3] + vars[2]);
    vars.push_back(tenon::tanh(vars[4]));
    vars.push_back(tenon::square(vars[5]));
    vars.push_back(tenon::mean(vars[6]));
    t.backward(vars.back());
    loss_value = vars.back().value()(0, 0);
    std::vector<const T*> buffers;
    for (const auto& v : vars) {
        buffers.push_back(v.value().data());
        buffers.push_back(t.grad(v).data());
    }
    return buffers;
}

}  // namespace

TEST_CASE_TEMPLATE("recording the same graph after clear() reuses every buffer", T, float, double) {
    tenon::random_engine rng(3);
    matrix<T> x({4, 3}), w0({3, 2});
    for (auto& v : x) v = rng.uniform<T>(T(-1), T(1));
    for (auto& v : w0) v = rng.uniform<T>(T(-1), T(1));
    tenon::parameter<T> w("w", w0), b("b", shape2{1, 2});
    tape<T> t;

    T first_loss = T(0);
    const auto first = record_step(t, w, b, x, first_loss);
    const matrix<T> first_grad = w.grad();
    CHECK(t.size() == 8);
    for (int step = 0; step < 3; ++step) {
        w.clear_gradient();
        b.clear_gradient();
        T loss = T(0);
        const auto again = record_step(t, w, b, x, loss);
        CHECK(again == first);  // same buffers, node by node
        CHECK(loss == first_loss);  // bit-identical results
        for (std::size_t k = 0; k < w.size(); ++k) CHECK(w.grad().data()[k] == first_grad.data()[k]);
    }
}

TEST_CASE_TEMPLATE("clear() empties the recording; track() follows a resized parameter", T, float, double) {
    tape<T> t;
    tenon::parameter<T> p("p", make_matrix<T>({{T(1), T(2)}}));
    t.track(p);
    CHECK(t.size() == 1);
    t.clear();
    CHECK(t.size() == 0);

    // A host that reshapes a parameter's value directly gets a gradient of
    // the new shape, starting from zero, the next time the tape watches it.
    p.value() = make_matrix<T>({{T(1)}, {T(2)}, {T(3)}});
    const auto v = t.track(p);
    CHECK(tenon::shape_of(p.grad()) == shape2{3, 1});
    t.backward(tenon::sum(tenon::square(v)));
    CHECK(p.grad()(2, 0) == T(6));
}

TEST_CASE_TEMPLATE("two backward passes without clear_gradient add up", T, float, double) {
    tenon::parameter<T> w("w", make_matrix<T>({{T(0.5), T(-1)}}));
    tape<T> t;
    const auto loss = tenon::sum(tenon::square(t.track(w)));  // d/dw = 2w
    t.backward(loss);
    CHECK(w.grad()(0, 0) == doctest::Approx(1.0));
    t.backward(loss);  // the same recording again
    CHECK(w.grad()(0, 0) == doctest::Approx(2.0));
    t.clear();
    t.backward(tenon::sum(tenon::square(t.track(w))));  // and a fresh recording
    CHECK(w.grad()(0, 0) == doctest::Approx(3.0));
    CHECK(w.grad()(0, 1) == doctest::Approx(-6.0));
    w.clear_gradient();
    CHECK(w.grad()(0, 1) == T(0));
}

TEST_CASE_TEMPLATE("grad() reads zero for values that did not influence the loss", T, float, double) {
    tape<T> t;
    const auto x = t.variable(make_matrix<T>({{T(1), T(2)}}));
    const auto first_loss = tenon::sum(tenon::square(x));
    const auto later = tenon::exp(x);  // recorded after first_loss
    const auto second_loss = tenon::sum(later);
    t.backward(second_loss);
    CHECK(t.grad(later)(0, 0) == T(1));
    t.backward(first_loss);
    // `later` has no path to first_loss: its gradient must not be the stale
    // value of the previous pass.
    CHECK(t.grad(later)(0, 0) == T(0));
    CHECK(t.grad(x)(0, 1) == T(4));
    // Constants never get a gradient.
    const auto c = t.input(make_matrix<T>({{T(1)}}));
    CHECK(t.grad(c)(0, 0) == T(0));
}

TEST_CASE_TEMPLATE("a frozen parameter takes part in the forward pass but gets no gradient", T, float, double) {
    tenon::parameter<T> frozen("frozen", make_matrix<T>({{T(2), T(3)}}));
    tenon::parameter<T> live("live", make_matrix<T>({{T(5), T(7)}}));
    frozen.set_trainable(false);
    CHECK_FALSE(frozen.trainable());
    tape<T> t;
    const auto loss = tenon::sum(t.track(frozen) * t.track(live));
    CHECK(loss.value()(0, 0) == T(31));
    t.backward(loss);
    CHECK(frozen.grad()(0, 0) == T(0));
    CHECK(frozen.grad()(0, 1) == T(0));
    CHECK(live.grad()(0, 0) == T(2));  // d/dlive = frozen
    CHECK(live.grad()(0, 1) == T(3));

    // With only frozen parameters the loss needs no gradient at all.
    t.clear();
    CHECK_NOTHROW(t.backward(tenon::sum(t.track(frozen))));
    CHECK(frozen.grad()(0, 0) == T(0));
}

TEST_CASE_TEMPLATE("constant-on-the-left subtraction and division by a constant", T, float, double) {
    // d/dx sum(1 - x) = -1 and d/dx sum(x / 4) = 1/4 (elementary calculus).
    tenon::parameter<T> x("x", make_matrix<T>({{T(2), T(-3)}}));
    tenon::tape<T> t;
    const auto v = t.track(x);
    const auto y = T(1) - v;
    CHECK(y.value()(0, 1) == doctest::Approx(4.0));
    t.backward(tenon::sum(y) + tenon::sum(v / T(4)));
    CHECK(x.grad()(0, 0) == doctest::Approx(-0.75));
    CHECK(x.grad()(0, 1) == doctest::Approx(-0.75));
}

// ---------------------------------------------------------------------------
// fused operations: affine_activation and softmax_cross_entropy

namespace {

// Values spread over [-1.7, 1.9) without exact zeros (relu's kink), from a
// fixed engine so the tests are repeatable.
template <class T>
matrix<T> spread(std::size_t rows, std::size_t cols, std::uint64_t seed) {
    tenon::random_engine engine(seed);
    matrix<T> m({rows, cols});
    for (std::size_t k = 0; k < m.size(); ++k) {
        T v = engine.uniform<T>(T(-1.7), T(1.9));
        if (std::abs(v) < T(0.05)) v = T(0.3);
        m.data()[k] = v;
    }
    return m;
}

struct fused_unit {
    tenon::op_kind unit;
    double coefficient;
};
const fused_unit fused_units[] = {{tenon::op_kind::relu, 0.0}, {tenon::op_kind::leaky_relu, 0.1}, {tenon::op_kind::elu, 1.0},
                                  {tenon::op_kind::elu, 0.5},  {tenon::op_kind::tanh, 0.0},       {tenon::op_kind::sigmoid, 0.0}};

template <class T>
var<T> unfused_activation(var<T> z, tenon::op_kind unit, T coefficient) {
    switch (unit) {
    case tenon::op_kind::relu: return tenon::relu(z);
    case tenon::op_kind::leaky_relu: return tenon::leaky_relu(z, coefficient);
    case tenon::op_kind::elu: return tenon::elu(z, coefficient);
    case tenon::op_kind::tanh: return tenon::tanh(z);
    default: return tenon::sigmoid(z);
    }
}

template <class T>
void check_same_bits(const matrix<T>& a, const matrix<T>& b, const char* what) {
    INFO(what);
    REQUIRE(tenon::shape_of(a) == tenon::shape_of(b));
    for (std::size_t k = 0; k < a.size(); ++k) REQUIRE(a.data()[k] == b.data()[k]);
}

}  // namespace

TEST_CASE("affine_activation: gradients of x, weights and bias match finite differences") {
    for (const bool with_bias : {true, false}) {
        for (const auto& u : fused_units) {
            const std::string unit_name = tenon::op_name(u.unit);
            CAPTURE(unit_name);
            CAPTURE(with_bias);
            tenon::parameter<double> x("x", spread<double>(5, 4, 1));
            tenon::parameter<double> w("w", spread<double>(4, 3, 2));
            tenon::parameter<double> b("b", spread<double>(1, 3, 3));
            const matrix<double> c = spread<double>(5, 3, 4);  // weights the outputs unevenly
            std::vector<tenon::parameter<double>*> params = {&x, &w};
            if (with_bias) params.push_back(&b);
            const auto report = tenon::check_gradients(params, [&](tape<double>& t) {
                const auto y = tenon::affine_activation(t.track(x), t.track(w), with_bias ? t.track(b) : var<double>(), u.unit, u.coefficient);
                return tenon::sum(y * t.input(c));
            });
            CHECK(report.max_rel_error < 1e-6);
        }
    }
}

TEST_CASE_TEMPLATE("affine_activation gives the same bits as matmul, bias add and the activation recorded apart", T, float, double) {
    for (const auto& u : fused_units) {
        const std::string unit_name = tenon::op_name(u.unit);
        CAPTURE(unit_name);
        const T coefficient = static_cast<T>(u.coefficient);
        tenon::parameter<T> w("w", spread<T>(7, 5, 11));
        tenon::parameter<T> b("b", spread<T>(1, 5, 12));
        const matrix<T> input = spread<T>(9, 7, 13);
        const matrix<T> c = spread<T>(9, 5, 14);

        tape<T> t;
        const auto x1 = t.variable(input);
        const auto y1 = tenon::affine_activation(x1, t.track(w), t.track(b), u.unit, coefficient);
        t.backward(tenon::sum(y1 * t.input(c)));
        const matrix<T> value_fused = y1.value(), x_fused = t.grad(x1), w_fused = w.grad(), b_fused = b.grad();

        w.clear_gradient();
        b.clear_gradient();
        tape<T> t2;
        const auto x2 = t2.variable(input);
        const auto y2 = unfused_activation(tenon::matmul(x2, t2.track(w)) + t2.track(b), u.unit, coefficient);
        t2.backward(tenon::sum(y2 * t2.input(c)));
        check_same_bits(value_fused, y2.value(), "value");
        check_same_bits(x_fused, t2.grad(x2), "input gradient");
        check_same_bits(w_fused, w.grad(), "weight gradient");
        check_same_bits(b_fused, b.grad(), "bias gradient");
    }
}

TEST_CASE_TEMPLATE("affine_activation refuses activations it cannot fuse and shapes that do not chain", T, float, double) {
    tape<T> t;
    const auto x = t.input(spread<T>(3, 4, 1));
    const auto w = t.input(spread<T>(4, 2, 2));
    const auto b = t.input(spread<T>(1, 2, 3));
    for (const auto unit : {tenon::op_kind::softplus, tenon::op_kind::gelu_erf, tenon::op_kind::exp}) {
        const auto e = expect_error([&] { tenon::affine_activation(x, w, b, unit, T(0)); });
        CHECK(e.code() == std::string("core.argument.invalid"));
        CHECK(contains(e.what(), tenon::op_name(unit)));
    }
    // A negative slope or alpha makes the sign of the output ambiguous.
    CHECK(expect_error([&] { tenon::affine_activation(x, w, b, tenon::op_kind::leaky_relu, T(-0.5)); }).code() ==
          std::string("core.argument.invalid"));
    CHECK(expect_error([&] { tenon::affine_activation(x, w, b, tenon::op_kind::elu, T(-1)); }).code() == std::string("core.argument.invalid"));
    CHECK(contains(expect_error([&] { tenon::affine_activation(x, b, b, tenon::op_kind::relu, T(0)); }).what(), "inner dimensions differ"));
    CHECK(contains(expect_error([&] { tenon::affine_activation(x, w, w, tenon::op_kind::relu, T(0)); }).what(), "is not a 1 x 2 row"));
}

TEST_CASE("softmax_cross_entropy: gradients of logits and target weights match finite differences") {
    tenon::parameter<double> z("z", spread<double>(4, 5, 21));
    tenon::parameter<double> q("q", spread<double>(4, 5, 22));
    z.value().data()[3] = 40.0;  // a large logit: the row maximum is subtracted
    const auto report = tenon::check_gradients({&z, &q}, [&](tape<double>& t) { return tenon::softmax_cross_entropy(t.track(z), t.track(q)); });
    CHECK(report.max_rel_error < 1e-6);
}

TEST_CASE_TEMPLATE("softmax_cross_entropy gives the same bits as -sum(log_softmax_rows(z) * Q)", T, float, double) {
    const matrix<T> logits = spread<T>(6, 10, 31);
    matrix<T> q({6, 10});
    q.fill(T(0));
    for (std::size_t i = 0; i < 6; ++i) q.data()[i * 10 + (3 * i) % 10] = T(1) / T(6);  // one-hot rows, mean reduction

    tape<T> t;
    const auto z1 = t.variable(logits);
    const auto l1 = tenon::softmax_cross_entropy(z1, t.input(q));
    t.backward(l1);
    tape<T> t2;
    const auto z2 = t2.variable(logits);
    const auto l2 = -tenon::sum(tenon::log_softmax_rows(z2) * t2.input(q));
    t2.backward(l2);
    check_same_bits(l1.value(), l2.value(), "loss");
    check_same_bits(t.grad(z1), t2.grad(z2), "logit gradient");
    // One-hot rows of weight w: dz = w (softmax - onehot) (Bishop 2006, eq. 4.109).
    const auto p = tenon::exp(tenon::log_softmax_rows(t.input(logits)));
    for (std::size_t k = 0; k < q.size(); ++k) {
        const double expected = (static_cast<double>(p.value().data()[k]) - (q.data()[k] > T(0) ? 1.0 : 0.0)) / 6.0;
        CHECK(static_cast<double>(t.grad(z1).data()[k]) == doctest::Approx(expected).epsilon(1e-5));
    }
    CHECK(contains(expect_error([&] { tenon::softmax_cross_entropy(z1, t.input(spread<T>(6, 9, 1))); }).what(), "differ in shape"));
}
