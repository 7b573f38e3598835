// Tests of retraining with a promotion gate: the reservoir keeps every row
// with equal probability, the gate's decisions, promotion with a rollback
// file, the frozen plan, the holdout kept apart, the budget clock, the
// version-1 fixture, every error path, and a retraining on a drifted pump
// log that must beat the incumbent on the new process without forgetting
// the old one.
#include <doctest/doctest.h>

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <cstring>
#include <fstream>
#include <functional>
#include <set>
#include <sstream>
#include <string>
#include <utility>
#include <vector>

#include <unistd.h>

#include <tenon/deploy/drift.hpp>
#include <tenon/deploy/model_file.hpp>
#include <tenon/deploy/retraining.hpp>

#include "chi_square.hpp"
#include "retraining_test_support.hpp"

namespace {

using deploy_test::range;

std::string temp_path(const std::string& name) { return std::string("/tmp/tenon_retrain_test_") + std::to_string(::getpid()) + "_" + name; }

std::string code_of(const std::function<void()>& f) {
    try {
        f();
    } catch (const tenon::error& e) {
        return e.code();
    }
    return "no error";
}

bool file_exists(const std::string& path) { return std::ifstream(path).good(); }

std::vector<std::uint8_t> file_bytes(const std::string& path) { return tenon::read_file_bounded(path, 1u << 30); }

// A model of the pump log, trained on `t` (the first 80% of rows, early
// stopping on the rest), with its file.
template <class T>
tenon::model_file<T> incumbent_of(const tenon::table& t, const tenon::plan& p, const tenon::model_settings& s, std::size_t replay_rows = 256) {
    const std::size_t n = t.row_count(), cut = n * 4 / 5;
    auto fitted = tenon::fit_model<T>(t, p, range(0, cut), range(cut, n), s);
    tenon::model_file_options o;
    o.replay_rows = replay_rows;
    o.created_unix_seconds = 1700000000;
    return tenon::make_model_file(fitted, t, range(0, cut), s, o);
}

tenon::model_settings weak_settings() {
    tenon::model_settings s = deploy_test::small_settings(3);
    s.epochs = 1;
    s.learning_rate = 0.001;
    return s;
}

// The same table as CSV text, to add malformed rows to.
std::string csv_of(const tenon::table& t) {
    std::ostringstream out;
    out.precision(17);
    for (std::size_t k = 0; k < t.column_count(); ++k) out << (k ? "," : "") << t[k].name();
    out << "\n";
    for (std::size_t r = 0; r < t.row_count(); ++r) {
        for (std::size_t k = 0; k < t.column_count(); ++k) {
            const auto& c = t[k];
            out << (k ? "," : "");
            if (c.is_missing(r))
                out << "NA";
            else if (c.kind() == tenon::column_kind::categorical)
                out << c.category(r);
            else
                out << c.number(r);
        }
        out << "\n";
    }
    return out.str();
}

tenon::table csv_table(const std::string& text) {
    std::istringstream in(text);
    return tenon::read_csv(in, {}, "new.csv");
}

// A model file's outputs on prepared rows, computed here apart from the
// library's averaging: one network's values or class probabilities, or a
// seed ensemble's mean of them (summed in double, member by member).
template <class T>
std::vector<std::vector<double>> file_outputs(const tenon::model_file<T>& file, const tenon::matrix<T>& features) {
    const bool classify = file.plan->target_type() == tenon::target_kind::classification;
    std::vector<std::vector<double>> mean;
    const std::size_t members = 1 + file.members.size();
    for (std::size_t k = 0; k < members; ++k) {
        auto net = tenon::rebuild_member(file, k);
        const auto out = tenon::network_outputs(net, features);
        const std::size_t rows = out.shape()[0], cols = out.shape()[1];
        mean.resize(rows, std::vector<double>(cols, 0.0));
        for (std::size_t i = 0; i < rows; ++i) {
            double top = static_cast<double>(out(i, 0)), total = 0.0;
            for (std::size_t j = 1; j < cols; ++j) top = std::max(top, static_cast<double>(out(i, j)));
            for (std::size_t j = 0; j < cols; ++j) total += std::exp(static_cast<double>(out(i, j)) - top);
            for (std::size_t j = 0; j < cols; ++j)
                mean[i][j] += (classify ? std::exp(static_cast<double>(out(i, j)) - top) / total : static_cast<double>(out(i, j))) /
                    static_cast<double>(members);
        }
    }
    return mean;
}

// RMSE in kW of a power model (all its members) on all rows of `t`.
template <class T>
double power_rmse(const tenon::model_file<T>& file, const tenon::table& t) {
    const auto prepared = file.plan->template apply<T>(t, retrain_test::all_rows(t));
    const auto out = file_outputs(file, prepared.features);
    std::vector<double> truth, predicted;
    for (std::size_t i = 0; i < prepared.rows.size(); ++i) {
        truth.push_back(file.plan->restore_target(static_cast<double>(prepared.targets(i, 0))));
        predicted.push_back(file.plan->restore_target(out[i][0]));
    }
    return tenon::score_values(truth, predicted).rmse;
}

// The accuracy of a classification model on all rows of `t`, and the share
// of the most frequent class there: the accuracy of always guessing that
// class, the best any constant guess can do on these rows.
template <class T>
std::pair<double, double> accuracy_and_majority_share(const tenon::model_file<T>& file, const tenon::table& t) {
    const auto prepared = file.plan->template apply<T>(t, retrain_test::all_rows(t));
    const auto out = file_outputs(file, prepared.features);
    const std::size_t n = prepared.classes.size(), k = out.front().size();
    std::vector<std::size_t> counts(k, 0);
    std::size_t right = 0;
    for (std::size_t i = 0; i < n; ++i) {
        std::size_t best = 0;
        for (std::size_t j = 1; j < k; ++j)
            if (out[i][j] > out[i][best]) best = j;
        right += best == prepared.classes[i] ? 1 : 0;
        ++counts.at(prepared.classes[i]);
    }
    const double most = static_cast<double>(*std::max_element(counts.begin(), counts.end()));
    return {static_cast<double>(right) / static_cast<double>(n), most / static_cast<double>(n)};
}

// Pearson's (1900) statistic sum (O - E)^2 / E over inclusion counts.
double pearson(const std::vector<double>& observed, double expected) {
    double x = 0.0;
    for (double o : observed) x += (o - expected) * (o - expected) / expected;
    return x;
}

// The 0.999 quantile of the chi-square distribution with 19 degrees of
// freedom, computed by tests/chi_square.hpp (tables give 43.82, from memory;
// the test below checks that the two agree).
const double chi_square_19_999 = chi_square::upper_quantile(19, 0.001);

// A file system that fails renaming onto one path, for fault injection.
class failing_rename : public tenon::native_file_system {
public:
    explicit failing_rename(std::string target) : target_(std::move(target)) {}
    bool rename(const std::string& from, const std::string& to) override {
        if (to == target_) return false;
        return tenon::native_file_system::rename(from, to);
    }

private:
    std::string target_;
};

}  // namespace

