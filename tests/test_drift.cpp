// Tests of drift monitoring: PSI and Kolmogorov-Smirnov against worked
// values, the summary-based reference CDF and its bound, the flags on a
// drifted and an undrifted generated pump log, and every error path.
#include <doctest/doctest.h>

#include <cmath>
#include <sstream>
#include <string>
#include <vector>

#include <tenon/deploy/drift.hpp>
#include <tenon/deploy/model_file.hpp>
#include <tenon/prep/csv.hpp>

#include "retraining_test_support.hpp"

namespace {

tenon::table csv_table(const std::string& text) {
    std::istringstream in(text);
    return tenon::read_csv(in, {}, "window.csv");
}

std::string code_of(const std::function<void()>& f) {
    try {
        f();
    } catch (const tenon::error& e) {
        return e.code();
    }
    return "no error";
}

// The reference of a column holding 0, 1, ..., 9 with 5 histogram bins of
// width 1.8: [0, 1.8) holds 0 and 1, [1.8, 3.6) 2 and 3, ..., [7.2, 9] 8 and 9.
tenon::feature_reference zero_to_nine() {
    tenon::feature_reference f;
    f.column = "x";
    f.kind = tenon::column_kind::numeric;
    f.present = 10;
    f.minimum = 0.0;
    f.maximum = 9.0;
    f.histogram = {2, 2, 2, 2, 2};
    return f;
}

// Reference summaries of the pump log's plan inputs (flow, head, fluid).
std::vector<tenon::feature_reference> pump_references(const tenon::table& t) {
    const auto rows = retrain_test::all_rows(t);
    const auto plan = deploy_test::condition_plan().measure(t, rows);
    return tenon::measure_references(t, rows, plan, 10);
}

}  // namespace

TEST_CASE("PSI of two binned distributions matches worked values") {
    // Hand-computed from PSI = sum (a - e) ln(a / e):
    // (0.4 - 0.5) ln(0.4 / 0.5) + (0.4 - 0.3) ln(0.4 / 0.3) + 0 = 0.0223144 + 0.0287682 = 0.0510826.
    CHECK(tenon::population_stability_index({0.5, 0.3, 0.2}, {0.4, 0.4, 0.2}) == doctest::Approx(0.0510826).epsilon(1e-6));
    // An empty reference bin takes the floor 1e-4:
    // (0.4 - 0.5) ln(0.8) + (0.1 - 1e-4) ln(0.1 / 1e-4) = 0.0223144 + 0.6900847 = 0.7123991.
    CHECK(tenon::population_stability_index({0.5, 0.5, 0.0}, {0.4, 0.5, 0.1}) == doctest::Approx(0.7123991).epsilon(1e-6));
    // Equal distributions: 0; PSI is symmetric (Jeffreys divergence).
    CHECK(tenon::population_stability_index({0.25, 0.75}, {0.25, 0.75}) == 0.0);
    CHECK(tenon::population_stability_index({0.2, 0.8}, {0.6, 0.4}) == doctest::Approx(tenon::population_stability_index({0.6, 0.4}, {0.2, 0.8})));
    CHECK(code_of([] { tenon::population_stability_index({0.5, 0.5}, {1.0}); }) == "core.shape.mismatch");
}

TEST_CASE("the two-sample Kolmogorov-Smirnov statistic matches worked values") {
    // {1,2,3,4} vs {3,4,5,6,7}: at x = 4 the CDFs are 4/4 and 2/5, D = 0.6 (hand-computed).
    CHECK(tenon::ks_two_sample({1, 2, 3, 4}, {3, 4, 5, 6, 7}) == doctest::Approx(0.6));
    // Ties across samples are stepped together: {1,1,2} vs {1,2,2}: at 1, 2/3 vs 1/3, D = 1/3.
    CHECK(tenon::ks_two_sample({1, 1, 2}, {2, 1, 2}) == doctest::Approx(1.0 / 3.0));
    CHECK(tenon::ks_two_sample({5, 6}, {6, 5}) == 0.0);
    CHECK(tenon::ks_two_sample({1, 2}, {3, 4}) == 1.0);  // disjoint samples
    CHECK(code_of([] { tenon::ks_two_sample({}, {1.0}); }) == "core.argument.invalid");
    CHECK(code_of([] { tenon::ks_two_sample({std::nan("")}, {1.0}); }) == "core.argument.invalid");
}

