// Tests of the workflow: plan measured on training rows only, a fitted model
// scored in original units, and cross-validation's refit per fold.
#include <doctest/doctest.h>

#include <atomic>
#include <cmath>
#include <sstream>
#include <string>

#include <tenon/prep/csv.hpp>
#include <tenon/train/workflow.hpp>

#include "pump_log.hpp"

namespace {

// The pump log (pump_log.hpp) without its condition column.
tenon::table pump_table(std::size_t n, std::uint64_t seed) {
    tenon::random_engine rng(seed);
    std::ostringstream csv;
    csv << "flow,head,fluid,power\n";
    for (std::size_t i = 0; i < n; ++i) {
        const pump_log::reading r = pump_log::draw(rng);
        csv << r.flow << "," << r.head << "," << r.fluid_name() << "," << r.power << "\n";
    }
    std::istringstream in(csv.str());
    return tenon::read_csv(in, {}, "pump.csv");
}

}  // namespace

TEST_CASE("fit_model measures the plan on the training rows only") {
    const auto t = pump_table(400, 1);
    tenon::plan p;
    p.set_target("power", tenon::target_kind::regression);
    const auto split = tenon::random_holdout(t.row_count(), {0.5, 0.25, 0.25}, 3);
    tenon::model_settings s;
    s.epochs = 3;
    auto m = tenon::fit_model<float>(t, p, split.train, split.validation, s);
    const auto on_train = p.measure(t, split.train);
    std::vector<std::size_t> all(t.row_count());
    for (std::size_t i = 0; i < all.size(); ++i) all[i] = i;
    const auto on_all = p.measure(t, all);
    CHECK(m.plan.feature_scaling("flow") == on_train.feature_scaling("flow"));
    CHECK_FALSE(m.plan.feature_scaling("flow") == on_all.feature_scaling("flow"));
    CHECK(m.plan.target_scaling() == on_train.target_scaling());
    CHECK(m.train_rows == split.train.size());
    CHECK(m.validation_rows == split.validation.size());
}

TEST_CASE("a fitted regression model is scored in the target's original units") {
    const auto t = pump_table(1200, 2);
    tenon::plan p;
    p.set_target("power", tenon::target_kind::regression);
    const auto split = tenon::random_holdout(t.row_count(), {0.7, 0.15, 0.15}, 4);
    tenon::model_settings s;
    s.hidden = {32, 16};
    s.learning_rate = 3e-3;
    s.epochs = 150;
    s.patience = 20;
    auto m = tenon::fit_model<float>(t, p, split.train, split.validation, s);
    const auto e = tenon::evaluate_model(m, t, split.test);
    CHECK_FALSE(e.classification);
    CHECK(e.rows == split.test.size());
    // Power spans about 0.3 to 25 kW; a fitted model explains nearly all of
    // it, and its error is in kW, far above the scaled units' ~0.01.
    CHECK(e.r2 > 0.98);
    CHECK(e.rmse < 0.8);
    CHECK(e.mae > 0.01);
}

TEST_CASE("ridge least squares recovers the coefficients of a noiseless linear relation") {
    // y = 2 x0 - 3 x1 + 0.5 x2 + 1 exactly: least squares reproduces it (the
    // normal equations, Gauss 1809); the tiny ridge moves it by far less than 1e-3.
    tenon::random_engine rng(21);
    tenon::matrix<double> x({50, 3}), y({50, 1});
    for (std::size_t i = 0; i < 50; ++i) {
        for (std::size_t k = 0; k < 3; ++k) x(i, k) = rng.uniform(-2.0, 2.0);
        y(i, 0) = 2 * x(i, 0) - 3 * x(i, 1) + 0.5 * x(i, 2) + 1;
    }
    const auto fit = tenon::fit_least_squares(x, y);
    CHECK(fit.weights[0] == doctest::Approx(2.0).epsilon(1e-3));
    CHECK(fit.weights[1] == doctest::Approx(-3.0).epsilon(1e-3));
    CHECK(fit.weights[2] == doctest::Approx(0.5).epsilon(1e-3));
    CHECK(fit.intercept[0] == doctest::Approx(1.0).epsilon(1e-3));
    // A repeated column (as one-hot groups give) still has a solution.
    tenon::matrix<double> twice({50, 2});
    for (std::size_t i = 0; i < 50; ++i) twice(i, 0) = twice(i, 1) = x(i, 0);
    const auto shared = tenon::fit_least_squares(twice, y);
    CHECK(std::isfinite(shared.weights[0]));
    CHECK(shared.weights[0] == doctest::Approx(shared.weights[1]));
    CHECK_THROWS_WITH(tenon::fit_least_squares(x, tenon::matrix<double>({4, 1})), doctest::Contains("50 feature rows and 4 target rows"));
}

