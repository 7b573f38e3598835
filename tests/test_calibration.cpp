// Tests of train/calibration.hpp: the finite-sample conformal quantile,
// split-conformal coverage, the normalized band on heteroscedastic data,
// temperature scaling, expected calibration error and conformal class sets.
//
// Source: Lei et al. 2018, Theorem 2.2 (coverage exactly r / (n + 1)); Vovk 2012 for one calibration set.
// Coverage counts are accepted within 3.29 binomial standard deviations (the
// two-sided 99.9% band); the tolerances' derivation: docs/design/tests.md.
#include <doctest/doctest.h>

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <limits>
#include <sstream>
#include <string>
#include <vector>

#include <tenon/prep/csv.hpp>
#include <tenon/train/calibration.hpp>

namespace {

// The two-sided 99.9% point of the standard normal (from memory: 3.2905).
constexpr double z_999 = 3.29;

// Standard deviation of Beta(a, b).
double beta_sd(double a, double b) { return std::sqrt(a * b / ((a + b) * (a + b) * (a + b + 1.0))); }

// Covered draws out of `draws`, each a fresh calibration set of n rows and
// one fresh test row; scores |noise| of a fixed prediction (so any model).
std::size_t covered_draws(std::size_t draws, std::size_t n, double coverage, std::uint64_t seed) {
    tenon::random_engine rng(seed);
    std::vector<double> predicted(n, 0.0), actual(n);
    std::size_t covered = 0;
    for (std::size_t d = 0; d < draws; ++d) {
        for (auto& y : actual) y = rng.normal(0.0, 1.0);
        const auto c = tenon::fit_interval_calibration(predicted.data(), actual.data(), nullptr, n, coverage);
        const double y = rng.normal(0.0, 1.0);
        covered += std::abs(y) <= c.half_width;
    }
    return covered;
}

// Synthetic classifier data: true class probabilities softmax(u) with u of
// spread 1.5 per class; the label is drawn from them. The returned logits
// are `overconfidence` x u, so the right temperature is `overconfidence`.
void overconfident_rows(std::size_t n, std::size_t classes, double overconfidence, std::uint64_t seed, tenon::matrix<double>& logits,
                        std::vector<std::size_t>& labels) {
    tenon::random_engine rng(seed);
    logits = tenon::matrix<double>({n, classes});
    labels.assign(n, 0);
    std::vector<double> u(classes), p(classes);
    for (std::size_t i = 0; i < n; ++i) {
        double sum = 0.0;
        for (std::size_t k = 0; k < classes; ++k) {
            u[k] = rng.normal(0.0, 1.5);
            sum += (p[k] = std::exp(u[k]));
        }
        double draw = rng.uniform(0.0, 1.0) * sum;
        std::size_t y = 0;
        while (y + 1 < classes && draw >= p[y]) draw -= p[y++];
        labels[i] = y;
        for (std::size_t k = 0; k < classes; ++k) logits.data()[i * classes + k] = overconfidence * u[k];
    }
}

}  // namespace

TEST_CASE("the conformal rank is ceil((n + 1)(1 - alpha)), infinite when it exceeds n") {
    // Lei et al. 2018, section 2.2: the ceil((n + 1)(1 - alpha))-th smallest score.
    CHECK(tenon::conformal_rank(10, 0.9) == 10);  // ceil(9.9)
    CHECK(tenon::conformal_rank(9, 0.9) == 9);  // (9 + 1) * 0.9 = 9 exactly, although 0.9 is not exact in binary
    CHECK(tenon::conformal_rank(8, 0.9) == 9);  // ceil(8.1) = 9 > 8 rows
    CHECK(tenon::conformal_rank(19, 0.95) == 19);  // 20 * 0.95 = 19
    CHECK(tenon::conformal_rank(100, 0.9) == 91);  // ceil(90.9)
    CHECK(tenon::conformal_rank(1, 0.5) == 1);
    CHECK(tenon::conformal_rank(0, 0.5) == 1);
    CHECK_THROWS_WITH_AS(tenon::conformal_rank(10, 1.0), doctest::Contains("[core.argument.invalid]"), tenon::error);
    CHECK_THROWS_WITH_AS(tenon::conformal_rank(10, 0.0), doctest::Contains("[core.argument.invalid]"), tenon::error);
}