TEST_CASE("the Kolmogorov-Smirnov critical value follows c(alpha) sqrt((n + m) / (n m))") {
    // c(0.05) = sqrt(-ln(0.025) / 2) = 1.3581 (the tabulated 1.36, from memory); n = m = 100.
    CHECK(tenon::ks_critical_value(0.05, 100, 100) == doctest::Approx(1.3581015 * std::sqrt(200.0 / 10000.0)));
    CHECK(tenon::ks_critical_value(0.01, 400, 100) == doctest::Approx(1.6276236 * std::sqrt(500.0 / 40000.0)));
    CHECK(code_of([] { tenon::ks_critical_value(0.0, 10, 10); }) == "deploy.drift.option");
}

TEST_CASE("measure_drift on a numeric column gives the worked PSI, ogive D and bins") {
    // The summary measure_references makes of 0..9 is the one written out by hand.
    const auto reference_table = csv_table("x\n0\n1\n2\n3\n4\n5\n6\n7\n8\n9\n");
    const auto rows = retrain_test::all_rows(reference_table);
    const auto refs = tenon::measure_references(reference_table, rows, tenon::plan().measure(reference_table, rows), 5);
    REQUIRE(refs.size() == 1);
    CHECK(refs[0].histogram == zero_to_nine().histogram);
    CHECK(refs[0].minimum == 0.0);
    CHECK(refs[0].maximum == 9.0);

    // Window 1, 2, 3, 8, 8, 9, 9, 12 (m = 8): bin shares 1/8, 2/8, 0, 0, 4/8
    // and 1/8 above the maximum; reference shares 0.2 in each histogram bin.
    const auto window = csv_table("x\n1\n2\n3\n8\n8\n9\n9\n12\n");
    tenon::drift_options no_floor;  // 10 against 8 rows: the noise floor would hide any PSI
    no_floor.psi_noise_significance = 0.0;
    const auto report = tenon::measure_drift(refs, window, no_floor);
    const auto& f = report.feature("x");
    // PSI by hand (floor 1e-4): (0.125-0.2)ln(0.625) + 0.05 ln(1.25) + 2 (1e-4-0.2)ln(5e-4)
    //   + 0.3 ln(2.5) + (0.125-1e-4) ln(1250) = 4.2507847.
    CHECK(f.psi == doctest::Approx(4.2507847).epsilon(1e-6));
    CHECK(f.bins.size() == 8);  // 5 histogram bins, below, above, missing
    // Whole numbers: each bin is labelled by the whole numbers it holds.
    CHECK(refs[0].whole_numbers);
    CHECK(f.bins[0].label == "0 to 1");
    CHECK(f.bins[4].label == "8 to 9");
    CHECK(f.bins[6].label == "> 9");
    CHECK(f.bins[6].window_count == 1);
    CHECK(f.above_range == 1);
    CHECK(f.below_range == 0);
    double sum = 0;
    for (const auto& b : f.bins) sum += b.contribution;
    CHECK(sum == doctest::Approx(f.psi));
    // The summary keeps the ten values, so D is exact: at x = 7 the reference
    // CDF is 8/10 and the window's 3/8, D = 0.8 - 0.375 = 0.425 (hand-computed),
    // the two-sample D of the raw values.
    CHECK(refs[0].distinct.size() == 10);
    CHECK(f.ks == doctest::Approx(0.425));
    CHECK(f.ks == doctest::Approx(tenon::ks_two_sample({0, 1, 2, 3, 4, 5, 6, 7, 8, 9}, {1, 2, 3, 8, 8, 9, 9, 12})));
    CHECK(f.ks_error_bound == 0.0);
    CHECK(f.psi_flag);
    CHECK(f.status == tenon::drift_status::drifted);

    // A summary from before the distributions were kept (no section REFD):
    // the ogive of equal bins over [0, 9] is F(x) = x / 9. Just above 8 the
    // window's CDF is 5/8 (1,2,3,8,8), just below 3/8; the largest gap is
    // F(8) - 3/8 = 8/9 - 3/8 = 37/72 (hand-computed). Its labels are the edges.
    const auto old_summary = tenon::measure_drift({zero_to_nine()}, window).feature("x");
    CHECK(old_summary.ks == doctest::Approx(37.0 / 72.0));
    CHECK(old_summary.ks_error_bound == doctest::Approx(0.2));  // the largest bin share
    CHECK(old_summary.bins[0].label == "[0, 1.8)");
    CHECK(old_summary.bins[4].label == "[7.2, 9]");
    CHECK(tenon::reference_cdf(refs[0], 4.5) == doctest::Approx(0.5));
}