TEST_CASE("by default a regression network has a linear path and is scored beside its baseline") {
    // An invented press: force = 3 stroke + 2 speed + noise, plus a small
    // curvature in temperature; the test rows lie beyond the training range
    // of the stroke (a chronological drift), where a network without a
    // linear path flattens out.
    tenon::random_engine rng(22);
    std::ostringstream csv;
    csv << "stroke,speed,temperature,force\n";
    for (std::size_t i = 0; i < 300; ++i) {
        const double stroke = 10.0 + 0.1 * static_cast<double>(i) + rng.uniform(-1.0, 1.0), speed = rng.uniform(0.0, 5.0);
        const double temperature = rng.uniform(20.0, 40.0);
        csv << stroke << "," << speed << "," << temperature << ","
            << 3 * stroke + 2 * speed + 0.05 * (temperature - 30) * (temperature - 30) + rng.normal(0.0, 0.3) << "\n";
    }
    std::istringstream in(csv.str());
    const auto t = tenon::read_csv(in, {}, "press.csv");
    tenon::plan p;
    p.set_target("force", tenon::target_kind::regression);
    std::vector<std::size_t> train, validation, test;
    for (std::size_t i = 0; i < 300; ++i) (i < 200 ? train : i < 240 ? validation : test).push_back(i);
    tenon::model_settings s;
    s.seed = 3;
    auto m = tenon::fit_model<float>(t, p, train, validation, s);
    CHECK(m.net.describe().children.front().kind == "linear_bypass");
    const auto model = tenon::evaluate_model(m, t, test), baseline = tenon::evaluate_baseline(m, t, test);
    MESSAGE("press: network test RMSE " << model.rmse << ", baseline " << baseline.rmse << ", kept baseline " << m.kept_baseline);
    // The baseline misses the curvature (its spread is 0.05 x 10^2 = 5 at the
    // edges); the network learns it and, with its linear path, still
    // extrapolates in the stroke.
    CHECK(model.rmse < baseline.rmse);
    s.linear_path = false;
    auto plain = tenon::fit_model<float>(t, p, train, validation, s);
    CHECK(plain.net.describe().children.front().kind == "dense");
    const double plain_rmse = tenon::evaluate_model(plain, t, test).rmse;
    MESSAGE("press: without the linear path " << plain_rmse);
    CHECK(model.rmse < plain_rmse);
}

TEST_CASE("the baseline is shipped when the network does not beat it on validation") {
    // A target of pure noise: nothing beyond its mean can be learned, and a
    // network fitted to the training rows' noise does worse than the ridge
    // line on new rows, so fit_model ships the baseline; the model's
    // predictions are then the baseline's.
    tenon::random_engine rng(23);
    std::ostringstream csv;
    csv << "a,b,c,noise\n";
    for (std::size_t i = 0; i < 200; ++i)
        csv << rng.normal(0.0, 1.0) << "," << rng.normal(0.0, 1.0) << "," << rng.normal(0.0, 1.0) << "," << rng.normal(0.0, 1.0) << "\n";
    std::istringstream in(csv.str());
    const auto t = tenon::read_csv(in, {}, "noise.csv");
    tenon::plan p;
    p.set_target("noise", tenon::target_kind::regression);
    const auto split = tenon::random_holdout(t.row_count(), {0.6, 0.2, 0.2}, 24);
    tenon::model_settings s;
    s.seed = 4;
    s.ensemble = 1;  // one network: an average of several fits less of the noise
    auto m = tenon::fit_model<double>(t, p, split.train, split.validation, s);
    CHECK(m.kept_baseline);
    CHECK(m.baseline_validation_loss < m.network_validation_loss);
    const auto model = tenon::evaluate_model(m, t, split.test), baseline = tenon::evaluate_baseline(m, t, split.test);
    CHECK(model.rmse == doctest::Approx(baseline.rmse).epsilon(1e-9));
}

