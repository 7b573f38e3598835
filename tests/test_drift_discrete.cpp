// Drift on plant columns that hold few distinct values (counts, modes,
// whole-number settings, years) next to continuous ones: the
// Kolmogorov-Smirnov statistic with ties, the summaries it is computed
// from, bin labels, PSI's noise floor and the false-alarm rate.
//
// The data are invented (a press log made here: strokes per cycle, a
// build year, a die setting, a temperature and a weight rounded to the
// scale's 0.5 kg); no open table with such columns was found among the
// installed Debian packages in the time available.
#include <doctest/doctest.h>

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <string>
#include <vector>

#include <tenon/core/random.hpp>
#include <tenon/deploy/drift.hpp>
#include <tenon/deploy/reference.hpp>
#include <tenon/prep/plan.hpp>

namespace {

// Plain two-sample Kolmogorov-Smirnov D from the definition: at every value
// x of either sample, F_a(x) = #{a_i <= x} / n_a and likewise F_b; D is the
// largest |F_a(x) - F_b(x)| (Smirnov 1939). O(n^2), written without sorting.
double plain_ks(const std::vector<double>& a, const std::vector<double>& b) {
    double d = 0.0;
    for (const auto* sample : {&a, &b})
        for (double x : *sample) {
            double below_a = 0, below_b = 0;
            for (double v : a) below_a += v <= x ? 1 : 0;
            for (double v : b) below_b += v <= x ? 1 : 0;
            d = std::max(d, std::abs(below_a / static_cast<double>(a.size()) - below_b / static_cast<double>(b.size())));
        }
    return d;
}

// Knuth's product-of-uniforms Poisson draw (Knuth, TAOCP vol. 2, 3.4.1).
int poisson(tenon::random_engine& rng, double mean) {
    const double limit = std::exp(-mean);
    double product = rng.uniform01<double>();
    int k = 0;
    while (product > limit) {
        product *= rng.uniform01<double>();
        ++k;
    }
    return k;
}

const char* const press_columns[] = {"strokes", "build_year", "die_setting", "temperature", "weight"};

// An invented press log of n rows: strokes per cycle (Poisson, mean 3),
// build year (1971-1985), die setting (10, 20 or 40), temperature
// (normal, continuous) and weight rounded to 0.5 kg (tied, > 256 values).
tenon::table press_log(std::size_t n, std::uint64_t seed) {
    tenon::random_engine rng(seed, 0x9E55u);
    tenon::table t("press.csv");
    for (const char* name : press_columns) t.add_column(name, tenon::column_kind::numeric);
    const double settings[] = {10, 20, 40};
    for (std::size_t i = 0; i < n; ++i) {
        t[0].push_number(poisson(rng, 3.0));
        t[1].push_number(1971.0 + static_cast<double>(rng.below(15)));
        t[2].push_number(settings[rng.below(3)]);
        t[3].push_number(rng.normal(180.0, 12.0));
        t[4].push_number(std::round(rng.normal(400.0, 60.0) * 2.0) / 2.0);
    }
    return t;
}

std::vector<std::size_t> all_rows(const tenon::table& t) {
    std::vector<std::size_t> rows(t.row_count());
    for (std::size_t i = 0; i < rows.size(); ++i) rows[i] = i;
    return rows;
}

std::vector<tenon::feature_reference> references_of(const tenon::table& t) {
    const auto rows = all_rows(t);
    return tenon::measure_references(t, rows, tenon::plan().measure(t, rows), 10);
}

std::vector<double> values_of(const tenon::table& t, std::size_t column) {
    std::vector<double> v;
    for (std::size_t r = 0; r < t.row_count(); ++r) v.push_back(t[column].number(r));
    return v;
}

}  // namespace

TEST_CASE("the summaries keep exact values up to 256 distinct, quantile points beyond") {
    const auto refs = references_of(press_log(2000, 1));
    REQUIRE(refs.size() == 5);
    CHECK(refs[0].distinct.size() <= 20);  // strokes
    CHECK(refs[1].distinct.size() == 15);  // build year
    CHECK(refs[2].distinct.size() == 3);  // die setting
    CHECK(refs[3].distinct.empty());  // temperature: 2000 distinct values
    CHECK(refs[3].quantile_points.size() == tenon::reference_quantile_steps + 1);
    CHECK(refs[4].distinct.empty());  // weight: more than 256 half-kilogram steps
    for (std::size_t k = 0; k < 3; ++k) {
        std::uint64_t total = 0;
        for (const auto& kv : refs[k].distinct) total += kv.second;
        CHECK(total == refs[k].present);
        CHECK(refs[k].whole_numbers);
    }
    CHECK_FALSE(refs[3].whole_numbers);
    CHECK(refs[3].quantile_points.front() == refs[3].minimum);
    CHECK(refs[3].quantile_points.back() == refs[3].maximum);
}

