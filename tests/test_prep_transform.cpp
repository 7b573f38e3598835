// Tests of prep/scaling.hpp, prep/encoding.hpp and prep/imputation.hpp.
#include <doctest/doctest.h>

#include <cmath>
#include <cstring>
#include <limits>
#include <sstream>
#include <string>
#include <vector>

#include <tenon/core/random.hpp>

#include <tenon/prep/csv.hpp>
#include <tenon/prep/encoding.hpp>
#include <tenon/prep/imputation.hpp>
#include <tenon/prep/scaling.hpp>

#include "prep_test_support.hpp"

using prep_test::error_code_of;

namespace {
tenon::table table_of(const std::string& text) {
    std::istringstream in(text);
    return tenon::read_csv(in, {}, "s.csv");
}
}  // namespace

TEST_CASE("min-max worked example: 2 4 6 10 to [0, 1] and to [-1, 1]") {
    auto t = table_of("x\n2\n4\n6\n10\n");
    auto s = tenon::measure_scaling(t.at("x"), tenon::all_rows(4), tenon::scaling_method::min_max);
    CHECK(s.forward(2) == 0.0);
    CHECK(s.forward(6) == doctest::Approx(0.5));  // (6 - 2) / (10 - 2)
    CHECK(s.forward(10) == 1.0);
    auto wide = tenon::measure_scaling(t.at("x"), tenon::all_rows(4), tenon::scaling_method::min_max, -1.0, 1.0);
    CHECK(wide.forward(6) == doctest::Approx(0.0));  // -1 + 0.5 * 2
    CHECK(wide.inverse(wide.forward(4)) == doctest::Approx(4.0));
    std::string message;
    CHECK(error_code_of([&] { tenon::measure_scaling(t.at("x"), {0}, tenon::scaling_method::min_max, 1.0, 1.0); }, &message) ==
          "core.argument.invalid");
    CHECK(message == "[core.argument.invalid] min-max scaling: the target range must satisfy low < high, got [1.000000, 1.000000]");
}

TEST_CASE("z-score worked example: 2 4 4 4 5 5 7 9 has mean 5 and population deviation 2") {
    // The classic example of a population standard deviation (from memory):
    // squared deviations 9+1+1+1+0+0+4+16 = 32, 32 / 8 = 4, sqrt 4 = 2.
    auto t = table_of("x\n2\n4\n4\n4\n5\n5\n7\n9\n");
    auto s = tenon::measure_scaling(t.at("x"), tenon::all_rows(8), tenon::scaling_method::z_score);
    CHECK(s.center == doctest::Approx(5.0));
    CHECK(s.spread == doctest::Approx(2.0));
    CHECK(s.forward(9) == doctest::Approx(2.0));
    CHECK(s.forward(2) == doctest::Approx(-1.5));
    CHECK(s.inverse(-1.5) == doctest::Approx(2.0));
}

TEST_CASE("z-score keeps precision at an offset of 1e9") {
    // 1e9 + {0.1, 0.2, 0.3}: mean 1e9 + 0.2, deviation sqrt(2/300) = 0.0816...
    auto t = table_of("x\n1000000000.1\n1000000000.2\n1000000000.3\n");
    auto s = tenon::measure_scaling(t.at("x"), tenon::all_rows(3), tenon::scaling_method::z_score);
    CHECK(s.spread == doctest::Approx(std::sqrt(0.02 / 3.0)).epsilon(1e-6));
    CHECK(s.forward(1000000000.3) == doctest::Approx(std::sqrt(1.5)).epsilon(1e-6));  // 0.1 / sqrt(0.02/3)
}

TEST_CASE("median-IQR scaling worked example: median and interquartile range") {
    // 1 2 3 4 100: median 3, Q1 2, Q3 4 (Hyndman & Fan def. 7), IQR 2.
    auto t = table_of("x\n1\n2\n3\n4\n100\n");
    auto s = tenon::measure_scaling(t.at("x"), tenon::all_rows(5), tenon::scaling_method::median_iqr);
    CHECK(s.center == 3.0);
    CHECK(s.spread == 2.0);
    CHECK(s.forward(100) == doctest::Approx(48.5));
    CHECK(s.inverse(48.5) == doctest::Approx(100.0));
}