TEST_CASE("the conformal quantile counts ties once each and is infinite for too few rows") {
    const std::vector<double> tied{3.0, 1.0, 2.0, 2.0, 2.0, 5.0, 4.0, 0.5, 6.0, 7.0};  // sorted: 0.5 1 2 2 2 3 4 5 6 7
    CHECK(tenon::conformal_quantile(tied, 0.9) == 7.0);  // rank ceil(11 * 0.9) = 10: the largest
    CHECK(tenon::conformal_quantile(tied, 0.5) == 3.0);  // rank ceil(5.5) = 6
    CHECK(tenon::conformal_quantile(tied, 0.4) == 2.0);  // rank ceil(4.4) = 5, inside the tie
    CHECK(tenon::conformal_quantile(tied, 0.25) == 2.0);  // rank ceil(2.75) = 3, the tie's first
    // A plain empirical quantile would give the 9th smallest (ceil(10 * 0.9)), 6.
    CHECK(tenon::conformal_quantile(tied, 0.9) != 6.0);
    CHECK(std::isinf(tenon::conformal_quantile({1.0, 2.0, 3.0}, 0.9)));  // rank ceil(3.6) = 4 > 3
    CHECK(tenon::conformal_quantile({1.5}, 0.5) == 1.5);  // rank ceil(1) = 1
    CHECK(std::isinf(tenon::conformal_quantile({}, 0.5)));
    const std::vector<double> all_tied(9, 2.5);
    CHECK(tenon::conformal_quantile(all_tied, 0.9) == 2.5);
}

TEST_CASE("split-conformal bands cover exactly r / (n + 1) of new rows over many draws") {
    // Binomial tolerance, see docs/design/tests.md. With the plain empirical
    // quantile (rank ceil(n(1 - alpha))) n = 10 would give 9/11 = 0.818 and
    // n = 50 gives 45/51 = 0.882, both far outside these bands.
    struct setting {
        std::size_t n;
        double coverage;
        std::size_t rank;
    };
    for (const setting s : {setting{10, 0.9, 10}, setting{50, 0.9, 46}, setting{20, 0.8, 17}}) {
        CAPTURE(s.n);
        const std::size_t draws = 20000;
        const double p = static_cast<double>(s.rank) / static_cast<double>(s.n + 1);
        const double sd = std::sqrt(draws * p * (1.0 - p));
        const auto covered = static_cast<double>(covered_draws(draws, s.n, s.coverage, 11 + s.n));
        CHECK(covered >= draws * p - z_999 * sd);
        CHECK(covered <= draws * p + z_999 * sd);
        CHECK(covered >= draws * s.coverage - z_999 * sd);  // the guarantee: at least nominal
    }
}

TEST_CASE("the normalized band widens with the spread and holds coverage where the noise is large") {
    // Heteroscedastic synthetic data: y = 2x + noise of standard deviation
    // 0.05 + 0.5x, x uniform on [0, 1]; the prediction is 2x and the spread
    // given per row is the noise's standard deviation (what an ensemble's
    // spread estimates). Lei et al. 2018, section 5.2: locally weighted bands.
    tenon::random_engine rng(7);
    const auto draw = [&](std::size_t n, std::vector<double>& x, std::vector<double>& predicted, std::vector<double>& actual,
                          std::vector<double>& spread) {
        x.resize(n);
        predicted.resize(n);
        actual.resize(n);
        spread.resize(n);
        for (std::size_t i = 0; i < n; ++i) {
            x[i] = rng.uniform(0.0, 1.0);
            spread[i] = 0.05 + 0.5 * x[i];
            predicted[i] = 2.0 * x[i];
            actual[i] = predicted[i] + rng.normal(0.0, spread[i]);
        }
    };
    std::vector<double> x, predicted, actual, spread;
    const std::size_t n = 1000, m = 20000;
    draw(n, x, predicted, actual, spread);
    const auto c = tenon::fit_interval_calibration(predicted.data(), actual.data(), spread.data(), n, 0.9);
    REQUIRE(c.has_spread);
    draw(m, x, predicted, actual, spread);
    std::vector<double> low(m), high(m), plain_low(m), plain_high(m);
    tenon::interval_bounds<double>(c, predicted.data(), spread.data(), m, low.data(), high.data());
    tenon::interval_bounds<double>(c, predicted.data(), nullptr, m, plain_low.data(), plain_high.data());
    // Coverage and width where the noise is small (x < 0.2) and large (x > 0.8).
    double in_small = 0, in_large = 0, plain_in_large = 0, n_small = 0, n_large = 0, w_small = 0, w_large = 0;
    for (std::size_t i = 0; i < m; ++i) {
        const bool inside = actual[i] >= low[i] && actual[i] <= high[i];
        if (x[i] < 0.2) {
            n_small += 1;
            in_small += inside;
            w_small += high[i] - low[i];
        } else if (x[i] > 0.8) {
            n_large += 1;
            in_large += inside;
            w_large += high[i] - low[i];
            plain_in_large += actual[i] >= plain_low[i] && actual[i] <= plain_high[i];
        }
    }
    const auto whole = tenon::score_intervals(actual.data(), low.data(), high.data(), m);
    // Beta(901, 100) for the calibration (r = ceil(1001 * 0.9) = 901), binomial for the rows scored.
    const double tolerance = z_999 * std::sqrt(std::pow(beta_sd(901, 100), 2) + 0.09 / m);
    CHECK(std::abs(whole.coverage - 901.0 / 1001.0) <= tolerance);
    // Scores divided by the true spread are exchangeable within any x, so the
    // band holds in each region (binomial tolerance of the region's rows added).
    CHECK(in_small / n_small >= 0.9 - tolerance - z_999 * std::sqrt(0.09 / n_small));
    CHECK(in_large / n_large >= 0.9 - tolerance - z_999 * std::sqrt(0.09 / n_large));
    // Widths follow the spread: mean spread over x > 0.8 is 0.5, over x < 0.2 it is 0.1.
    CHECK(w_large / n_large > 4.0 * (w_small / n_small));
    // The fixed band (no spread) under-covers where the noise is large.
    CHECK(plain_in_large / n_large < 0.85);
}

