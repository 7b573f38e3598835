// Tests of the workflow: plan measured on training rows only, a fitted model
// scored in original units, and cross-validation's refit per fold.
#include <doctest/doctest.h>

#include <cmath>
#include <sstream>
#include <string>

#include <tenon/prep/csv.hpp>
#include <tenon/train/workflow.hpp>

namespace {

// An invented cooling-pump log: flow [m3/h], head [m], fluid type, motor
// power [kW] = flow * head * density factor / efficiency + noise.
tenon::table pump_table(std::size_t n, std::uint64_t seed) {
    tenon::random_engine rng(seed);
    std::ostringstream csv;
    csv << "flow,head,fluid,power\n";
    const char* fluids[] = {"water", "glycol", "brine"};
    const double density[] = {1.0, 1.07, 1.2};
    for (std::size_t i = 0; i < n; ++i) {
        const double flow = rng.uniform(20.0, 120.0), head = rng.uniform(5.0, 40.0);
        const auto f = static_cast<std::size_t>(rng.below(3));
        const double efficiency = 0.55 + 0.25 * std::exp(-std::pow((flow - 70.0) / 40.0, 2));
        const double power = flow * head * density[f] / (367.0 * efficiency) + rng.normal(0.0, 0.05);
        csv << flow << "," << head << "," << fluids[f] << "," << power << "\n";
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
    for (std::size_t i = 0; i < 200; ++i) csv << rng.normal(0.0, 1.0) << "," << rng.normal(0.0, 1.0) << "," << rng.normal(0.0, 1.0) << "," << rng.normal(0.0, 1.0) << "\n";
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
                         "[train.option.invalid] unknown optimizer 'sgd2' (gd, momentum, nesterov, adam, adamw, rmsprop, adagrad)",
                         tenon::error);
    CHECK(tenon::parse_loss_kind("huber") == tenon::loss_kind::huber);
    CHECK(tenon::parse_update_kind("nesterov") == tenon::update_kind::nesterov);
    CHECK(std::string(tenon::make_update_rule<float>(tenon::update_kind::nesterov)->kind()) == "nesterov");
}