TEST_CASE("a classification model carries a logistic-regression baseline") {
    const auto t = pump_table(300, 25);
    tenon::plan p;
    p.set_target("fluid", tenon::target_kind::classification);
    const auto split = tenon::random_holdout(t.row_count(), {0.6, 0.2, 0.2}, 26);
    tenon::model_settings s;
    s.seed = 5;
    auto m = tenon::fit_model<float>(t, p, split.train, split.validation, s);
    CHECK(m.baseline.class_scores);
    CHECK(m.baseline.outputs == 3);
    const auto b = tenon::evaluate_baseline(m, t, split.test);
    CHECK(b.classification);
    CHECK(b.rows == split.test.size());
    // The fluid shows only through power / (flow x head) (a density factor
    // of 1, 1.07 or 1.2): no linear function of the columns separates it
    // well, so the logistic baseline stays well below perfect, and the
    // network beats it on validation.
    CHECK(b.accuracy < 0.9);
    CHECK(m.network_validation_loss < m.baseline_validation_loss);
    CHECK_FALSE(m.kept_baseline);
}

TEST_CASE("a seed ensemble is the same for any thread count, and its size follows the row count") {
    const auto t = pump_table(240, 27);
    tenon::plan p;
    p.set_target("power", tenon::target_kind::regression);
    const auto split = tenon::random_holdout(t.row_count(), {0.6, 0.2, 0.2}, 28);
    tenon::model_settings s;
    s.hidden = {16};
    s.epochs = 20;
    s.seed = 6;
    s.ensemble = 3;
    auto one_thread = tenon::fit_model<float>(t, p, split.train, split.validation, s);
    s.threads = 2;  // the members train side by side
    auto two_threads = tenon::fit_model<float>(t, p, split.train, split.validation, s);
    REQUIRE(one_thread.member_count() == 3);
    REQUIRE(two_threads.member_count() == 3);
    const auto features = one_thread.plan.apply<float>(t, split.test).features;
    const auto a = tenon::predict_prepared(one_thread, features), b = tenon::predict_prepared(two_threads, features);
    CHECK(a == b);
    // Members from different seeds differ; the first is the single network of the same seed.
    CHECK_FALSE(tenon::network_outputs(one_thread.members[0], features) == tenon::network_outputs(one_thread.net, features));
    s.threads = 1;
    s.ensemble = 1;
    auto single = tenon::fit_model<float>(t, p, split.train, split.validation, s);
    CHECK(tenon::network_outputs(single.net, features) == tenon::network_outputs(one_thread.net, features));
    // The default: 5 members under 10,000 training rows.
    s.ensemble = 0;
    s.epochs = 2;
    CHECK(tenon::fit_model<float>(t, p, split.train, split.validation, s).member_count() == 5);
}