TEST_CASE("the KS statistic on tied data equals a plain two-sample comparison of empirical CDFs") {
    tenon::random_engine rng(7, 1);
    for (int trial = 0; trial < 40; ++trial) {
        // Small integer samples: every value tied many times, within and across samples.
        std::vector<double> a(static_cast<std::size_t>(30 + rng.below(50))), b(static_cast<std::size_t>(20 + rng.below(40)));
        const std::uint64_t spread = 2 + rng.below(6), shift = rng.below(2);
        for (auto& v : a) v = static_cast<double>(rng.below(spread));
        for (auto& v : b) v = static_cast<double>(rng.below(spread) + shift);
        const double expected = plain_ks(a, b);
        CHECK(tenon::ks_two_sample(a, b) == doctest::Approx(expected).epsilon(1e-12));

        // The same D from the model file's summary of `a` (exact distinct values).
        tenon::table ta("a.csv"), tb("b.csv");
        ta.add_column("x", tenon::column_kind::numeric);
        tb.add_column("x", tenon::column_kind::numeric);
        for (double v : a) ta[0].push_number(v);
        for (double v : b) tb[0].push_number(v);
        const auto refs = references_of(ta);
        const auto drift = tenon::measure_drift(refs, tb).feature("x");
        CHECK(drift.ks == doctest::Approx(expected).epsilon(1e-12));
        CHECK(drift.ks_error_bound == 0.0);
    }
}

TEST_CASE("with quantile points the summary's D is within 1/1024 of the exact D") {
    for (std::uint64_t seed = 1; seed <= 6; ++seed) {
        const auto reference = press_log(3000, seed), window = press_log(150, seed + 100);
        const auto refs = references_of(reference);
        const auto report = tenon::measure_drift(refs, window);
        for (std::size_t k : {std::size_t(3), std::size_t(4)}) {  // temperature, weight (tied, > 256 values)
            const auto& f = report.features[k];
            REQUIRE(refs[k].distinct.empty());
            const double exact = tenon::ks_two_sample(values_of(reference, k), values_of(window, k));
            CHECK(f.ks_error_bound == doctest::Approx(1.0 / 1024.0));
            CHECK(std::abs(f.ks - exact) < 1.0 / 1024.0);
        }
    }
}

TEST_CASE("drift of a table against its own training rows flags nothing") {
    const auto log = press_log(2000, 3);
    const auto refs = references_of(log);
    const auto report = tenon::measure_drift(refs, log);
    MESSAGE("a press log against itself:\n" << tenon::drift_table(report));
    CHECK_FALSE(report.any_drift());
    for (const auto& f : report.features) {
        CHECK(f.status == tenon::drift_status::stable);
        CHECK(f.psi == 0.0);
        CHECK(f.ks <= f.ks_error_bound);  // 0 when exact, below 1/1024 from quantile points
        CHECK_FALSE(f.ks_flag);
    }
    // Before the distributions were kept, the ogive spread each year's rows
    // over its bin; the same window then showed a D of about a bin's share.
    auto old = refs;
    for (auto& f : old) {
        f.distinct.clear();
        f.quantile_points.clear();
    }
    const auto old_report = tenon::measure_drift(old, log);
    MESSAGE("the same with summaries from before section REFD:\n" << tenon::drift_table(old_report));
    CHECK(old_report.feature("build_year").ks > 0.03);
    CHECK(report.feature("build_year").ks == 0.0);
}

TEST_CASE("bins of whole-number columns are labelled by the whole numbers they hold") {
    const auto log = press_log(2000, 4);
    const auto refs = references_of(log);
    const auto report = tenon::measure_drift(refs, press_log(300, 5));
    // Die setting: three values, one bin each, and one for values between them.
    const auto& die = report.feature("die_setting");
    REQUIRE(die.bins.size() == 7);
    CHECK(die.bins[0].label == "10");
    CHECK(die.bins[1].label == "20");
    CHECK(die.bins[2].label == "40");
    CHECK(die.bins[3].label == "(between values)");
    CHECK(die.bins[3].window_count == 0);
    // Build year: 15 values in 10 equal-width bins of 1.4 years: each label
    // names the years inside, e.g. 1971 to 1972 ([1971, 1972.4)), never
    // "[1971, 1972.4)" nor an empty range.
    const auto& year = report.feature("build_year");
    std::uint64_t reference_total = 0;
    for (const auto& b : year.bins) {
        CHECK(b.label.find('[') == std::string::npos);
        CHECK(b.label.find('.') == std::string::npos);
        reference_total += b.reference_count;
    }
    CHECK(reference_total == 2000);
    CHECK(year.bins[0].label == "1971 to 1972");
    CHECK(year.bins[1].label == "1973");  // [1972.4, 1973.8)
    CHECK(tenon::detail::whole_number_label(1972.4, 1972.9, false).empty());
    CHECK(tenon::detail::whole_number_label(1983.6, 1985, true) == "1984 to 1985");
}