TEST_CASE("constant columns: no division by zero, documented images, exact inverse") {
    auto t = table_of("x\n7\n7\n7\n");
    const auto rows = tenon::all_rows(3);
    auto z = tenon::measure_scaling(t.at("x"), rows, tenon::scaling_method::z_score);
    auto m = tenon::measure_scaling(t.at("x"), rows, tenon::scaling_method::min_max, 2.0, 3.0);
    auto r = tenon::measure_scaling(t.at("x"), rows, tenon::scaling_method::median_iqr);
    CHECK(z.forward(7) == 0.0);
    CHECK(m.forward(7) == 2.0);  // the low end of the range
    CHECK(r.forward(7) == 0.0);
    CHECK(z.inverse(0.0) == 7.0);
    CHECK(m.inverse(2.0) == 7.0);
    CHECK(std::isfinite(z.forward(8)));
}

TEST_CASE("scaling errors") {
    auto t = table_of("x,c\nNA,a\n1,b\n");
    std::string message;
    CHECK(error_code_of([&] { tenon::measure_scaling(t.at("x"), {0}, tenon::scaling_method::z_score); }, &message) == "prep.rows.empty");
    CHECK(message == "[prep.rows.empty] column 'x': no present values to measure a scaling on");
    CHECK(error_code_of([&] { tenon::measure_scaling(t.at("c"), {0}, tenon::scaling_method::z_score); }, &message) == "prep.column.kind");
    CHECK(message == "[prep.column.kind] column_moments: column 'c' is categorical");
    CHECK(error_code_of([&] { t.at("c").push_number(1.0); }, &message) == "prep.column.kind");
    CHECK(message == "[prep.column.kind] column 'c' is categorical, cannot push_number");
}

TEST_CASE_TEMPLATE("matrix columns: measure, apply and invert z-score and min-max", T, float, double) {
    tenon::matrix<T> x = tenon::make_matrix<T>({{1, 10}, {2, 20}, {3, 60}});
    auto z = tenon::measure_matrix_scalings(x, tenon::scaling_method::z_score);
    REQUIRE(z.size() == 2);
    CHECK(z[0].center == doctest::Approx(2.0));
    CHECK(z[1].center == doctest::Approx(30.0));
    tenon::matrix<T> y = x;
    tenon::apply_scalings(y, z);
    CHECK(y(0, 0) == doctest::Approx(-std::sqrt(1.5)));  // (1 - 2) / sqrt(2/3)
    CHECK(y(1, 0) == doctest::Approx(0.0));
    tenon::invert_scalings(y, z);
    for (std::size_t i = 0; i < 3; ++i)
        for (std::size_t j = 0; j < 2; ++j) CHECK(y(i, j) == doctest::Approx(x(i, j)).epsilon(1e-5));
    auto m = tenon::measure_matrix_scalings(x, tenon::scaling_method::min_max);
    tenon::apply_scalings(y, m);
    CHECK(y(0, 1) == doctest::Approx(0.0));
    CHECK(y(1, 1) == doctest::Approx(0.2));  // (20 - 10) / 50
    CHECK(y(2, 1) == doctest::Approx(1.0));
    std::string message;
    CHECK(error_code_of([&] { tenon::apply_scalings(y, std::vector<tenon::scaling>(3)); }, &message) == "core.shape.mismatch");
    CHECK(message == "[core.shape.mismatch] apply_scalings: 3 scalings for 2 columns");
}