TEST_CASE("cross-validation refits per fold and reports mean and spread") {
    const auto t = pump_table(300, 5);
    tenon::plan p;
    p.set_target("fluid", tenon::target_kind::classification);
    const auto folds = tenon::k_folds(t.row_count(), 3, 6);
    tenon::model_settings s;
    s.hidden = {8};
    s.epochs = 5;
    const auto r = tenon::cross_validate<double>(t, p, folds, s);
    REQUIRE(r.folds.size() == 3);
    REQUIRE(r.metrics.size() == 3);
    CHECK(r.metrics[0].name == "accuracy");
    double mean = 0, ss = 0;
    for (const auto& f : r.folds) mean += f.accuracy / 3.0;
    for (const auto& f : r.folds) ss += (f.accuracy - mean) * (f.accuracy - mean);
    CHECK(r.metrics[0].mean == doctest::Approx(mean));
    CHECK(r.metrics[0].standard_deviation == doctest::Approx(std::sqrt(ss / 2.0)));
    std::size_t scored = 0;
    for (const auto& f : r.folds) scored += f.rows;
    CHECK(scored == t.row_count());  // every row is scored exactly once
}

TEST_CASE("workflow errors") {
    const auto t = pump_table(50, 7);
    tenon::plan p;
    p.set_target("power", tenon::target_kind::regression);
    tenon::model_settings s;
    s.loss_given = true;
    s.loss = tenon::loss_kind::cross_entropy;
    std::vector<std::size_t> rows{0, 1, 2, 3, 4, 5, 6, 7};
    CHECK_THROWS_WITH_AS(tenon::fit_model<float>(t, p, rows, {}, s),
                         "[train.option.invalid] fit_model: the cross-entropy loss does not fit a regression target", tenon::error);
    CHECK_THROWS_WITH_AS(tenon::parse_update_kind("sgd2"),
                         "[train.option.invalid] unknown optimizer 'sgd2' (gd, momentum, nesterov, adam, adamw, rmsprop, adagrad)", tenon::error);
    CHECK(tenon::parse_loss_kind("huber") == tenon::loss_kind::huber);
    CHECK(tenon::parse_update_kind("nesterov") == tenon::update_kind::nesterov);
    CHECK(std::string(tenon::make_update_rule<float>(tenon::update_kind::nesterov)->kind()) == "nesterov");
}

namespace {

// pump_table's log as CSV text, with the cells of `poisoned` rows replaced
// by absurd values (a flow and head far outside any training range, a
// fluid no training row has, a power of 1e12).
tenon::table poisoned_pump_table(std::size_t n, std::uint64_t seed, const std::vector<std::size_t>& poisoned) {
    const auto clean = pump_table(n, seed);
    std::ostringstream csv;
    csv << "flow,head,fluid,power\n";
    std::vector<bool> poison(n, false);
    for (const auto r : poisoned) poison[r] = true;
    const auto& flow = clean.at("flow");
    const auto& head = clean.at("head");
    const auto& fluid = clean.at("fluid");
    const auto& power = clean.at("power");
    for (std::size_t i = 0; i < n; ++i) {
        if (poison[i]) {
            csv << "1e9,-1e9,mercury,1e12\n";
        } else {
            csv.precision(17);
            csv << flow.number(i) << "," << head.number(i) << "," << fluid.category(i) << "," << power.number(i) << "\n";
        }
    }
    std::istringstream in(csv.str());
    return tenon::read_csv(in, {}, "pump.csv");
}

std::vector<float> all_weights(tenon::fitted_model<float>& m) {
    std::vector<float> w;
    auto add = [&](tenon::network<float>& n) {
        for (const auto* p : n.parameters()) w.insert(w.end(), p->value().data(), p->value().data() + p->size());
    };
    add(m.net);
    for (auto& member : m.members) add(member);
    return w;
}

// Quick settings for the refit tests: a small network, few epochs.
tenon::model_settings quick_settings() {
    tenon::model_settings s;
    s.hidden = {16};
    s.epochs = 40;
    s.min_steps = 200;
    s.patience = 5;
    s.patience_steps = 100;
    s.ensemble = 2;
    s.seed = 11;
    return s;
}

}  // namespace