TEST_CASE("PSI's noise floor follows (1/n + 1/m) times the chi-square quantile") {
    // Abramowitz & Stegun 26.2.23 against the tabulated normal quantiles
    // z(0.025) = 1.959964 and z(0.01) = 2.326348 (from memory): error < 4.5e-4.
    CHECK(std::abs(tenon::normal_upper_quantile(0.025) - 1.959964) < 4.5e-4);
    CHECK(std::abs(tenon::normal_upper_quantile(0.01) - 2.326348) < 4.5e-4);
    // Wilson-Hilferty against tabulated chi-square quantiles (from memory):
    // chi2_10(0.99) = 23.209, chi2_2(0.95) = 5.991, chi2_30(0.95) = 43.773.
    CHECK(tenon::chi_square_upper_quantile(10, 0.01) == doctest::Approx(23.209).epsilon(0.005));
    CHECK(tenon::chi_square_upper_quantile(2, 0.05) == doctest::Approx(5.991).epsilon(0.01));
    CHECK(tenon::chi_square_upper_quantile(30, 0.05) == doctest::Approx(43.773).epsilon(0.002));
    // 200-row windows against 2000 training rows in 11 bins: 0.0055 x 23.209 = 0.128.
    CHECK(tenon::psi_noise_floor(11, 2000, 200, 0.01) == doctest::Approx(0.0055 * 23.209).epsilon(0.005));
    CHECK(tenon::psi_noise_floor(11, 2000, 200, 0.0) == 0.0);
    CHECK(tenon::psi_noise_floor(1, 2000, 200, 0.01) == 0.0);
    // The simulated floor agrees with the chi-square approximation on
    // well-filled bins: 5 equal bins, n = m = 2000, 5% level:
    // (1/2000 + 1/2000) chi2_4(0.95) = 0.001 x 9.488 (tabulated, from memory).
    tenon::drift_options five_percent;
    five_percent.psi_noise_significance = 0.05;
    five_percent.psi_noise_draws = 2000;
    const double simulated = tenon::detail::simulated_psi_noise({0.2, 0.2, 0.2, 0.2, 0.2}, 0.0, 2000, 2000, five_percent, 11);
    MESSAGE("simulated floor " << simulated << ", chi-square " << tenon::psi_noise_floor(5, 2000, 2000, 0.05));
    CHECK(simulated == doctest::Approx(0.001 * 9.488).epsilon(0.1));
    tenon::drift_options bad;
    bad.psi_noise_significance = 0.6;
    const auto log = press_log(50, 1);
    CHECK_THROWS_WITH_AS(tenon::measure_drift(references_of(log), log, bad), doctest::Contains("psi_noise_significance"), tenon::error);
}

TEST_CASE("windows from the training distribution raise false alarms at most at the stated rates") {
    // Over N seeds, reference (n = 400) and window (m = 100) drawn from one
    // distribution. A test at level alpha flags at most alpha of the windows;
    // the observed rate may exceed alpha by sampling noise alone, so the check
    // allows three binomial standard errors: rate <= alpha + 3 sqrt(alpha
    // (1 - alpha) / N) (normal approximation to the binomial; a correct test
    // fails this check with probability about 0.0013).
    const int seeds = 400;
    const double alpha = 0.05;
    const double tolerance = 3.0 * std::sqrt(alpha * (1.0 - alpha) / seeds);
    tenon::drift_options options;
    options.ks_significance = alpha;
    options.psi_noise_significance = alpha;
    options.psi_noise_draws = 200;
    std::vector<int> ks_alarms(5, 0), psi_alarms(5, 0), rule_of_thumb_watch(5, 0);
    for (int seed = 0; seed < seeds; ++seed) {
        const auto reference = press_log(400, 1000 + static_cast<std::uint64_t>(seed));
        const auto window = press_log(100, 5000 + static_cast<std::uint64_t>(seed));
        const auto report = tenon::measure_drift(references_of(reference), window, options);
        for (std::size_t k = 0; k < 5; ++k) {
            const auto& f = report.features[k];
            ks_alarms[k] += f.ks_flag ? 1 : 0;
            psi_alarms[k] += f.psi > f.psi_noise ? 1 : 0;
            rule_of_thumb_watch[k] += f.psi > 0.1 ? 1 : 0;
        }
    }
    for (std::size_t k = 0; k < 5; ++k) {
        const double ks_rate = ks_alarms[k] / static_cast<double>(seeds), psi_rate = psi_alarms[k] / static_cast<double>(seeds);
        MESSAGE(std::string(press_columns[k]) << ": KS false alarms " << ks_rate << ", PSI above its noise floor " << psi_rate << ", PSI above 0.1 "
                                              << rule_of_thumb_watch[k] / static_cast<double>(seeds) << " (limit " << alpha + tolerance << ")");
        CHECK(ks_rate <= alpha + tolerance);
        CHECK(psi_rate <= alpha + tolerance);
    }
}