// --- the reservoir ---------------------------------------------------------------------------

TEST_CASE("reservoir sampling keeps each item with equal probability (chi-square over seeded runs)") {
    CHECK(chi_square_19_999 == doctest::Approx(43.82).epsilon(1e-4));  // the tabulated value, to its digits
    const std::uint64_t population = 20;
    const int runs = 4000;
    SUBCASE("one slot: the inclusion counts are multinomial, Pearson's statistic is chi-square with 19 df") {
        std::vector<double> counts(population, 0.0);
        for (int run = 0; run < runs; ++run) {
            tenon::random_engine engine(static_cast<std::uint64_t>(run), tenon::replay_engine_stream);
            std::uint64_t held = 0;
            for (std::uint64_t t = 0; t < population; ++t)
                if (tenon::reservoir_slot(engine, t, 1) == 0) held = t;
            counts[static_cast<std::size_t>(held)] += 1.0;
        }
        const double x = pearson(counts, runs / 20.0);
        MESSAGE("k = 1: chi-square " << x << " (19 df, 0.999 quantile " << chi_square_19_999 << ")");
        CHECK(x < chi_square_19_999);
    }
    SUBCASE("five slots, filled over two trainings through the model file's reservoir state") {
        // Stage 1 samples rows 0..11 as make_model_file does; stage 2 offers
        // rows 12..19 as a retraining does. Each row's inclusion count is
        // binomial(R, p) with p = 5/20 and covariance -R p (1-p) / (N-1)
        // between rows (sampling without replacement), so Pearson's X times
        // (N - 1) / (N (1 - p)) is chi-square with N - 1 = 19 df
        // (derived from the covariance of the counts; Pearson 1900 for X).
        std::ostringstream csv;
        csv << "id\n";
        for (std::uint64_t i = 0; i < population; ++i) csv << i << "\n";
        const auto t = csv_table(csv.str());
        std::vector<double> counts(population, 0.0);
        for (int run = 0; run < runs; ++run) {
            tenon::replay_sample s = tenon::sample_replay_rows(t, range(0, 12), 5, static_cast<std::uint64_t>(run));
            // Through the file's bytes, as a device would between trainings.
            tenon::model_file<float> m;
            m.replay = s;
            s = *tenon::model_file_from_bytes<float>(tenon::model_file_to_bytes(m)).replay;
            tenon::extend_replay_sample(s, t, range(12, 20));
            REQUIRE(s.rows() == 5);
            CHECK(s.rows_seen == 20);
            for (const auto& cell : s.cells) counts[static_cast<std::size_t>(std::stoi(cell))] += 1.0;
        }
        const double p = 5.0 / 20.0;
        const double x = pearson(counts, runs * p) * (20.0 - 1.0) / (20.0 * (1.0 - p));
        MESSAGE("k = 5 over two stages: scaled chi-square " << x << " (19 df, 0.999 quantile " << chi_square_19_999 << ")");
        CHECK(x < chi_square_19_999);
        // The same check catches a sampler that always replaces a random
        // slot once full (it favours the latest rows).
        std::vector<double> biased(population, 0.0);
        for (int run = 0; run < runs; ++run) {
            tenon::random_engine engine(static_cast<std::uint64_t>(run));
            std::vector<std::uint64_t> held;
            for (std::uint64_t item = 0; item < population; ++item) {
                if (held.size() < 5)
                    held.push_back(item);
                else
                    held[static_cast<std::size_t>(engine.below(5))] = item;
            }
            for (auto h : held) biased[static_cast<std::size_t>(h)] += 1.0;
        }
        CHECK(pearson(biased, runs * p) * (20.0 - 1.0) / (20.0 * (1.0 - p)) > chi_square_19_999);
        // The first rows are not favoured over the later ones.
        double early = 0, late = 0;
        for (std::size_t i = 0; i < 12; ++i) early += counts[i];
        for (std::size_t i = 12; i < 20; ++i) late += counts[i];
        CHECK(early / 12.0 == doctest::Approx(late / 8.0).epsilon(0.05));
    }
}

TEST_CASE("extending a replay sample needs its reservoir state") {
    tenon::replay_sample s;
    s.columns = {"id"};
    s.kinds = {tenon::column_kind::numeric};
    const auto t = csv_table("id\n1\n");
    CHECK(code_of([&] { tenon::extend_replay_sample(s, t, {0}); }) == "core.argument.invalid");
}

// --- the gate --------------------------------------------------------------------------------

TEST_CASE("the gate promotes only a strictly better candidate, by at least the margin") {
    using tenon::gate_metric;
    // Equal scores are never promoted, with or without a margin.
    CHECK_FALSE(tenon::decide_promotion(gate_metric::accuracy, 0.9, 0.9, 0.0).promoted);
    CHECK_FALSE(tenon::decide_promotion(gate_metric::rmse, 1.5, 1.5, 0.0).promoted);
    CHECK(tenon::decide_promotion(gate_metric::rmse, 1.5, 1.5, 0.0).improvement == 0.0);
    // Higher accuracy, lower log loss and RMSE are better.
    CHECK(tenon::decide_promotion(gate_metric::accuracy, 0.90, 0.93, 0.02).promoted);
    CHECK(tenon::decide_promotion(gate_metric::log_loss, 0.40, 0.30, 0.05).promoted);
    CHECK(tenon::decide_promotion(gate_metric::rmse, 2.0, 1.0, 0.5).promoted);
    CHECK(tenon::decide_promotion(gate_metric::rmse, 2.0, 1.0, 0.5).improvement == doctest::Approx(1.0));
    CHECK_FALSE(tenon::decide_promotion(gate_metric::accuracy, 0.93, 0.90, 0.0).promoted);
    CHECK_FALSE(tenon::decide_promotion(gate_metric::rmse, 1.0, 2.0, 0.0).promoted);
    // Better, but by less than the margin.
    const auto small = tenon::decide_promotion(gate_metric::accuracy, 0.90, 0.91, 0.02);
    CHECK_FALSE(small.promoted);
    CHECK(small.reason.find("less than the margin") != std::string::npos);
    // Exactly the margin is enough ("at least").
    CHECK(tenon::decide_promotion(gate_metric::accuracy, 0.5, 0.75, 0.25).promoted);
    // A non-finite candidate never wins; a finite one beats a non-finite incumbent.
    CHECK_FALSE(tenon::decide_promotion(gate_metric::rmse, 1.0, std::nan(""), 0.0).promoted);
    CHECK(tenon::decide_promotion(gate_metric::rmse, std::nan(""), 1.0, 0.0).promoted);
    CHECK(code_of([] { tenon::decide_promotion(gate_metric::automatic, 1, 2, 0); }) == "deploy.retrain.option");
    CHECK(code_of([] { tenon::decide_promotion(gate_metric::rmse, 1, 2, -0.1); }) == "deploy.retrain.option");
    CHECK(tenon::parse_gate_metric("log_loss") == gate_metric::log_loss);
    CHECK(code_of([] { tenon::parse_gate_metric("f1"); }) == "deploy.retrain.option");
}