TEST_CASE("refit: on under 5,000 rows by default, off above it or when asked; each member trains for its best step count") {
    CHECK(tenon::refit_wanted(tenon::model_settings{}, 4999));
    CHECK_FALSE(tenon::refit_wanted(tenon::model_settings{}, 5000));
    const auto t = pump_table(400, 31);
    tenon::plan p;
    p.set_target("power", tenon::target_kind::regression);
    const auto split = tenon::random_holdout(t.row_count(), {0.6, 0.2, 0.2}, 32);
    tenon::model_settings s = quick_settings();
    auto refit = tenon::fit_model<float>(t, p, split.train, split.validation, s);
    REQUIRE(refit.refit_rows == split.train.size() + split.validation.size());
    REQUIRE(refit.best_steps.size() == 2);
    CHECK(refit.refit_steps == refit.best_steps);
    // The first member's best step is where its kept epoch ended: epochs of
    // ceil(240 / 32) = 8 steps (no divergence here).
    CHECK(refit.outcome.best_step == refit.best_steps[0]);
    CHECK(refit.best_steps[0] == refit.outcome.best_epoch * 8);
    CHECK(refit.best_steps[0] > 0);

    s.refit = false;
    auto kept = tenon::fit_model<float>(t, p, split.train, split.validation, s);
    CHECK(kept.refit_rows == 0);
    CHECK(kept.refit_steps.empty());
    CHECK(kept.best_steps == refit.best_steps);  // the same validated run
    CHECK_FALSE(all_weights(kept) == all_weights(refit));
    // The public refit_model gives what fit_model's refit gave.
    REQUIRE(tenon::refit_model(kept, t, split.train, split.validation, s));
    CHECK(all_weights(kept) == all_weights(refit));
    CHECK(kept.refit_steps == refit.refit_steps);
    CHECK_THROWS_WITH_AS(tenon::refit_model(kept, t, split.train, split.validation, s), doctest::Contains("refit already"), tenon::error);

    // Above the threshold: 5,000 training plus validation rows.
    const auto big = pump_table(6000, 33);
    const auto big_split = tenon::random_holdout(big.row_count(), {0.7, 0.15, 0.15}, 34);
    tenon::model_settings b = quick_settings();
    b.hidden = {4};
    b.epochs = 2;
    b.ensemble = 1;
    auto unrefit = tenon::fit_model<float>(big, p, big_split.train, big_split.validation, b);
    CHECK(unrefit.refit_rows == 0);
    b.refit = true;  // asked for: refit whatever the row count
    auto forced = tenon::fit_model<float>(big, p, big_split.train, big_split.validation, b);
    CHECK(forced.refit_rows == big_split.train.size() + big_split.validation.size());
    // Without validation rows there is no stopping step to refit for.
    auto no_validation = tenon::fit_model<float>(t, p, split.train, {}, s);
    CHECK(no_validation.refit_rows == 0);
    CHECK_THROWS_WITH_AS(tenon::refit_model(no_validation, t, split.train, split.validation, s), doctest::Contains("no validated stopping step"),
                         tenon::error);
    // Settings that build another network are refused.
    tenon::model_settings other = s;
    other.hidden = {8};
    auto again = tenon::fit_model<float>(t, p, split.train, split.validation, s);
    CHECK_THROWS_WITH_AS(tenon::refit_model(again, t, split.train, split.validation, other), doctest::Contains("pass the settings fit_model"),
                         tenon::error);
}