TEST_CASE("band bounds are the prediction plus and minus the half width or the scaled spread") {
    tenon::interval_calibration c;
    c.half_width = 1.5;
    c.has_spread = true;
    c.spread_quantile = 2.0;
    c.spread_floor = 0.25;
    const float predicted[2] = {10.0f, -1.0f}, spread[2] = {0.5f, 1.0f};
    float low[2], high[2];
    tenon::interval_bounds<float>(c, predicted, nullptr, 2, low, high);
    CHECK(low[0] == 8.5f);
    CHECK(high[1] == 0.5f);
    tenon::interval_bounds<float>(c, predicted, spread, 2, low, high);
    CHECK(low[0] == 10.0f - 2.0f * 0.75f);
    CHECK(high[1] == -1.0f + 2.0f * 1.25f);
}

TEST_CASE("temperature scaling gives the exact optimum of a worked example") {
    // Two classes, logits (0, 2) on every row, three of four rows of class 1.
    // The log loss is minimal where sigmoid(2 / T) = 3/4, i.e. T = 2 / ln 3
    // (the maximum-likelihood fit of a Bernoulli probability is the frequency).
    tenon::matrix<double> logits({4, 2});
    for (std::size_t i = 0; i < 4; ++i) {
        logits.data()[i * 2] = 0.0;
        logits.data()[i * 2 + 1] = 2.0;
    }
    const std::vector<std::size_t> labels{1, 1, 1, 0};
    const double t = tenon::fit_temperature(logits, labels);
    CHECK(t == doctest::Approx(2.0 / std::log(3.0)).epsilon(1e-12));
    const auto p = tenon::tempered_softmax_rows(logits, t);
    CHECK(p.data()[1] == doctest::Approx(0.75).epsilon(1e-12));
    // Logits that are all equal carry no information about the temperature.
    tenon::matrix<double> flat({3, 3});
    std::fill(flat.data(), flat.data() + 9, 0.5);
    CHECK(tenon::fit_temperature(flat, {0, 1, 2}) == 1.0);
    CHECK_THROWS_WITH_AS(tenon::fit_temperature(flat, {0, 1, 3}), doctest::Contains("[core.argument.invalid]"), tenon::error);
}

TEST_CASE("expected calibration error of a worked example over 15 bins") {
    // Guo et al. 2017, equation 3: sum over bins of |B|/n |acc(B) - conf(B)|.
    // Confidences 0.9 and 0.92 share bin 14 of 15 (one right, one wrong):
    // |1 - 1.82|; 0.81 (wrong): 0.81; 0.7 (right): 0.3; 0.55 (wrong): 0.55.
    tenon::matrix<double> p({5, 2});
    const double rows[5][2] = {{0.9, 0.1}, {0.08, 0.92}, {0.81, 0.19}, {0.3, 0.7}, {0.45, 0.55}};
    for (std::size_t i = 0; i < 5; ++i)
        for (std::size_t k = 0; k < 2; ++k) p.data()[i * 2 + k] = rows[i][k];
    const std::vector<std::size_t> labels{0, 0, 1, 1, 0};
    CHECK(tenon::expected_calibration_error(p, labels) == doctest::Approx((0.82 + 0.81 + 0.3 + 0.55) / 5.0).epsilon(1e-12));
    const auto bins = tenon::reliability_bins(p, labels);
    CHECK(bins[13].rows == 2);
    CHECK(bins[13].accuracy == 0.5);
    CHECK(bins[13].confidence == doctest::Approx(0.91).epsilon(1e-12));
    CHECK(bins[12].rows == 1);  // 0.81: ceil(12.15) - 1
    // One bin: |accuracy - mean confidence| = |2/5 - 3.88/5|.
    CHECK(tenon::expected_calibration_error(p, labels, 1) == doctest::Approx(std::abs(2.0 - 3.88) / 5.0).epsilon(1e-12));
}