TEST_CASE_TEMPLATE("retraining: an equally good candidate is kept out, a clearly better one promoted", T, float, double) {
    const auto old_rows = retrain_test::pump_rows(300, 10);
    const auto incumbent = incumbent_of<T>(old_rows, deploy_test::condition_plan(), weak_settings());
    const auto new_rows = retrain_test::pump_rows(600, 11);

    SUBCASE("no training: the candidate is the incumbent, equally good, not promoted") {
        tenon::retraining_options o;
        o.epochs = 0;
        o.created_unix_seconds = 1;
        const auto r = tenon::retrain_model(incumbent, new_rows, o);
        CHECK(r.report.metric == "accuracy");
        CHECK(r.report.candidate_score == r.report.incumbent_score);
        CHECK_FALSE(r.report.promoted);
        CHECK(r.report.decision == "kept_incumbent");
        CHECK(r.report.reason.find("not better") != std::string::npos);
        CHECK(r.report.steps == 0);
    }
    SUBCASE("forty epochs on 600 new rows: clearly better, promoted") {
        tenon::retraining_options o;
        o.epochs = 40;
        o.learning_rate = 0.01;
        o.margin = 0.02;
        o.created_unix_seconds = 1;
        const auto r = tenon::retrain_model(incumbent, new_rows, o);
        MESSAGE("accuracy on the holdout: incumbent " << r.report.incumbent_score << ", candidate " << r.report.candidate_score);
        CHECK(r.report.promoted);
        CHECK(r.report.decision == "promoted");
        CHECK(r.report.candidate_score >= r.report.incumbent_score + 0.1);
        // The incumbent is weak on purpose (one epoch), so beating it says
        // little; the candidate must also clearly beat always guessing the
        // most frequent condition, on 1,000 rows it has never seen.
        const auto unseen = retrain_test::pump_rows(1000, 12);
        const auto [accuracy, majority] = accuracy_and_majority_share(r.candidate, unseen);
        MESSAGE("1,000 unseen rows: candidate accuracy " << accuracy << ", majority-class share " << majority);
        CHECK(accuracy >= majority + 0.1);
        CHECK(r.report.holdout_rows == 120);  // 20% of 600, more than the minimum of 30
        CHECK(r.report.replay_rows == 240);  // the incumbent's whole training split (fewer than 256)
        CHECK(r.report.new_training_rows == 480);
        CHECK(r.report.training_rows + r.report.validation_rows == 240 + 480);
        // The same options with log loss: also better, also promoted.
        o.metric = tenon::gate_metric::log_loss;
        o.margin = 0.05;
        const auto l = tenon::retrain_model(incumbent, new_rows, o);
        CHECK(l.report.metric == "log_loss");
        CHECK_FALSE(l.report.higher_is_better);
        CHECK(l.report.candidate_score < l.report.incumbent_score - 0.05);
        CHECK(l.report.promoted);
        // A margin larger than any possible gain keeps the incumbent.
        o.metric = tenon::gate_metric::accuracy;
        o.margin = 1.0;
        CHECK_FALSE(tenon::retrain_model(incumbent, new_rows, o).report.promoted);
    }
}

// --- a drifted process -----------------------------------------------------------------------

TEST_CASE("retraining on a drifted pump log promotes a model better on the new process and close on the old") {
    // The incumbent learned power [kW] from flow 20-120 m3/h, head 5-40 m,
    // an even fluid mix; then the process moves to flow 80-170, head 20-55
    // and 70% brine, partly outside what it has seen.
    tenon::plan p = deploy_test::power_plan();
    tenon::model_settings s;
    s.hidden = {32, 32};
    s.epochs = 150;
    s.batch_size = 32;
    s.learning_rate = 0.005;
    s.patience = 15;
    s.seed = 20;
    const auto old_rows = retrain_test::pump_rows(800, 20);
    const auto incumbent = incumbent_of<float>(old_rows, p, s);
    const auto new_rows = retrain_test::pump_rows(800, 21, retrain_test::drifted());
    const auto old_test = retrain_test::pump_rows(500, 23), new_test = retrain_test::pump_rows(500, 22, retrain_test::drifted());

    const auto drift_before = tenon::measure_drift(incumbent.references, new_rows);
    MESSAGE("drift of the new rows against the incumbent's training rows:\n" << tenon::drift_table(drift_before));
    CHECK(drift_before.drifted_count() == 3);

    tenon::retraining_options o;
    o.epochs = 150;
    o.patience = 15;
    o.seed = 1;
    o.created_unix_seconds = 1700000100;
    const auto r = tenon::retrain_model(incumbent, new_rows, o);
    const double incumbent_new = power_rmse(incumbent, new_test), candidate_new = power_rmse(r.candidate, new_test);
    const double incumbent_old = power_rmse(incumbent, old_test), candidate_old = power_rmse(r.candidate, old_test);
    MESSAGE("gate (holdout of " << r.report.holdout_rows << " new rows): RMSE incumbent " << r.report.incumbent_score << " kW, candidate "
                                << r.report.candidate_score << " kW -> " << r.report.decision);
    MESSAGE("new process (500 unseen rows): RMSE incumbent " << incumbent_new << " kW, candidate " << candidate_new << " kW");
    MESSAGE("old process (500 unseen rows): RMSE incumbent " << incumbent_old << " kW, candidate " << candidate_old << " kW");
    MESSAGE("trained on " << r.report.training_rows << " rows (" << r.report.replay_rows << " replay + new), " << r.report.epochs_run
                          << " epochs, stop: " << r.report.stop_reason);
    CHECK(r.report.promoted);
    CHECK(r.report.metric == "rmse");
    CHECK(r.report.replay_rows == 256);
    CHECK(candidate_new < 0.5 * incumbent_new);
    // Stated tolerance on the old process: at most 0.1 kW worse in RMSE
    // (powers there run from about 0.5 to 28 kW; the replay sample keeps 256
    // old rows in training).
    CHECK(candidate_old <= incumbent_old + 0.1);

    // The candidate's references describe what it was trained on, so the
    // new process drifts much less against them.
    const auto drift_after = tenon::measure_drift(r.candidate.references, new_test);
    MESSAGE("drift of new rows against the candidate's training rows:\n" << tenon::drift_table(drift_after));
    CHECK(drift_after.feature("flow").psi < 0.5 * drift_before.feature("flow").psi);
    CHECK(drift_after.feature("fluid").psi < 0.25);
    MESSAGE("report JSON: " << tenon::to_json(r.report));
}

// --- the rows: frozen plan, holdout, replay --------------------------------------------------