TEST_CASE("refit: the same for any thread count, and the test rows are never read") {
    const std::size_t n = 300;
    const auto split = tenon::random_holdout(n, {0.6, 0.2, 0.2}, 36);
    const auto clean = pump_table(n, 35);
    const auto poisoned = poisoned_pump_table(n, 35, split.test);
    for (const auto kind : {tenon::target_kind::regression, tenon::target_kind::classification}) {
        CAPTURE(static_cast<int>(kind));
        tenon::plan p;
        p.set_target(kind == tenon::target_kind::regression ? "power" : "fluid", kind);
        // For classification the poisoned rows' fluid is a class no training
        // row has, and their power is far outside the inputs' range.
        tenon::model_settings s = quick_settings();
        auto a = tenon::fit_model<float>(clean, p, split.train, split.validation, s);
        REQUIRE(a.refit_rows > 0);
        auto again = tenon::fit_model<float>(clean, p, split.train, split.validation, s);
        CHECK(all_weights(a) == all_weights(again));
        s.threads = 2;
        auto two = tenon::fit_model<float>(clean, p, split.train, split.validation, s);
        CHECK(all_weights(a) == all_weights(two));
        s.threads = 1;
        auto from_poisoned = tenon::fit_model<float>(poisoned, p, split.train, split.validation, s);
        CHECK(all_weights(a) == all_weights(from_poisoned));
        CHECK(a.baseline.weights == from_poisoned.baseline.weights);
    }
    // The poison would show: a plan measured on all rows differs.
    tenon::plan p;
    p.set_target("power", tenon::target_kind::regression);
    std::vector<std::size_t> every(n);
    for (std::size_t i = 0; i < n; ++i) every[i] = i;
    CHECK_FALSE(p.measure(poisoned, every).target_scaling() == p.measure(clean, every).target_scaling());
}

TEST_CASE("refit: the test error of a small regression is not worse than without refit") {
    // 300 rows of the pump log, 5 seeds: the refit model trains on 240 rows
    // instead of 180. Measured here: the mean test RMSE with refit is below
    // the one without (printed); the check allows 5% worse, as a refit
    // repeats a step count chosen on another row count.
    const auto t = pump_table(300, 37);
    tenon::plan p;
    p.set_target("power", tenon::target_kind::regression);
    double with = 0.0, without = 0.0;
    for (std::uint64_t seed = 1; seed <= 5; ++seed) {
        const auto split = tenon::random_holdout(t.row_count(), {0.6, 0.2, 0.2}, 100 + seed);
        tenon::model_settings s;
        s.seed = seed;
        s.refit = false;
        auto plain = tenon::fit_model<float>(t, p, split.train, split.validation, s);
        without += tenon::evaluate_model(plain, t, split.test).rmse / 5.0;
        REQUIRE(tenon::refit_model(plain, t, split.train, split.validation, s));
        with += tenon::evaluate_model(plain, t, split.test).rmse / 5.0;
    }
    MESSAGE("pump log, mean test RMSE over 5 seeds: refit " << with << ", no refit " << without);
    CHECK(with < 1.05 * without);
}