TEST_CASE("measure_drift on a categorical column counts unseen categories and missing cells") {
    tenon::feature_reference ref;
    ref.column = "fluid";
    ref.kind = tenon::column_kind::categorical;
    ref.present = 10;
    ref.categories = {{"brine", 4}, {"water", 6}};
    // Window: water 2, brine 3, oil 5 (never seen in training), m = 10.
    const auto window = csv_table("fluid\nwater\nbrine\noil\noil\nwater\nbrine\noil\nbrine\noil\noil\n");
    const auto f = tenon::measure_drift({ref}, window).feature("fluid");
    // (0.3-0.4) ln(0.75) + (0.2-0.6) ln(1/3) + (0.5-1e-4) ln(5000) = 0.0287682 + 0.4394449 + 4.2577449 = 4.7259580.
    CHECK(f.psi == doctest::Approx(4.7259580).epsilon(1e-6));
    REQUIRE(f.unseen_categories.size() == 1);
    CHECK(f.unseen_categories[0] == std::make_pair(std::string("oil"), std::uint64_t(5)));
    CHECK(f.bins[2].label == "oil (unseen)");
    CHECK(std::isnan(f.ks));  // no order among categories
    CHECK_FALSE(f.ks_flag);
    CHECK(f.drifted());

    // Same frequencies, some missing: the missing bin is compared too.
    const auto with_missing = csv_table("fluid\nwater\nwater\nwater\nbrine\nbrine\nNA\nNA\nNA\nwater\nwater\n");
    const auto g = tenon::measure_drift({ref}, with_missing).feature("fluid");
    CHECK(g.window_missing == 3);
    CHECK(g.bins.back().label == "(missing)");
    CHECK(g.bins.back().window_count == 3);
    // Shares water 0.5, brine 0.2, missing 0.3 against 0.6, 0.4, 0 (floored to 1e-4):
    // (0.2-0.4)ln(0.5) + (0.5-0.6)ln(5/6) + (0.3-1e-4)ln(3000) = 0.1386294 + 0.0182322 + 2.4011096 = 2.5579712.
    CHECK(g.psi == doctest::Approx(2.5579712).epsilon(1e-6));
}

TEST_CASE("the summary-based D stays within the largest bin share of the exact two-sample D") {
    tenon::random_engine rng(5);
    std::ostringstream a, b;
    a << "x\n";
    b << "x\n";
    a.precision(17);
    b.precision(17);
    std::vector<double> va, vb;
    for (int i = 0; i < 2000; ++i) {
        va.push_back(rng.normal(10.0, 2.0));
        a << va.back() << "\n";
    }
    for (int i = 0; i < 300; ++i) {
        vb.push_back(rng.normal(10.8, 2.5));
        b << vb.back() << "\n";
    }
    const auto ta = csv_table(a.str()), tb = csv_table(b.str());
    const auto rows = retrain_test::all_rows(ta);
    const auto refs = tenon::measure_references(ta, rows, tenon::plan().measure(ta, rows), 10);
    std::uint64_t largest = 0;
    for (auto c : refs[0].histogram) largest = std::max(largest, c);
    const double bound = static_cast<double>(largest) / 2000.0;
    const double summary_d = tenon::measure_drift(refs, tb).feature("x").ks;
    const double exact_d = tenon::ks_two_sample(va, vb);
    INFO("summary D " << summary_d << ", exact D " << exact_d << ", bound " << bound);
    CHECK(std::abs(summary_d - exact_d) <= bound);
    CHECK(exact_d > 0.1);  // the shift is visible at all
}