TEST_CASE("the plan stays frozen and rows it cannot encode are refused and counted") {
    const auto old_rows = retrain_test::pump_rows(200, 30);
    const auto incumbent = incumbent_of<float>(old_rows, deploy_test::condition_plan(), weak_settings());
    std::string text = csv_of(retrain_test::pump_rows(100, 31));
    text += "50,10,oil,3,ok\n";  // a fluid never seen (policy: fail)
    text += "60,12,water,3,leaking\n";  // a class the model has no output for
    text += "70,14,water,3,NA\n";  // no target
    text += "80,NA,water,3,ok\n";  // a missing head without a fill
    text += "90,abc,water,3,ok\n";  // not a number (makes the head column text)
    const auto new_rows = csv_table(text);
    REQUIRE(new_rows.at("head").kind() == tenon::column_kind::categorical);
    tenon::retraining_options o;
    o.epochs = 2;
    o.created_unix_seconds = 1;
    const auto r = tenon::retrain_model(incumbent, new_rows, o);
    CHECK(r.report.new_rows == 105);
    CHECK(r.report.new_rows_refused == 5);
    CHECK(r.report.refused_unseen_category == 1);
    CHECK(r.report.refused_unseen_class == 1);
    CHECK(r.report.refused_missing_target == 1);
    CHECK(r.report.refused_missing_value == 1);
    CHECK(r.report.refused_not_numeric == 1);
    CHECK(r.report.holdout_rows + r.report.new_training_rows == 100);
    REQUIRE(r.candidate.plan);
    CHECK(r.candidate.plan->to_bytes() == incumbent.plan->to_bytes());
    CHECK(r.candidate.architecture == incumbent.architecture);

    // With the all-zeros policy an unseen fluid is encoded as stored, not refused.
    tenon::plan lenient = deploy_test::condition_plan();
    tenon::feature_steps steps;
    steps.unseen = tenon::unseen_policy::all_zero;
    lenient.set_default_steps(steps);
    const auto incumbent2 = incumbent_of<float>(old_rows, lenient, weak_settings());
    const auto r2 = tenon::retrain_model(incumbent2, csv_table(csv_of(retrain_test::pump_rows(100, 31)) + "50,10,oil,3,ok\n"), o);
    CHECK(r2.report.new_rows_refused == 0);
    CHECK(r2.report.holdout_rows + r2.report.new_training_rows == 101);
}

TEST_CASE("the holdout is kept out of training and out of the replay sample") {
    const auto old_rows = retrain_test::pump_rows(200, 40);
    const auto incumbent = incumbent_of<float>(old_rows, deploy_test::condition_plan(), weak_settings(), 64);
    REQUIRE(incumbent.replay);
    CHECK(incumbent.replay->rows_seen == 160);
    CHECK(incumbent.replay->capacity == 64);
    const auto new_rows = retrain_test::pump_rows(300, 41);
    tenon::retraining_options o;
    o.epochs = 2;
    o.holdout = tenon::holdout_selection::latest;
    o.min_holdout_rows = 80;  // more than 20% of 300
    o.created_unix_seconds = 1;
    const auto r = tenon::retrain_model(incumbent, new_rows, o);
    CHECK(r.report.holdout_rows == 80);
    CHECK(r.report.new_training_rows == 220);
    CHECK(r.report.replay_rows == 64);
    CHECK(r.report.training_rows + r.report.validation_rows == 64 + 220);
    REQUIRE(r.candidate.metadata);
    CHECK(r.candidate.metadata->training_rows == r.report.training_rows);
    REQUIRE(r.candidate.replay);
    CHECK(r.candidate.replay->rows() == 64);
    CHECK(r.candidate.replay->capacity == 64);
    CHECK(r.candidate.replay->rows_seen == 160 + 220);
    CHECK(r.report.replay_rows_seen_after == 380);
    // The latest 80 rows are the holdout: none of their flows is in the sample.
    std::set<std::string> holdout_flows;
    const auto& flow = new_rows.at("flow");
    for (std::size_t i = 220; i < 300; ++i) holdout_flows.insert(tenon::number_to_text(flow.number(i)));
    std::size_t new_in_sample = 0;
    std::set<std::string> new_flows;
    for (std::size_t i = 0; i < 220; ++i) new_flows.insert(tenon::number_to_text(flow.number(i)));
    for (std::uint64_t i = 0; i < r.candidate.replay->rows(); ++i) {
        const std::string& cell = r.candidate.replay->cells[static_cast<std::size_t>(i) * r.candidate.replay->columns.size()];
        CHECK(holdout_flows.count(cell) == 0);
        new_in_sample += new_flows.count(cell);
    }
    // About 220/380 of the sample comes from the new rows (58%, 37 of 64).
    CHECK(new_in_sample > 20);
    CHECK(new_in_sample < 55);

    // A smaller capacity subsamples; a larger one cannot stay uniform.
    o.replay_capacity = 16;
    CHECK(tenon::retrain_model(incumbent, new_rows, o).candidate.replay->rows() == 16);
    o.replay_capacity = 100;
    CHECK(code_of([&] { tenon::retrain_model(incumbent, new_rows, o); }) == "deploy.retrain.option");
}

TEST_CASE("the version-1 fixture, written before the reservoir state existed, is retrained") {
    const std::string path = std::string(TENON_SOURCE_DIR) + "/tests/fixtures/deploy/pump_v1_float.tnm";
    const auto fixture = tenon::load_model_file<float>(path);
    REQUIRE(fixture.replay);
    CHECK(fixture.replay->rows_seen == 0);  // no RSVR section
    REQUIRE(fixture.metadata);
    const auto trained = fixture.metadata->training_rows;
    CHECK(trained > fixture.replay->rows());
    tenon::retraining_options o;
    o.epochs = 3;
    o.created_unix_seconds = 1;
    const auto r = tenon::retrain_model(fixture, retrain_test::pump_rows(200, 50), o);
    CHECK(r.report.replay_rows == fixture.replay->rows());
    // The sample was full: it keeps its size and continues counting.
    CHECK(r.candidate.replay->capacity == fixture.replay->rows());
    CHECK(r.candidate.replay->rows() == fixture.replay->rows());
    CHECK(r.candidate.replay->rows_seen == trained + r.report.new_training_rows);
    // The candidate's file, with its RSVR section, round-trips.
    const auto back = tenon::model_file_from_bytes<float>(tenon::model_file_to_bytes(r.candidate));
    CHECK(back.replay->rows_seen == r.candidate.replay->rows_seen);
    CHECK(back.skipped_sections.empty());
}

// --- the clock -------------------------------------------------------------------------------