TEST_CASE("class weights: balanced weights are n / (k n_c) and raise the rare class's recall") {
    // Two overlapping clouds, 95% of class "ok" around (0, 0) and 5% of
    // "leak" around (1.5, 1.5), unit spread: without weights the rare class
    // is mostly predicted as the common one.
    tenon::random_engine rng(41);
    std::ostringstream csv;
    csv << "a,b,state\n";
    for (std::size_t i = 0; i < 2000; ++i) {
        const bool leak = rng.uniform(0.0, 1.0) < 0.05;
        const double m = leak ? 1.5 : 0.0;
        csv << rng.normal(m, 1.0) << "," << rng.normal(m, 1.0) << "," << (leak ? "leak" : "ok") << "\n";
    }
    std::istringstream in(csv.str());
    const auto t = tenon::read_csv(in, {}, "leaks.csv");
    tenon::plan p;
    p.set_target("state", tenon::target_kind::classification);
    std::vector<std::uint32_t> labels(t.row_count());
    for (std::size_t i = 0; i < labels.size(); ++i) labels[i] = t.at("state").code(i);
    const auto split = tenon::stratified_holdout(labels, {0.6, 0.2, 0.2}, 42);
    tenon::model_settings s;
    s.hidden = {16};
    s.ensemble = 1;
    s.seed = 3;
    auto plain = tenon::fit_model<float>(t, p, split.train, split.validation, s);
    CHECK(plain.class_weights.empty());
    s.class_weights = tenon::class_weighting::balanced;
    auto weighted = tenon::fit_model<float>(t, p, split.train, split.validation, s);
    // The formula, counted here from the table.
    const auto& names = weighted.plan.class_names();
    std::vector<double> counts(names.size(), 0.0);
    for (const auto r : split.train)
        for (std::size_t c = 0; c < names.size(); ++c) counts[c] += t.at("state").category(r) == names[c] ? 1.0 : 0.0;
    REQUIRE(weighted.class_weights.size() == 2);
    for (std::size_t c = 0; c < 2; ++c)
        CHECK(weighted.class_weights[c] == doctest::Approx(static_cast<double>(split.train.size()) / (2.0 * counts[c])));
    CHECK(tenon::balanced_class_weights({0, 0, 0, 1}, 2) == std::vector<double>{4.0 / 6.0, 2.0});
    CHECK_THROWS_WITH_AS(tenon::balanced_class_weights({0, 0}, 2), doctest::Contains("class 1 has no training row"), tenon::error);
    CHECK(tenon::parse_class_weighting("balanced") == tenon::class_weighting::balanced);
    CHECK_THROWS_WITH_AS(tenon::parse_class_weighting("even"), doctest::Contains("none, balanced"), tenon::error);
    {
        const auto pump = pump_table(100, 43);
        tenon::plan regression;
        regression.set_target("power", tenon::target_kind::regression);
        const auto rows = tenon::random_holdout(pump.row_count(), {0.6, 0.2, 0.2}, 44);
        CHECK_THROWS_WITH_AS(tenon::fit_model<float>(pump, regression, rows.train, rows.validation, s),
                             doctest::Contains("class weights (balanced) need a classification target; 'power' is a regression target"),
                             tenon::error);
    }

    const std::size_t leak = names[0] == "leak" ? 0 : 1;
    const auto e_plain = tenon::evaluate_model(plain, t, split.test), e_weighted = tenon::evaluate_model(weighted, t, split.test);
    const double r_plain = e_plain.classes.per_class[leak].recall, r_weighted = e_weighted.classes.per_class[leak].recall;
    MESSAGE("rare class recall on test rows: none " << r_plain << ", balanced " << r_weighted << " (" << e_weighted.classes.per_class[leak].true_rows
                                                    << " rare rows)");
    CHECK(r_weighted > r_plain + 0.2);
}