TEST_CASE("temperature scaling lowers log loss and ECE of an overconfident classifier") {
    // Logits three times the true log-odds (by construction of the data, the
    // right temperature is 3).
    tenon::matrix<double> fit_logits, test_logits;
    std::vector<std::size_t> fit_labels, test_labels;
    overconfident_rows(4000, 4, 3.0, 21, fit_logits, fit_labels);
    overconfident_rows(20000, 4, 3.0, 22, test_logits, test_labels);
    const double t = tenon::fit_temperature(fit_logits, fit_labels);
    CHECK(t == doctest::Approx(3.0).epsilon(0.1));
    const auto raw = tenon::softmax_rows(test_logits), tempered = tenon::tempered_softmax_rows(test_logits, t);
    CHECK(tenon::log_loss(tempered, test_labels) < tenon::log_loss(raw, test_labels));
    const double ece_raw = tenon::expected_calibration_error(raw, test_labels), ece = tenon::expected_calibration_error(tempered, test_labels);
    CHECK(ece < 0.5 * ece_raw);
    CHECK(ece < 0.03);
    // On the rows it was fitted on, no other temperature has a lower loss.
    const double at = tenon::log_loss(tenon::tempered_softmax_rows(fit_logits, t), fit_labels);
    CHECK(at <= tenon::log_loss(tenon::tempered_softmax_rows(fit_logits, t * 1.01), fit_labels));
    CHECK(at <= tenon::log_loss(tenon::tempered_softmax_rows(fit_logits, t / 1.01), fit_labels));
}

TEST_CASE("conformal class sets reach their coverage") {
    tenon::matrix<double> fit_logits, test_logits;
    std::vector<std::size_t> fit_labels, test_labels;
    overconfident_rows(1000, 5, 3.0, 31, fit_logits, fit_labels);
    overconfident_rows(20000, 5, 3.0, 32, test_logits, test_labels);
    const auto c = tenon::fit_class_calibration(fit_logits, fit_labels, 0.9);
    CHECK(c.rows == 1000);
    const auto s = tenon::score_class_sets(c, tenon::tempered_softmax_rows(test_logits, c.temperature), test_labels);
    // r = ceil(1001 * 0.9) = 901: Beta(901, 100) plus the test rows' binomial spread
    // (the most probable class always joins, which can only raise coverage).
    const double tolerance = z_999 * std::sqrt(std::pow(beta_sd(901, 100), 2) + 0.09 / 20000);
    CHECK(s.coverage >= 0.9 - tolerance);
    CHECK(s.coverage <= 901.0 / 1001.0 + tolerance + 0.02);
    CHECK(s.mean_size > 1.0);
    CHECK(s.mean_size < 5.0);
    // Bits: a threshold of 0.5 keeps classes with p >= 0.5, and the best one.
    tenon::class_calibration half;
    half.set_threshold = 0.5;
    const double p[2][3] = {{0.2, 0.5, 0.3}, {0.4, 0.35, 0.25}};
    std::uint64_t bits[2];
    tenon::class_set_bits(half, &p[0][0], 2, 3, bits);
    CHECK(bits[0] == 0b010u);
    CHECK(bits[1] == 0b001u);  // none reaches 0.5: the most probable alone
    half.set_threshold = std::numeric_limits<double>::infinity();
    tenon::class_set_bits(half, &p[0][0], 2, 3, bits);
    CHECK(bits[0] == 0b111u);
    CHECK(tenon::class_set_words(64) == 1);
    CHECK(tenon::class_set_words(65) == 2);
}

namespace {

// An invented press: forming force [kN] from sheet thickness [mm] and die
// temperature [C], noise growing with thickness.
tenon::table press_table(std::size_t n, std::uint64_t seed) {
    tenon::random_engine rng(seed);
    std::ostringstream csv;
    csv << "thickness,temperature,force\n";
    for (std::size_t i = 0; i < n; ++i) {
        const double thickness = rng.uniform(0.5, 3.0), temperature = rng.uniform(20.0, 200.0);
        const double force = 40.0 * thickness - 0.05 * temperature + rng.normal(0.0, 1.0 + thickness);
        csv << thickness << "," << temperature << "," << force << "\n";
    }
    std::istringstream in(csv.str());
    return tenon::read_csv(in, {}, "press.csv");
}

}  // namespace