TEST_CASE("the wall-clock budget is read from the injected clock") {
    const auto old_rows = retrain_test::pump_rows(200, 60);
    const auto incumbent = incumbent_of<double>(old_rows, deploy_test::condition_plan(), weak_settings());
    const auto new_rows = retrain_test::pump_rows(300, 61);
    double now = 0.0;
    tenon::retraining_options o;
    o.epochs = 1000;
    o.patience = 0;
    o.time_budget_seconds = 50.0;
    o.created_unix_seconds = 1;
    o.clock = [&now] { return now += 1.0; };  // every reading advances one second
    const auto r = tenon::retrain_model(incumbent, new_rows, o);
    CHECK(r.report.stop_reason == "time_budget");
    CHECK(r.report.epochs_run < 1000);
    CHECK(r.report.steps > 0);
    CHECK(r.report.seconds >= 50.0);
    CHECK(r.report.seconds < 60.0);
    CHECK(r.report.time_budget_seconds == 50.0);

    // A budget spent before training begins: no steps, the incumbent stays.
    o.clock = [&now] { return now += 100.0; };
    const auto late = tenon::retrain_model(incumbent, new_rows, o);
    CHECK(late.report.stop_reason == "time_budget");
    CHECK(late.report.steps == 0);
    CHECK_FALSE(late.report.promoted);
}

// --- files -----------------------------------------------------------------------------------

TEST_CASE("a retrained model's metadata describe its own weights; earlier trainings are kept as history (section HIST)") {
    const auto old_rows = retrain_test::pump_rows(300, 80);
    auto incumbent = incumbent_of<float>(old_rows, deploy_test::condition_plan(), weak_settings());
    REQUIRE(incumbent.metadata);
    incumbent.metadata->metrics.emplace_back("test_accuracy", 0.75);  // as the tool adds
    incumbent.metadata->settings.emplace_back("data", "history.csv");
    incumbent.metadata->settings.emplace_back("target", "condition");
    CHECK(incumbent.history.empty());
    const auto no_history = tenon::model_file_to_bytes(incumbent);
    for (const auto& sec : tenon::inspect_model_bytes(no_history).sections) CHECK(sec.id != "HIST");

    // Rows read from a file carry its name into the candidate's metadata.
    const auto new_text = csv_of(retrain_test::pump_rows(400, 81));
    std::istringstream in(new_text);
    const tenon::table new_rows = tenon::read_csv(in, {}, "/plant/logs/week12.csv");
    tenon::retraining_options o;
    o.epochs = 2;
    o.created_unix_seconds = 1700000100;
    const auto first = tenon::retrain_model(incumbent, new_rows, o);
    REQUIRE(first.candidate.metadata);
    const tenon::training_metadata& m = *first.candidate.metadata;
    CHECK(std::isnan(m.metric("test_accuracy")));
    CHECK(m.metric("gate_candidate_score") == first.report.candidate_score);
    CHECK(m.metric("new_training_rows") == static_cast<double>(first.report.new_training_rows));
    CHECK(m.metric("replay_training_rows") == static_cast<double>(first.report.replay_rows));
    CHECK(m.training_rows == first.report.training_rows);
    const auto setting = [](const tenon::training_metadata& t, const std::string& key) {
        for (const auto& kv : t.settings)
            if (kv.first == key) return kv.second;
        return std::string("(absent)");
    };
    CHECK(setting(m, "data") == "week12.csv");
    CHECK(setting(m, "origin") == "retraining");
    CHECK(setting(m, "target") == "condition");
    REQUIRE(first.candidate.history.size() == 1);
    CHECK(first.candidate.history[0].metric("test_accuracy") == 0.75);
    CHECK(setting(first.candidate.history[0], "data") == "history.csv");

    // Round trip through bytes; a second retraining appends, oldest first.
    const auto bytes = tenon::model_file_to_bytes(first.candidate);
    const auto loaded = tenon::model_file_from_bytes<float>(bytes);
    REQUIRE(loaded.history.size() == 1);
    CHECK(loaded.history[0].created_unix_seconds == 1700000000);
    CHECK(loaded.history[0].settings == first.candidate.history[0].settings);
    CHECK(loaded.history[0].metrics.size() == first.candidate.history[0].metrics.size());
    CHECK(tenon::inspect_model_bytes(bytes).history.size() == 1);
    CHECK(tenon::model_file_to_bytes(loaded) == bytes);
    o.created_unix_seconds = 1700000200;
    const auto second = tenon::retrain_model(loaded, new_rows, o);
    REQUIRE(second.candidate.history.size() == 2);
    CHECK(second.candidate.history[0].created_unix_seconds == 1700000000);
    CHECK(second.candidate.history[1].created_unix_seconds == 1700000100);
    CHECK(second.candidate.metadata->metric("retrainings") == 2.0);
    o.history_limit = 1;  // the most recent only
    const auto limited = tenon::retrain_model(loaded, new_rows, o);
    REQUIRE(limited.candidate.history.size() == 1);
    CHECK(limited.candidate.history[0].created_unix_seconds == 1700000100);

    // A damaged HIST is refused like any section.
    auto damaged = bytes;
    for (const auto& sec : tenon::inspect_model_bytes(bytes).sections)
        if (sec.id == "HIST") damaged[static_cast<std::size_t>(sec.offset)] ^= 0x01;
    CHECK(code_of([&] { tenon::model_file_from_bytes<float>(damaged); }) == "deploy.model.checksum");
}

TEST_CASE("promotion keeps the previous file for rollback; no promotion writes nothing") {
    const auto old_rows = retrain_test::pump_rows(300, 70);
    const auto incumbent = incumbent_of<float>(old_rows, deploy_test::condition_plan(), weak_settings());
    const std::string path = temp_path("model.tnm"), previous = path + ".previous";
    std::remove(previous.c_str());
    tenon::save_model_file(path, incumbent);
    const auto original = file_bytes(path);
    const auto new_rows = retrain_test::pump_rows(600, 71);

    tenon::retraining_options kept;
    kept.epochs = 0;
    const auto k = tenon::retrain_model_file(path, new_rows, kept);
    CHECK_FALSE(k.promoted);
    CHECK_FALSE(k.file_written);
    CHECK(file_bytes(path) == original);
    CHECK_FALSE(file_exists(previous));

    tenon::retraining_options better;
    better.epochs = 40;
    better.learning_rate = 0.01;
    better.created_unix_seconds = 1;
    // A failure writing the candidate leaves the incumbent in place.
    failing_rename faulty(path);
    CHECK(code_of([&] { tenon::retrain_model_file(path, new_rows, better, "", faulty); }) == "deploy.file.io");
    CHECK(file_bytes(path) == original);

    const auto p = tenon::retrain_model_file(path, new_rows, better);
    CHECK(p.promoted);
    CHECK(p.file_written);
    CHECK(p.model_path == path);
    CHECK(p.rollback_path == previous);
    CHECK(file_bytes(previous) == original);
    const auto now = tenon::load_model_file<float>(path);
    REQUIRE(now.metadata);
    CHECK(now.metadata->metric("gate_candidate_score") == doctest::Approx(p.candidate_score));
    CHECK(now.metadata->metric("retrainings") == 1.0);
    CHECK(file_bytes(path) != original);

    tenon::roll_back_model_file(path);
    CHECK(file_bytes(path) == original);
    CHECK(file_exists(previous));

    // The incumbent kept after an earlier promotion: the rollback file left
    // by that promotion is not touched either (README, "Retraining").
    std::ofstream(previous, std::ios::binary | std::ios::trunc) << "left by an earlier promotion";
    const auto k2 = tenon::retrain_model_file(path, new_rows, kept);
    CHECK_FALSE(k2.promoted);
    CHECK_FALSE(k2.file_written);
    CHECK(file_bytes(path) == original);
    const auto left = file_bytes(previous);
    CHECK(std::string(left.begin(), left.end()) == "left by an earlier promotion");

    // A rollback path of the caller's choice.
    const std::string elsewhere = temp_path("kept.tnm");
    const auto q = tenon::retrain_model_file(path, new_rows, better, elsewhere);
    CHECK(q.rollback_path == elsewhere);
    CHECK(file_bytes(elsewhere) == original);
    tenon::roll_back_model_file(path, elsewhere);
    CHECK(file_bytes(path) == original);
    CHECK(code_of([&] { tenon::roll_back_model_file(path, temp_path("none.tnm")); }) == "deploy.file.io");
    const std::string junk = temp_path("junk.tnm");
    std::ofstream(junk) << "not a model";
    CHECK(code_of([&] { tenon::roll_back_model_file(path, junk); }) == "deploy.model.magic");
    CHECK(file_bytes(path) == original);
    for (const auto& f : {path, previous, elsewhere, junk}) std::remove(f.c_str());
}