TEST_CASE("a one-value reference column has a step CDF") {
    tenon::feature_reference f;
    f.column = "x";
    f.present = 4;
    f.minimum = f.maximum = 3.0;
    f.histogram = {4, 0, 0};
    const auto same = csv_table("x\n3\n3\n3\n");
    CHECK(tenon::measure_drift({f}, same).feature("x").ks == 0.0);
    // Half the window below the value: D = 1/2 just below 3.
    const auto half = csv_table("x\n1\n3\n2\n3\n");
    CHECK(tenon::measure_drift({f}, half).feature("x").ks == doctest::Approx(0.5));
    // All above: D = 1 at 3.
    CHECK(tenon::measure_drift({f}, csv_table("x\n4\n5\n")).feature("x").ks == doctest::Approx(1.0));
}

TEST_CASE("a drifted pump log is flagged and an undrifted one is not") {
    const auto training = retrain_test::pump_rows(1500, 1);
    const auto refs = pump_references(training);
    REQUIRE(refs.size() == 3);

    const auto same_process = retrain_test::pump_rows(500, 2);
    const auto undrifted = tenon::measure_drift(refs, same_process);
    MESSAGE("undrifted window (500 rows, same process):\n" << tenon::drift_table(undrifted));
    CHECK_FALSE(undrifted.any_drift());
    for (const auto& f : undrifted.features) {
        CHECK(f.psi < 0.1);
        CHECK(f.status == tenon::drift_status::stable);
    }

    const auto after = retrain_test::pump_rows(500, 3, retrain_test::drifted());
    const auto drifted = tenon::measure_drift(refs, after);
    MESSAGE("drifted window (500 rows, flow 80-170, head 20-55, 70% brine):\n" << tenon::drift_table(drifted));
    CHECK(drifted.drifted_count() == 3);
    CHECK(drifted.feature("flow").psi > 0.25);
    CHECK(drifted.feature("flow").ks_flag);
    CHECK(drifted.feature("flow").above_range > 0);
    CHECK(drifted.feature("head").psi > 0.25);
    CHECK(drifted.feature("fluid").psi > 0.25);
    CHECK(std::isnan(drifted.feature("fluid").ks));

    // Only the fluid mix drifts: only fluid is flagged.
    retrain_test::pump_conditions mix;
    mix.fluid_weights[0] = 0.1;
    mix.fluid_weights[1] = 0.2;
    mix.fluid_weights[2] = 0.7;
    const auto fluid_only = tenon::measure_drift(refs, retrain_test::pump_rows(500, 4, mix));
    CHECK(fluid_only.drifted_count() == 1);
    CHECK(fluid_only.feature("fluid").drifted());
}

TEST_CASE("thresholds are configurable: a fixed D limit and a PSI threshold") {
    const auto training = retrain_test::pump_rows(1500, 1);
    const auto refs = pump_references(training);
    const auto window = retrain_test::pump_rows(500, 2);
    tenon::drift_options strict;
    strict.psi_threshold = 1e-3;
    strict.psi_watch = 1e-4;
    strict.ks_threshold = 1e-3;
    strict.psi_noise_significance = 0.0;  // no noise floor: the thresholds alone
    const auto r = tenon::measure_drift(refs, window, strict);
    CHECK(r.drifted_count() == 3);
    CHECK(r.feature("flow").ks_limit == 1e-3);
    tenon::drift_options moderate;
    moderate.psi_watch = 0.0;
    moderate.ks_significance = 1e-9;
    moderate.psi_noise_significance = 0.0;
    const auto w = tenon::measure_drift(refs, window, moderate);
    CHECK(w.feature("head").status == tenon::drift_status::watch);
}

