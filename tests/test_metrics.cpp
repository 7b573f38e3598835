// Metrics against hand-computed worked values. Definitions: Sokolova &
// Lapalme (2009), table 3; R^2 as 1 - SS_res / SS_tot.
#include <doctest/doctest.h>

#include <cmath>
#include <vector>

#include <tenon/train/metrics.hpp>
#include <tenon/train/report_svg.hpp>

TEST_CASE("classification scores of a small worked example") {
    // truth 0 0 1 1 2 2, predicted 0 1 1 1 2 0; by hand:
    // confusion rows (true) x cols (predicted): [1 1 0; 0 2 0; 1 0 1]
    const std::vector<std::size_t> truth{0, 0, 1, 1, 2, 2};
    const std::vector<std::size_t> predicted{0, 1, 1, 1, 2, 0};
    const auto s = tenon::score_classes(truth, predicted, 3);
    CHECK(s.confusion.count(0, 0) == 1);
    CHECK(s.confusion.count(0, 1) == 1);
    CHECK(s.confusion.count(1, 1) == 2);
    CHECK(s.confusion.count(2, 0) == 1);
    CHECK(s.confusion.count(2, 2) == 1);
    CHECK(s.confusion.total() == 6);
    CHECK(s.accuracy == doctest::Approx(4.0 / 6.0));
    // class 0: P = 1/2, R = 1/2, F1 = 1/2; class 1: P = 2/3, R = 1, F1 = 0.8;
    // class 2: P = 1, R = 1/2, F1 = 2/3.
    CHECK(s.per_class[0].precision == doctest::Approx(0.5));
    CHECK(s.per_class[0].recall == doctest::Approx(0.5));
    CHECK(s.per_class[1].precision == doctest::Approx(2.0 / 3.0));
    CHECK(s.per_class[1].recall == doctest::Approx(1.0));
    CHECK(s.per_class[1].f1 == doctest::Approx(0.8));
    CHECK(s.per_class[2].precision == doctest::Approx(1.0));
    CHECK(s.per_class[2].f1 == doctest::Approx(2.0 / 3.0));
    CHECK(s.per_class[2].true_rows == 2);
    CHECK(s.macro_precision == doctest::Approx((0.5 + 2.0 / 3.0 + 1.0) / 3.0));
    CHECK(s.macro_recall == doctest::Approx((0.5 + 1.0 + 0.5) / 3.0));
    CHECK(s.macro_f1 == doctest::Approx((0.5 + 0.8 + 2.0 / 3.0) / 3.0));
}

TEST_CASE("a class never predicted has precision 0, not NaN") {
    const auto s = tenon::score_classes({0, 1, 1}, {1, 1, 1}, 2);
    CHECK(s.per_class[0].precision == 0.0);
    CHECK(s.per_class[0].f1 == 0.0);
    CHECK(s.per_class[1].precision == doctest::Approx(2.0 / 3.0));
}

TEST_CASE_TEMPLATE("log loss of a worked example", T, float, double) {
    // -(ln 0.7 + ln 0.6 + ln 0.5) / 3 computed by hand.
    const auto p = tenon::make_matrix<T>({{T(0.7), T(0.2), T(0.1)}, {T(0.3), T(0.6), T(0.1)}, {T(0.25), T(0.25), T(0.5)}});
    const double expected = -(std::log(0.7) + std::log(0.6) + std::log(0.5)) / 3.0;
    CHECK(tenon::log_loss(p, {0, 1, 2}) == doctest::Approx(expected).epsilon(1e-6));
    // A uniform prediction over K classes gives ln K (elementary).
    const auto u = tenon::make_matrix<T>({{T(0.25), T(0.25), T(0.25), T(0.25)}});
    CHECK(tenon::log_loss(u, {3}) == doctest::Approx(std::log(4.0)).epsilon(1e-6));
    // A confident mistake is large but finite (clipped at 1e-15).
    const auto wrong = tenon::make_matrix<T>({{T(1), T(0)}});
    CHECK(tenon::log_loss(wrong, {1}) == doctest::Approx(-std::log(1e-15)));
    CHECK(tenon::row_argmax(p) == std::vector<std::size_t>{0, 1, 2});
}

TEST_CASE_TEMPLATE("regression scores of a worked example", T, float, double) {
    // truth 3 -0.5 2 7, predicted 2.5 0 2 8: errors 0.5 0.5 0 1.
    // MAE = 2/4; MSE = 1.5/4; mean truth 2.875, SS_tot = 29.1875, R^2 = 1 - 1.5/29.1875.
    const std::vector<T> truth{T(3), T(-0.5), T(2), T(7)};
    const std::vector<T> predicted{T(2.5), T(0), T(2), T(8)};
    const auto s = tenon::score_values(truth, predicted);
    CHECK(s.mae == doctest::Approx(0.5));
    CHECK(s.rmse == doctest::Approx(std::sqrt(0.375)));
    CHECK(s.r2 == doctest::Approx(1.0 - 1.5 / 29.1875));
}

TEST_CASE("R^2 of a constant truth is 1 when exact and 0 otherwise") {
    CHECK(tenon::score_values(std::vector<double>{2, 2}, std::vector<double>{2, 2}).r2 == 1.0);
    CHECK(tenon::score_values(std::vector<double>{2, 2}, std::vector<double>{1, 3}).r2 == 0.0);
}

TEST_CASE("metric inputs that do not fit are clear errors") {
    CHECK_THROWS_WITH_AS(tenon::score_classes({0, 1}, {0}, 2), "[core.shape.mismatch] score_classes: 2 true values but 1 predictions", tenon::error);
    CHECK_THROWS_WITH_AS(tenon::score_classes({}, {}, 2), "[core.argument.invalid] score_classes: no rows to score", tenon::error);
    CHECK_THROWS_WITH_AS(tenon::score_classes({0, 3}, {0, 1}, 2), "[core.argument.invalid] confusion_matrix: class index 3 outside [0, 2)",
                         tenon::error);
    CHECK_THROWS_WITH_AS(tenon::log_loss(tenon::make_matrix<double>({{0.5, 0.5}}), {2}),
                         "[core.argument.invalid] log_loss: row 0 has class 2 but only 2 probability columns", tenon::error);
    CHECK_THROWS_WITH_AS(tenon::score_values(static_cast<const double*>(nullptr), static_cast<const double*>(nullptr), 0),
                         "[core.argument.invalid] score_values: no rows to score", tenon::error);
}

TEST_CASE("the confusion heat map's colour scale runs from parchment through ochre to umber, darkening throughout") {
    CHECK(tenon::detail::heat_colour(0.0) == "#f5f1e6");
    CHECK(tenon::detail::heat_colour(0.5) == "#d6963e");
    CHECK(tenon::detail::heat_colour(1.0) == "#5a231e");
    CHECK(tenon::detail::heat_colour(-1.0) == "#f5f1e6");  // clamped
    CHECK(tenon::detail::heat_colour(std::nan("")) == "#f5f1e6");
    // Relative luminance (ITU-R BT.709 weights) falls with the share.
    const auto luminance = [](const std::string& hex) {
        const auto channel = [&](std::size_t at) { return static_cast<double>(std::stoi(hex.substr(at, 2), nullptr, 16)); };
        return 0.2126 * channel(1) + 0.7152 * channel(3) + 0.0722 * channel(5);
    };
    double previous = 256.0;
    for (int k = 0; k <= 20; ++k) {
        const double y = luminance(tenon::detail::heat_colour(k / 20.0));
        CAPTURE(k);
        CHECK(y < previous);
        previous = y;
    }
}