// --- errors and the report -------------------------------------------------------------------

TEST_CASE("retraining errors: options, too few rows, a missing column, no plan") {
    const auto old_rows = retrain_test::pump_rows(200, 80);
    const auto incumbent = incumbent_of<float>(old_rows, deploy_test::condition_plan(), weak_settings());
    const auto new_rows = retrain_test::pump_rows(100, 81);
    const auto with = [&](auto change) {
        tenon::retraining_options o;
        o.epochs = 1;
        change(o);
        return code_of([&] { tenon::retrain_model(incumbent, new_rows, o); });
    };
    CHECK(with([](tenon::retraining_options& o) { o.margin = -0.1; }) == "deploy.retrain.option");
    CHECK(with([](tenon::retraining_options& o) { o.holdout_share = 0.0; }) == "deploy.retrain.option");
    CHECK(with([](tenon::retraining_options& o) { o.holdout_share = 1.0; }) == "deploy.retrain.option");
    CHECK(with([](tenon::retraining_options& o) { o.min_holdout_rows = 0; }) == "deploy.retrain.option");
    CHECK(with([](tenon::retraining_options& o) { o.validation_share = 1.0; }) == "deploy.retrain.option");
    CHECK(with([](tenon::retraining_options& o) { o.batch_size = 0; }) == "deploy.retrain.option");
    CHECK(with([](tenon::retraining_options& o) { o.learning_rate = 0.0; }) == "deploy.retrain.option");
    CHECK(with([](tenon::retraining_options& o) { o.time_budget_seconds = -1.0; }) == "deploy.retrain.option");
    CHECK(with([](tenon::retraining_options& o) { o.metric = tenon::gate_metric::rmse; }) == "deploy.retrain.option");
    CHECK(with([](tenon::retraining_options& o) { o.min_holdout_rows = 100; }) == "deploy.retrain.too_few_rows");
    CHECK(with([](tenon::retraining_options&) {}) == "no error");

    CHECK(code_of([&] { tenon::retrain_model(incumbent, csv_table("flow,fluid,condition\n1,water,ok\n")); }) == "deploy.input.missing_column");
    auto no_plan = incumbent;
    no_plan.plan.reset();
    CHECK(code_of([&] { tenon::retrain_model(no_plan, new_rows); }) == "deploy.model.missing_section");
    // Rows that are all refused leave too few.
    CHECK(code_of([&] { tenon::retrain_model(incumbent, csv_table("flow,head,fluid,condition\n1,2,oil,ok\n")); }) == "deploy.retrain.too_few_rows");
}

TEST_CASE("the retraining report serializes to JSON") {
    const auto old_rows = retrain_test::pump_rows(200, 90);
    const auto incumbent = incumbent_of<float>(old_rows, deploy_test::condition_plan(), weak_settings());
    tenon::retraining_options o;
    o.epochs = 0;
    o.created_unix_seconds = 1;
    const auto r = tenon::retrain_model(incumbent, retrain_test::pump_rows(100, 91), o);
    const std::string json = tenon::to_json(r.report);
    CHECK(json.front() == '{');
    CHECK(json.back() == '}');
    CHECK(json.find("\"promoted\": false") != std::string::npos);
    CHECK(json.find("\"decision\": \"kept_incumbent\"") != std::string::npos);
    CHECK(json.find("\"metric\": \"accuracy\"") != std::string::npos);
    CHECK(json.find("\"holdout\": 30") != std::string::npos);
    CHECK(json.find("\"incumbent_score\": " + tenon::detail::json_number(r.report.incumbent_score)) != std::string::npos);
    CHECK(json.find("\"model_path\": \"\"") != std::string::npos);
    CHECK(json.find("nan") == std::string::npos);
}

// --- calibration (issue 20) ------------------------------------------------------------------

TEST_CASE("retraining recalibrates the candidate on its validation rows and reports both models' coverage on the holdout") {
    const auto old_rows = retrain_test::pump_rows(400, 40);
    auto incumbent = incumbent_of<float>(old_rows, deploy_test::condition_plan(), deploy_test::small_settings(4));
    tenon::fitted_model<float> refit =
        tenon::fit_model<float>(old_rows, deploy_test::condition_plan(), range(0, 320), range(320, 400), deploy_test::small_settings(4));
    incumbent.calibration = tenon::calibrate_model(refit, old_rows, range(320, 400), 0.8);  // the same weights: same seed and rows
    const auto new_rows = retrain_test::pump_rows(400, 41);
    tenon::retraining_options o;
    o.epochs = 3;
    o.seed = 2;
    const auto r = tenon::retrain_model(incumbent, new_rows, o);
    CHECK(r.report.coverage_measure == "class_set");
    CHECK(r.report.nominal_coverage == 0.8);  // the incumbent's
    CHECK(r.report.incumbent_coverage >= 0.0);
    CHECK(r.report.incumbent_coverage <= 1.0);
    CHECK(r.report.incumbent_width >= 1.0);  // a set holds at least the predicted class
    REQUIRE(r.candidate.calibration);
    REQUIRE(r.candidate.calibration->classes);
    CHECK(r.candidate.calibration->classes->coverage == 0.8);
    CHECK(r.candidate.calibration->classes->rows == r.report.validation_rows);
    // The report's candidate coverage is the library's score of the stored calibration on the holdout.
    CHECK(std::isfinite(r.report.candidate_coverage));
    CHECK(r.candidate.metadata->metric("gate_candidate_coverage") == r.report.candidate_coverage);
    CHECK(tenon::to_json(r.report).find("\"calibration\": {\"measure\": \"class_set\", \"nominal_coverage\": 0.8") != std::string::npos);

    // An incumbent without calibration: its coverage is not known; a coverage option overrides the default.
    incumbent.calibration.reset();
    o.coverage = 0.95;
    const auto u = tenon::retrain_model(incumbent, new_rows, o);
    CHECK(std::isnan(u.report.incumbent_coverage));
    CHECK(u.report.nominal_coverage == 0.95);
    REQUIRE(u.candidate.calibration);
    CHECK(u.candidate.calibration->classes->coverage == 0.95);
    // No validation rows: no calibration for the candidate.
    o.validation_share = 0.0;
    const auto v = tenon::retrain_model(incumbent, new_rows, o);
    CHECK_FALSE(v.candidate.calibration);
    CHECK(std::isnan(v.report.candidate_coverage));
    o.coverage = 1.0;
    CHECK_THROWS_WITH_AS(tenon::retrain_model(incumbent, new_rows, o), doctest::Contains("[deploy.retrain.option]"), tenon::error);
}