TEST_CASE_TEMPLATE("apply_scalings gives scaling::forward's bits for every column count and vector width", T, float, double) {
    // Column counts from 1 to 600 take both layouts of the per-element
    // tables (whole rows repeated, and blocks of 256 columns per row) and
    // every vector tail; values include NaN, infinities, -0 and denormals.
    tenon::random_engine rng(31);
    const T inf = std::numeric_limits<T>::infinity(), nan = std::numeric_limits<T>::quiet_NaN();
    const T specials[] = {T(0), -T(0), inf, -inf, nan, std::numeric_limits<T>::denorm_min(), T(1e30), T(-7)};
    const auto same = [](T a, T b) { return std::memcmp(&a, &b, sizeof(T)) == 0 || (std::isnan(a) && std::isnan(b)); };
    for (const std::size_t cols : std::vector<std::size_t>{1, 3, 5, 7, 8, 16, 31, 33, 63, 64, 65, 100, 255, 256, 257, 600}) {
        for (const std::size_t rows : std::vector<std::size_t>{0, 1, 2, 9, 131}) {
            CAPTURE(cols);
            CAPTURE(rows);
            std::vector<tenon::scaling> s(cols);
            for (auto& c : s) {
                c.method = rng.below(2) ? tenon::scaling_method::z_score : tenon::scaling_method::min_max;
                c.center = rng.normal(0.0, 50.0);
                c.spread = 0.1 + rng.uniform(0.0, 9.0);
                if (c.method == tenon::scaling_method::min_max) {
                    c.low = -1.0;
                    c.high = 2.5;
                }
            }
            tenon::matrix<T> x({rows, cols});
            for (std::size_t k = 0; k < x.size(); ++k) x.data()[k] = rng.below(8) == 0 ? specials[rng.below(8)] : rng.normal(T(3), T(40));
            tenon::matrix<T> y = x;
            tenon::apply_scalings(y, s);
            bool all_same = true;
            for (std::size_t i = 0; i < rows; ++i)
                for (std::size_t j = 0; j < cols; ++j)
                    all_same = all_same && same(y(i, j), static_cast<T>(s[j].forward(static_cast<double>(x(i, j)))));
            CHECK(all_same);
        }
    }
#if TENON_SIMD_X86
    // The narrower vector version as well, where the CPU has it (apply_scalings
    // takes the widest one).
    if (tenon::cpu_has_avx2_fma()) {
        const std::size_t n = 203;
        std::vector<double> low(n), center(n), factor(n);
        std::vector<T> x(n);
        for (std::size_t k = 0; k < n; ++k) {
            low[k] = rng.normal(0.0, 1.0);
            center[k] = rng.normal(0.0, 30.0);
            factor[k] = rng.normal(0.0, 3.0);
            x[k] = rng.below(8) == 0 ? specials[rng.below(8)] : rng.normal(T(0), T(40));
        }
        std::vector<T> y = x;
        const std::size_t done = tenon::detail::affine_span_avx2(y.data(), n, low.data(), center.data(), factor.data());
        CHECK(done == 200);
        bool all_same = true;
        for (std::size_t k = 0; k < done; ++k)
            all_same = all_same && same(y[k], static_cast<T>(low[k] + (static_cast<double>(x[k]) - center[k]) * factor[k]));
        CHECK(all_same);
        CHECK(same(y[n - 1], x[n - 1]));  // the tail is left to the plain loop
    }
#endif
#if TENON_SIMD_NEON64
    {
        // aarch64's NEON version directly: whole pairs, each operation rounded on its own.
        const std::size_t n = 203;
        std::vector<double> low(n), center(n), factor(n);
        std::vector<T> x(n);
        for (std::size_t k = 0; k < n; ++k) {
            low[k] = rng.normal(0.0, 1.0);
            center[k] = rng.normal(0.0, 30.0);
            factor[k] = rng.normal(0.0, 3.0);
            x[k] = rng.below(8) == 0 ? specials[rng.below(8)] : rng.normal(T(0), T(40));
        }
        std::vector<T> y = x;
        const std::size_t done = tenon::detail::affine_span_neon(y.data(), n, low.data(), center.data(), factor.data());
        CHECK(done == 202);
        bool all_same = true;
        for (std::size_t k = 0; k < done; ++k)
            all_same = all_same && same(y[k], static_cast<T>(low[k] + (static_cast<double>(x[k]) - center[k]) * factor[k]));
        CHECK(all_same);
    }
#endif
}