TEST_CASE("window cells of another kind are read as the reference's kind or counted unreadable") {
    const auto f = zero_to_nine();
    // The window's x column reads as text because of "broken": numbers are parsed, the rest counted.
    const auto window = csv_table("x\n1\nbroken\n4.5\nNA\n");
    const auto d = tenon::measure_drift({f}, window).feature("x");
    CHECK(d.unreadable == 1);
    CHECK(d.window_missing == 2);  // the unreadable cell and the empty one
    CHECK(d.bins[0].window_count == 1);
    CHECK(d.bins[2].window_count == 1);
    // A categorical reference read from numbers: 1 and 2 as "1" and "2".
    tenon::feature_reference c;
    c.column = "code";
    c.kind = tenon::column_kind::categorical;
    c.present = 2;
    c.categories = {{"1", 1}, {"2", 1}};
    const auto codes = tenon::measure_drift({c}, csv_table("code\n1\n2\n")).feature("code");
    CHECK(codes.psi == doctest::Approx(0.0));
    CHECK(codes.unseen_categories.empty());
}

TEST_CASE("drift errors: an empty window, a missing column, options out of range") {
    const auto f = zero_to_nine();
    const auto window = csv_table("x\n1\n");
    CHECK(code_of([&] { tenon::measure_drift({f}, window, std::vector<std::size_t>{}); }) == "deploy.drift.empty_window");
    CHECK(code_of([&] { tenon::measure_drift({f}, window, std::vector<std::size_t>{3}); }) == "prep.rows.out_of_range");
    CHECK(code_of([&] { tenon::measure_drift({f}, csv_table("y\n1\n")); }) == "deploy.input.missing_column");
    const auto with = [&](auto change) {
        tenon::drift_options o;
        change(o);
        return code_of([&] { tenon::measure_drift({f}, window, o); });
    };
    CHECK(with([](tenon::drift_options& o) { o.psi_threshold = 0.0; }) == "deploy.drift.option");
    CHECK(with([](tenon::drift_options& o) { o.psi_watch = 0.5; }) == "deploy.drift.option");
    CHECK(with([](tenon::drift_options& o) { o.ks_threshold = 1.5; }) == "deploy.drift.option");
    CHECK(with([](tenon::drift_options& o) { o.ks_significance = 1.0; }) == "deploy.drift.option");
    CHECK(with([](tenon::drift_options& o) { o.empty_bin_share = 0.0; }) == "deploy.drift.option");
    CHECK(with([](tenon::drift_options& o) { o.empty_bin_share = 0.5; }) == "deploy.drift.option");
    CHECK(with([](tenon::drift_options& o) { o.psi_noise_significance = -0.1; }) == "deploy.drift.option");
    CHECK(with([](tenon::drift_options& o) { o.psi_noise_draws = 19; }) == "deploy.drift.option");
    CHECK(code_of([] { tenon::population_stability_index({1.0}, {1.0}, 0.0); }) == "deploy.drift.option");
    CHECK(code_of([&] { tenon::measure_drift({f}, window).feature("nope"); }) == "prep.column.unknown");
}

TEST_CASE("the drift report serializes to JSON with null for a missing statistic") {
    tenon::feature_reference c;
    c.column = "fluid \"main\"";
    c.kind = tenon::column_kind::categorical;
    c.present = 1;
    c.categories = {{"water", 1}};
    tenon::drift_options no_floor;  // two rows: the noise floor would hide any PSI
    no_floor.psi_noise_significance = 0.0;
    const auto r = tenon::measure_drift({c, zero_to_nine()}, csv_table("x,\"fluid \"\"main\"\"\"\n1,water\n12,oil\n"), no_floor);
    const std::string json = tenon::to_json(r);
    CHECK(json.find("\"window_rows\": 2") != std::string::npos);
    CHECK(json.find("\"column\": \"fluid \\\"main\\\"\"") != std::string::npos);
    CHECK(json.find("\"ks\": null") != std::string::npos);
    CHECK(json.find("\"unseen_categories\": {\"oil\": 1}") != std::string::npos);
    CHECK(json.find("\"status\": \"drifted\"") != std::string::npos);
    CHECK(json.find("\"psi_threshold\": 0.25") != std::string::npos);
    CHECK(json.find("nan") == std::string::npos);
}