// --- seed ensembles (issue 19) ---------------------------------------------------------------

namespace {

// The weights of member k of a model file (0: the network of WGHT).
template <class T>
const std::vector<tenon::named_matrix<T>>& member_weights(const tenon::model_file<T>& file, std::size_t k) {
    return k == 0 ? file.weights : file.members.at(k - 1);
}

// The file with member k alone as its one network.
template <class T>
tenon::model_file<T> member_alone(const tenon::model_file<T>& file, std::size_t k) {
    tenon::model_file<T> one = file;
    one.weights = member_weights(file, k);
    one.members.clear();
    return one;
}

template <class T>
bool same_weights(const std::vector<tenon::named_matrix<T>>& a, const std::vector<tenon::named_matrix<T>>& b) {
    if (a.size() != b.size()) return false;
    for (std::size_t i = 0; i < a.size(); ++i) {
        if (a[i].name != b[i].name || a[i].values.size() != b[i].values.size()) return false;
        if (std::memcmp(a[i].values.data(), b[i].values.data(), a[i].values.size() * sizeof(T)) != 0) return false;
    }
    return true;
}

std::string setting_of(const tenon::training_metadata& m, const std::string& key) {
    for (const auto& kv : m.settings)
        if (kv.first == key) return kv.second;
    return "(none)";
}

// RMSE in kW of a power model (all its members, averaged here) on `rows` of `t`.
template <class T>
double power_rmse_on(const tenon::model_file<T>& file, const tenon::table& t, const std::vector<std::size_t>& rows) {
    const auto prepared = file.plan->template apply<T>(t, rows);
    const auto out = file_outputs(file, prepared.features);
    std::vector<double> truth, predicted;
    for (std::size_t i = 0; i < prepared.rows.size(); ++i) {
        truth.push_back(file.plan->restore_target(static_cast<double>(prepared.targets(i, 0))));
        predicted.push_back(file.plan->restore_target(out[i][0]));
    }
    return tenon::score_values(truth, predicted).rmse;
}

}  // namespace

TEST_CASE("retraining a seed ensemble continues every member, each as if retrained alone, with the same bits on 1 and 2 threads") {
    const auto old_rows = retrain_test::pump_rows(300, 60);
    tenon::model_settings s = deploy_test::small_settings(5);
    s.ensemble = 3;
    const auto incumbent = incumbent_of<float>(old_rows, deploy_test::condition_plan(), s);
    REQUIRE(incumbent.members.size() == 2);
    const auto new_rows = retrain_test::pump_rows(400, 61);
    tenon::retraining_options o;
    o.epochs = 6;
    o.seed = 3;
    o.created_unix_seconds = 1;
    const auto r = tenon::retrain_model(incumbent, new_rows, o);
    CHECK(r.report.members == 3);
    CHECK(tenon::to_json(r.report).find("\"training\": {\"members\": 3, ") != std::string::npos);
    REQUIRE(r.candidate.members.size() == 2);  // an ensemble of the same size
    REQUIRE(r.candidate.metadata);
    CHECK(setting_of(*r.candidate.metadata, "ensemble") == "3");
    // Every member trained, each to weights of its own.
    for (std::size_t k = 0; k < 3; ++k) {
        CAPTURE(k);
        CHECK_FALSE(same_weights(member_weights(r.candidate, k), member_weights(incumbent, k)));
        CHECK_FALSE(same_weights(member_weights(r.candidate, k), member_weights(r.candidate, (k + 1) % 3)));
    }
    // The written file holds all three.
    const auto reloaded = tenon::model_file_from_bytes<float>(tenon::model_file_to_bytes(r.candidate));
    REQUIRE(reloaded.members.size() == 2);
    CHECK(same_weights(reloaded.members[1], r.candidate.members[1]));

    // Member k is what retraining it alone gives on the same rows (the same
    // `seed`) with its own training seed, derived as fit_model derives it.
    for (std::size_t k = 0; k < 3; ++k) {
        CAPTURE(k);
        tenon::retraining_options alone = o;
        alone.training_seed = o.seed + static_cast<std::uint64_t>(k) * 0x9E3779B97F4A7C15ull;
        const auto a = tenon::retrain_model(member_alone(incumbent, k), new_rows, alone);
        CHECK(a.report.members == 1);
        CHECK(a.candidate.members.empty());
        CHECK(a.report.training_rows == r.report.training_rows);
        CHECK(same_weights(a.candidate.weights, member_weights(r.candidate, k)));
        // The report records the seeds the call used.
        CHECK(a.report.seed == o.seed);
        CHECK(a.report.training_seed == *alone.training_seed);
    }
    CHECK(r.report.seed == o.seed);
    CHECK(r.report.training_seed == o.seed);  // no training_seed: the batch order's is `seed`
    // Without training_seed the second member would train with member 0's seed: other weights.
    const auto unseeded = tenon::retrain_model(member_alone(incumbent, 1), new_rows, o);
    CHECK_FALSE(same_weights(unseeded.candidate.weights, member_weights(r.candidate, 1)));

    // On two threads the members train side by side: the same bits.
    o.threads = 2;
    const auto two = tenon::retrain_model(incumbent, new_rows, o);
    for (std::size_t k = 0; k < 3; ++k) CHECK(same_weights(member_weights(two.candidate, k), member_weights(r.candidate, k)));
    CHECK(deploy_test::same_bits(two.report.candidate_score, r.report.candidate_score));
    CHECK(two.report.steps == r.report.steps);
    REQUIRE(two.candidate.calibration);
    REQUIRE(r.candidate.calibration);
    CHECK(deploy_test::same_bits(two.candidate.calibration->classes->temperature, r.candidate.calibration->classes->temperature));
    CHECK(two.report.promoted == r.report.promoted);
    o.threads = 0;
    CHECK(code_of([&] { tenon::retrain_model(incumbent, new_rows, o); }) == "deploy.retrain.option");
}