TEST_CASE("one-hot: sorted order, unseen policies, reference level omitted, slot names") {
    tenon::one_hot_layout fail({"press", "pump", "fan", "pump"});
    CHECK(fail.categories() == std::vector<std::string>{"fan", "press", "pump"});
    CHECK(fail.width() == 3);
    float out[4] = {9, 9, 9, 9};
    fail.encode(fail.find("pump"), out, "machine", "pump");
    CHECK(out[0] == 0.0f);
    CHECK(out[1] == 0.0f);
    CHECK(out[2] == 1.0f);
    CHECK(fail.find("valve") == -1);
    std::string message;
    CHECK(error_code_of([&] { fail.encode(-1, out, "machine", "valve"); }, &message) == "prep.category.unseen");
    CHECK(message == "[prep.category.unseen] column 'machine': the category 'valve' was not seen in the training rows");

    tenon::one_hot_layout zero({"a", "b"}, tenon::unseen_policy::all_zero);
    double d[2] = {5, 5};
    zero.encode(-1, d, "c", "z");
    CHECK(d[0] == 0.0);
    CHECK(d[1] == 0.0);

    tenon::one_hot_layout other({"a", "b"}, tenon::unseen_policy::other_slot, true);
    CHECK(other.width() == 2);  // b, <other>
    CHECK(other.slot_names("c") == std::vector<std::string>{"c=b", "c=<other>"});
    other.encode(other.find("a"), d, "c", "a");  // the dropped first category: all zeros
    CHECK(d[0] == 0.0);
    CHECK(d[1] == 0.0);
    other.encode(-1, d, "c", "z");
    CHECK(d[0] == 0.0);
    CHECK(d[1] == 1.0);
    other.encode(other.find("b"), d, "c", "b");
    CHECK(d[0] == 1.0);
    CHECK(d[1] == 0.0);
}

TEST_CASE("class index: names <-> indices, numeric labels in numeric order") {
    tenon::class_index numeric({"10", "2", "1", "2"});
    CHECK(numeric.names() == std::vector<std::string>{"1", "2", "10"});
    CHECK(numeric.find("10") == 2);
    CHECK(numeric.find("3") == -1);
    tenon::class_index text({"ok", "fault", "warn"});
    CHECK(text.name(0) == "fault");
    CHECK(text.find("warn") == 2);
}

TEST_CASE("imputation learned on the given rows: mean, median, mode, constant") {
    auto t = table_of("x,c\n1,a\n2,b\n2,b\n10,a\nNA,NA\n100,c\n");
    const std::vector<std::size_t> train{0, 1, 2, 3, 4};  // row 5 (100, c) is not training
    CHECK(tenon::measure_fill(t.at("x"), train, tenon::fill_method::mean).number == doctest::Approx(15.0 / 4.0));
    CHECK(tenon::measure_fill(t.at("x"), train, tenon::fill_method::median).number == doctest::Approx(2.0));
    CHECK(tenon::measure_fill(t.at("x"), train, tenon::fill_method::mode).number == 2.0);
    CHECK(tenon::measure_fill(t.at("c"), train, tenon::fill_method::mode).text == "a");  // a, b tie: a sorts first
    CHECK(tenon::measure_fill(t.at("c"), train, tenon::fill_method::constant, 0.0, "unknown").text == "unknown");
    CHECK(tenon::measure_fill(t.at("x"), train, tenon::fill_method::constant, -1.0).number == -1.0);
    CHECK(tenon::measure_fill(t.at("x"), tenon::all_rows(6), tenon::fill_method::mean).number ==
          doctest::Approx(115.0 / 5.0));  // differs when row 5 is included
    std::string message;
    CHECK(error_code_of([&] { tenon::measure_fill(t.at("c"), train, tenon::fill_method::mean); }, &message) == "prep.column.kind");
    CHECK(message == "[prep.column.kind] column 'c' is categorical: it cannot be filled with the mean; use mode or constant");
    CHECK(error_code_of([&] { tenon::measure_fill(t.at("x"), {4}, tenon::fill_method::median); }, &message) == "prep.rows.empty");
    CHECK(message == "[prep.rows.empty] column 'x': no present values to learn a fill value from");
}