TEST_CASE("median-IQR target scaling: center and spread are the training rows' median and IQR; predictions in the target's units") {
    // A flow meter's reading y = 200 + 30 x1 - 20 x2 + noise, with 1% of the
    // readings spikes of 1e6 (a stuck transmitter): the spikes move the mean
    // and the standard deviation, not the median and the quartiles.
    tenon::random_engine rng(51);
    std::ostringstream csv;
    csv << "x1,x2,y\n";
    csv.precision(17);
    for (std::size_t i = 0; i < 600; ++i) {
        const double x1 = rng.uniform(-1.0, 1.0), x2 = rng.uniform(-1.0, 1.0);
        const double y = i % 100 == 7 ? 1e6 : 200.0 + 30.0 * x1 - 20.0 * x2 + rng.normal(0.0, 1.0);
        csv << x1 << "," << x2 << "," << y << "\n";
    }
    std::istringstream in(csv.str());
    const auto t = tenon::read_csv(in, {}, "meter.csv");
    const auto split = tenon::random_holdout(t.row_count(), {0.6, 0.2, 0.2}, 52);
    tenon::plan p;
    p.set_target("y", tenon::target_kind::regression, tenon::scaling_method::median_iqr);
    tenon::model_settings s;
    s.hidden = {16};
    s.ensemble = 1;
    s.seed = 2;
    // The Huber loss (Huber 1964) with its threshold of 1 in scaled units,
    // here one interquartile range: the spikes pull on the fit linearly, not
    // quadratically (a squared loss would follow their mean, about 1e4).
    s.loss_given = true;
    s.loss = tenon::loss_kind::huber;
    auto m = tenon::fit_model<float>(t, p, split.train, split.validation, s);
    // Quartiles by linear interpolation between order statistics (Hyndman &
    // Fan 1996, definition 7), computed here on the sorted training targets.
    std::vector<double> y;
    for (const auto r : split.train) y.push_back(t.at("y").number(r));
    std::sort(y.begin(), y.end());
    const auto quantile = [&](double q) {
        const double h = static_cast<double>(y.size() - 1) * q;
        const auto lo = static_cast<std::size_t>(std::floor(h));
        return lo + 1 < y.size() ? y[lo] + (h - static_cast<double>(lo)) * (y[lo + 1] - y[lo]) : y[lo];
    };
    const tenon::scaling& ts = m.plan.target_scaling();
    CHECK(ts.method == tenon::scaling_method::median_iqr);
    CHECK(ts.center == doctest::Approx(quantile(0.5)).epsilon(1e-12));
    CHECK(ts.spread == doctest::Approx(quantile(0.75) - quantile(0.25)).epsilon(1e-12));
    CHECK(ts.spread < 100.0);  // the spikes do not widen it (a z-score spread would be about 1e5)
    // Predictions of the clean test rows are readings near 200, off by a few units at most.
    std::vector<std::size_t> clean;
    for (const auto r : split.test)
        if (t.at("y").number(r) < 1e5) clean.push_back(r);
    const auto prepared = m.plan.apply<float>(t, clean);
    const auto predicted = tenon::predict_prepared(m, prepared.features);
    double error = 0.0;
    for (std::size_t i = 0; i < clean.size(); ++i) error += std::abs(static_cast<double>(predicted(i, 0)) - t.at("y").number(clean[i]));
    error /= static_cast<double>(clean.size());
    MESSAGE("clean test rows, mean absolute error with median-IQR target scaling: " << error);
    CHECK(error < 10.0);  // the readings span about 150 to 250
    // The same with z-score scaling, for comparison: its spread of about
    // 1e5 makes the Huber threshold cover the spikes, so the loss is
    // squared for them as well.
    tenon::plan z;
    z.set_target("y", tenon::target_kind::regression);
    auto mz = tenon::fit_model<float>(t, z, split.train, split.validation, s);
    const auto pz = tenon::predict_prepared(mz, mz.plan.apply<float>(t, clean).features);
    double error_z = 0.0;
    for (std::size_t i = 0; i < clean.size(); ++i) error_z += std::abs(static_cast<double>(pz(i, 0)) - t.at("y").number(clean[i]));
    MESSAGE("the same with z-score target scaling: " << error_z / static_cast<double>(clean.size()));
}

TEST_CASE("refit: a refit cut by the time budget or the cancel flag leaves the model as it was") {
    const auto t = pump_table(200, 61);
    tenon::plan p;
    p.set_target("power", tenon::target_kind::regression);
    const auto split = tenon::random_holdout(t.row_count(), {0.6, 0.2, 0.2}, 62);
    tenon::model_settings s = quick_settings();
    s.refit = false;
    auto m = tenon::fit_model<float>(t, p, split.train, split.validation, s);
    const auto before = all_weights(m);
    const auto outcome_before = m.outcome.history.size();
    // A clock that advances one second a reading, against a budget of 5 s:
    // the refit stops long before its step counts.
    double now = 0.0;
    tenon::model_settings budget = s;
    budget.clock = [&now] { return now += 1.0; };
    budget.time_budget_seconds = 5.0;
    CHECK_FALSE(tenon::refit_model(m, t, split.train, split.validation, budget));
    CHECK(m.refit_rows == 0);
    CHECK(all_weights(m) == before);
    CHECK(m.outcome.history.size() == outcome_before);
    const std::atomic<bool> stop{true};
    tenon::model_settings cancelled = s;
    cancelled.cancel = &stop;
    CHECK_FALSE(tenon::refit_model(m, t, split.train, split.validation, cancelled));
    CHECK(all_weights(m) == before);
    // Untouched, the model still refits.
    CHECK(tenon::refit_model(m, t, split.train, split.validation, s));
    CHECK(m.refit_rows == split.train.size() + split.validation.size());
}