TEST_CASE("the gate scores an ensemble on its members' mean, and the candidate's band scales with their spread") {
    const auto old_rows = retrain_test::pump_rows(300, 70);
    tenon::model_settings s = deploy_test::small_settings(8);
    s.ensemble = 3;
    const auto incumbent = incumbent_of<float>(old_rows, deploy_test::power_plan(), s);
    REQUIRE(incumbent.members.size() == 2);
    const auto new_rows = retrain_test::pump_rows(300, 71, retrain_test::drifted());
    tenon::retraining_options o;
    o.epochs = 8;
    o.seed = 4;
    o.holdout = tenon::holdout_selection::latest;
    o.created_unix_seconds = 1;
    const auto r = tenon::retrain_model(incumbent, new_rows, o);
    REQUIRE(r.report.holdout_rows == 60);  // 20% of 300: the last 60 rows
    const auto holdout = range(240, 300);
    const double incumbent_mean = power_rmse_on(incumbent, new_rows, holdout), candidate_mean = power_rmse_on(r.candidate, new_rows, holdout);
    const double incumbent_first = power_rmse_on(member_alone(incumbent, 0), new_rows, holdout);
    const double candidate_first = power_rmse_on(member_alone(r.candidate, 0), new_rows, holdout);
    MESSAGE("holdout RMSE, mean of 3 (member 0 alone): incumbent " << incumbent_mean << " (" << incumbent_first << "), candidate " << candidate_mean
                                                                   << " (" << candidate_first << ")");
    // The reported scores are the mean's (float outputs averaged in another
    // order here: a relative tolerance of 1e-5), not member 0's.
    CHECK(r.report.incumbent_score == doctest::Approx(incumbent_mean).epsilon(1e-5));
    CHECK(r.report.candidate_score == doctest::Approx(candidate_mean).epsilon(1e-5));
    CHECK(std::abs(incumbent_first - incumbent_mean) > 1e-3 * incumbent_mean);
    CHECK(std::abs(candidate_first - candidate_mean) > 1e-3 * candidate_mean);
    CHECK(r.report.improvement == doctest::Approx(incumbent_mean - candidate_mean).epsilon(1e-5));

    // Calibrated as calibrate_model calibrates an ensemble: a band in its
    // normalized form, scaled by the members' spread; one network has none.
    REQUIRE(r.candidate.calibration);
    REQUIRE(r.candidate.calibration->interval);
    CHECK(r.candidate.calibration->interval->has_spread);
    CHECK(r.candidate.calibration->interval->rows == r.report.validation_rows);
    const auto one = tenon::retrain_model(member_alone(incumbent, 0), new_rows, o);
    REQUIRE(one.candidate.calibration);
    CHECK_FALSE(one.candidate.calibration->interval->has_spread);
    // The ensemble's report gives its bands' coverage on the holdout: the
    // library's score of the stored calibration there.
    CHECK(r.report.candidate_coverage >= 0.0);
    CHECK(r.report.candidate_coverage <= 1.0);
    CHECK(r.report.candidate_width > 0.0);
}

TEST_CASE("under a time budget every member of an ensemble gets its share and the call stays within the budget") {
    const auto old_rows = retrain_test::pump_rows(200, 62);
    tenon::model_settings s = deploy_test::small_settings(6);
    s.ensemble = 3;
    const auto incumbent = incumbent_of<double>(old_rows, deploy_test::condition_plan(), s);
    REQUIRE(incumbent.members.size() == 2);
    const auto new_rows = retrain_test::pump_rows(300, 63);
    double now = 0.0;
    tenon::retraining_options o;
    o.epochs = 1000;
    o.patience = 0;
    o.time_budget_seconds = 90.0;
    o.created_unix_seconds = 1;
    o.clock = [&now] { return now += 1.0; };  // every reading advances one second
    const auto r = tenon::retrain_model(incumbent, new_rows, o);
    CHECK(r.report.stop_reason == "time_budget");
    CHECK(r.report.steps > 0);
    CHECK(r.report.seconds >= 90.0);
    CHECK(r.report.seconds < 100.0);
    // The first member had a third of the budget, not all of it, so the others trained too.
    CHECK(r.report.training_seconds > 60.0);  // all three members' training, by the injected clock
    for (std::size_t k = 0; k < 3; ++k) {
        CAPTURE(k);
        CHECK_FALSE(same_weights(member_weights(r.candidate, k), member_weights(incumbent, k)));
    }
}

TEST_CASE("retraining goes on with the model's decoupled weight decay and records it") {
    const auto old_rows = retrain_test::pump_rows(300, 62);
    tenon::model_settings s = deploy_test::small_settings(5);
    s.update = tenon::update_kind::adam;
    s.weight_decay = 0.05;  // AdamW (Loshchilov & Hutter 2019)
    const auto incumbent = incumbent_of<float>(old_rows, deploy_test::condition_plan(), s);
    REQUIRE(incumbent.metadata);
    CHECK(std::stod(setting_of(*incumbent.metadata, "weight_decay")) == 0.05);
    const auto new_rows = retrain_test::pump_rows(400, 63);
    tenon::retraining_options o;
    o.epochs = 4;
    o.seed = 3;
    o.created_unix_seconds = 1;
    const auto stored = tenon::retrain_model(incumbent, new_rows, o);
    REQUIRE(stored.candidate.metadata);
    CHECK(std::stod(setting_of(*stored.candidate.metadata, "weight_decay")) == 0.05);
    // The stored decay is the one given explicitly: the same bits.
    o.weight_decay = 0.05;
    CHECK(same_weights(tenon::retrain_model(incumbent, new_rows, o).candidate.weights, stored.candidate.weights));
    // Without it, other weights (the decay was applied).
    o.weight_decay = 0.0;
    const auto none = tenon::retrain_model(incumbent, new_rows, o);
    CHECK(std::stod(setting_of(*none.candidate.metadata, "weight_decay")) == 0.0);
    CHECK_FALSE(same_weights(none.candidate.weights, stored.candidate.weights));
    // A rule without decoupled decay keeps none unless one is asked for, which it refuses.
    o.weight_decay.reset();
    o.update = tenon::update_kind::momentum;
    CHECK(std::stod(setting_of(*tenon::retrain_model(incumbent, new_rows, o).candidate.metadata, "weight_decay")) == 0.0);
    o.weight_decay = 0.01;
    CHECK(code_of([&] { tenon::retrain_model(incumbent, new_rows, o); }) == "train.option.invalid");
    o.weight_decay = -1.0;
    CHECK(code_of([&] { tenon::retrain_model(incumbent, new_rows, o); }) == "deploy.retrain.option");
}