TEST_CASE("a fitted network calibrated on its validation rows covers its test rows") {
    const auto t = press_table(3000, 41);
    tenon::plan p;
    p.set_target("force", tenon::target_kind::regression);
    const auto split = tenon::random_holdout(t.row_count(), {0.5, 0.2, 0.3}, 5);
    tenon::model_settings s;
    s.hidden = {16};
    s.epochs = 30;
    s.seed = 3;
    s.ensemble = 1;  // one network: the plain band (an ensemble's is normalized)
    auto model = tenon::fit_model<float>(t, p, split.train, split.validation, s);
    const auto c = tenon::calibrate_model(model, t, split.validation, 0.9);
    REQUIRE(c.interval);
    CHECK(c.interval->rows == split.validation.size());
    CHECK(std::isfinite(c.interval->half_width));
    const auto scores = tenon::score_calibration(model, c, t, split.test);
    const auto n = static_cast<double>(split.validation.size());
    const double r = std::ceil((n + 1) * 0.9);
    const double tolerance = z_999 * std::sqrt(std::pow(beta_sd(r, n + 1 - r), 2) + 0.09 / static_cast<double>(scores.rows));
    CHECK(std::abs(scores.interval_coverage - r / (n + 1)) <= tolerance);
    CHECK(scores.interval_mean_width == doctest::Approx(2.0 * c.interval->half_width).epsilon(1e-6));
    CHECK_THROWS_WITH_AS(tenon::calibrate_model(model, t, {}, 0.9), doctest::Contains("[train.rows.empty]"), tenon::error);
}

TEST_CASE("temperature scaling lowers the test ECE and log loss of a network trained to overconfidence") {
    // An invented sorting line: a part is rejected when its two gauge
    // readings fall outside a ring, and one label in five is wrong (a noisy
    // inspector). A wide network trained 300 epochs without early stopping
    // on 400 rows fits the noise and becomes overconfident (Guo et al. 2017,
    // section 3, report this of networks trained long on the log loss).
    tenon::random_engine rng(51);
    std::ostringstream csv;
    csv << "gauge_a,gauge_b,verdict\n";
    for (int i = 0; i < 2800; ++i) {
        const double a = rng.uniform(-2.0, 2.0), b = rng.uniform(-2.0, 2.0);
        const double r = std::sqrt(a * a + b * b);
        bool reject = r < 0.8 || r > 1.6;
        if (rng.uniform(0.0, 1.0) < 0.2) reject = !reject;
        csv << a << "," << b << "," << (reject ? "reject" : "pass") << "\n";
    }
    std::istringstream in(csv.str());
    const tenon::table t = tenon::read_csv(in, {}, "gauges.csv");
    tenon::plan p;
    p.set_target("verdict", tenon::target_kind::classification);
    std::vector<std::size_t> train, calibration, test;
    for (std::size_t i = 0; i < 2800; ++i) (i < 400 ? train : i < 800 ? calibration : test).push_back(i);
    tenon::model_settings s;
    s.hidden = {64, 64};
    s.epochs = 300;
    s.patience = 0;
    s.learning_rate = 0.003;
    s.seed = 5;
    s.ensemble = 1;  // one network, trained to overconfidence (an ensemble's mean is less so)
    auto model = tenon::fit_model<float>(t, p, train, {}, s);
    const auto c = tenon::calibrate_model(model, t, calibration, 0.9);
    REQUIRE(c.classes);
    const auto scores = tenon::score_calibration(model, c, t, test);
    MESSAGE("temperature " << c.classes->temperature << "; test ECE " << scores.ece_uncalibrated << " -> " << scores.ece << ", log loss "
                           << scores.log_loss_uncalibrated << " -> " << scores.log_loss);
    CHECK(c.classes->temperature > 1.0);  // overconfident: the logits are shrunk
    CHECK(scores.ece < scores.ece_uncalibrated);
    CHECK(scores.log_loss < scores.log_loss_uncalibrated);
    // Sets at 0.9 on 2000 test rows; Beta(r, n + 1 - r) with n = 400, r = 361, plus the binomial spread.
    CHECK(scores.set_coverage >= 0.9 - z_999 * std::sqrt(std::pow(beta_sd(361, 40), 2) + 0.09 / 2000.0));
}
