// Tests of `tenon retrain` and `tenon drift` (examples/cli/, library tenon_tool), run in
// process on an invented press whose process drifts: retraining on drifted
// rows promotes a candidate that really predicts the new rows better (checked
// with `tenon infer` on rows neither model saw), retraining on rows like the
// training rows with a large margin keeps the incumbent and writes nothing;
// drift flags exactly the columns whose distribution changed, and its JSON
// agrees with the library's report. Every error path checks its exact
// message, exit status and that no file is left behind.
#include <doctest/doctest.h>

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <functional>
#include <map>
#include <sstream>
#include <stdexcept>
#include <string>
#include <vector>

#include "cli_test_support.hpp"

namespace fs = std::filesystem;

namespace {

using cli_test::cli_result;

cli_result run(std::vector<std::string> args, std::function<double()> clock = {}) {
    tenon_cli::cli_environment env;
    env.clock = std::move(clock);
    return cli_test::run_tool(std::move(args), env);
}

// A fresh, empty directory per test case.
struct scratch_dir : cli_test::scratch_dir {
    explicit scratch_dir(const std::string& name) : cli_test::scratch_dir("tenon_cli_retrain_tests_", name) {}
};

using cli_test::read_file;

using cli_test::json_flattener;

std::map<std::string, std::string> parse_json(const std::string& text) { return json_flattener(text).values; }

const std::string& at(const std::map<std::string, std::string>& m, const std::string& key) {
    const auto it = m.find(key);
    if (it == m.end()) throw std::runtime_error("the JSON has no '" + key + "'");
    return it->second;
}
double number_at(const std::map<std::string, std::string>& m, const std::string& key) { return std::stod(at(m, key)); }

// The tool's "%.6g" rendering of a score.
std::string six_digits(double v) {
    char buffer[64];
    std::snprintf(buffer, sizeof buffer, "%.6g", v);
    return buffer;
}

bool contains(const std::string& text, const std::string& part) { return text.find(part) != std::string::npos; }

// Invented: a hydraulic press's motor current (amps) from the ram speed, the
// load share and the oil grade. `drifted` is the press after a refit: faster
// strokes, mostly synthetic oil, and a worn bearing that adds 3 A, so the
// relation itself changes and the old model is off on the new rows.
std::string press_csv(std::size_t rows, std::uint64_t seed, bool drifted) {
    tenon::random_engine rng(seed);
    std::string csv = "speed,load,oil,amps\n";
    for (std::size_t i = 0; i < rows; ++i) {
        const double speed = drifted ? rng.uniform(1200.0, 2000.0) : rng.uniform(500.0, 1500.0);
        const double load = rng.uniform(0.0, 1.0);
        const bool synthetic = rng.uniform(0.0, 1.0) < (drifted ? 0.9 : 0.5);
        const double amps = (drifted ? 13.0 : 10.0) + 0.01 * speed * load - (synthetic ? 0.5 : 0.0) + rng.normal(0.0, 0.2);
        csv += std::to_string(speed) + "," + std::to_string(load) + "," + (synthetic ? "synthetic" : "mineral") + "," + std::to_string(amps) + "\n";
    }
    return csv;
}

// A model trained by `tenon train --model` on the press before the drift.
struct press_model {
    scratch_dir dir;
    std::string data, model;
    explicit press_model(const std::string& name) : dir(name) {
        data = dir.write("history.csv", press_csv(600, 11, false));
        model = dir.file("press.tnm");
        const auto r = run({"train", "--data", data, "--target", "amps", "--epochs", "40", "--seed", "3", "--model", model, "--quiet"});
        REQUIRE(r.status == 0);
        REQUIRE(r.err.empty());
    }
};

// RMSE of a model's `tenon infer` predictions against the amps of `data`.
double infer_rmse(const scratch_dir& dir, const std::string& model, const std::string& data) {
    const std::string out = dir.file("predictions.csv");
    const auto r = run({"infer", "--model", model, "--data", data, "--out", out, "--quiet"});
    REQUIRE(r.status == 0);
    const tenon::table truth = tenon::read_csv_file(data);
    const tenon::table predicted = tenon::read_csv_file(out);
    REQUIRE(predicted.row_count() == truth.row_count());
    double sum = 0.0;
    for (std::size_t i = 0; i < truth.row_count(); ++i) {
        const double e = predicted.at("predicted").number(i) - truth.at("amps").number(i);
        sum += e * e;
    }
    fs::remove(out);
    return std::sqrt(sum / static_cast<double>(truth.row_count()));
}

void check_failure(const scratch_dir& dir, const std::vector<std::string>& args, const std::string& expected_err, int status = 2) {
    const auto before = dir.listing();
    const auto r = run(args);
    CHECK(r.status == status);
    CHECK(r.err == expected_err);
    CHECK(r.out.empty());
    CHECK(dir.listing() == before);
}

}  // namespace

// ---------------------------------------------------------------------------
// tenon retrain

TEST_CASE("retrain on drifted rows promotes a candidate that predicts new rows better, writes --out only, prints both scores") {
    press_model p("promoted");
    const auto recent = p.dir.write("recent.csv", press_csv(400, 12, true));
    const std::string incumbent_bytes = read_file(p.model);
    const auto out = p.dir.file("press2.tnm"), report = p.dir.file("report.json");
    const auto r = run({"retrain", "--model", p.model, "--data", recent, "--out", out, "--json", report, "--seed", "5"});
    REQUIRE(r.status == tenon_cli::exit_success);
    CHECK(r.err.empty());
    CHECK(r.out.rfind("promoted: the candidate is better by ", 0) == 0);
    CHECK(p.dir.listing() == std::vector<std::string>{"history.csv", "press.tnm", "press2.tnm", "recent.csv", "report.json"});
    CHECK(read_file(p.model) == incumbent_bytes);  // the incumbent is untouched

    // The candidate loads; its metadata holds the gate's scores, which the
    // report and the printed summary repeat.
    const tenon::model_file<float> candidate = tenon::load_model_file<float>(out);
    REQUIRE(candidate.metadata.has_value());
    const double incumbent_score = candidate.metadata->metric("gate_incumbent_score");
    const double candidate_score = candidate.metadata->metric("gate_candidate_score");
    CHECK(candidate.metadata->metric("retrainings") == 1.0);
    CHECK(candidate_score < incumbent_score);  // RMSE: lower is better
    const auto j = parse_json(read_file(report));
    CHECK(at(j, "promoted") == "true");
    CHECK(at(j, "decision") == "promoted");
    CHECK(at(j, "gate.metric") == "rmse");
    CHECK(at(j, "gate.higher_is_better") == "false");
    CHECK(number_at(j, "gate.margin") == 0.0);
    CHECK(number_at(j, "gate.incumbent_score") == incumbent_score);
    CHECK(number_at(j, "gate.candidate_score") == candidate_score);
    CHECK(number_at(j, "gate.improvement") == incumbent_score - candidate_score);
    CHECK(number_at(j, "rows.new") == 400);
    CHECK(number_at(j, "rows.holdout") == 80);  // 20% of 400, more than the minimum 30
    CHECK(number_at(j, "rows.new_training") == 320);
    CHECK(number_at(j, "rows.holdout") == candidate.metadata->metric("gate_holdout_rows"));
    CHECK(number_at(j, "training.epochs") >= 1);
    CHECK(at(j, "file_written") == "true");
    CHECK(at(j, "model_path") == out);
    CHECK(at(j, "rollback_path").empty());
    // Both models' bands on the holdout: the incumbent's, fitted before the
    // drift (3 A more current), misses the new rows; the candidate is
    // recalibrated on its validation rows at the incumbent's nominal 0.9.
    CHECK(at(j, "calibration.measure") == "interval");
    CHECK(number_at(j, "calibration.nominal_coverage") == 0.9);
    CHECK(number_at(j, "calibration.incumbent_coverage") < 0.5);
    CHECK(number_at(j, "calibration.candidate_coverage") > 0.5);
    CHECK(number_at(j, "calibration.candidate_width") > 0.0);
    CHECK(number_at(j, "calibration.candidate_coverage") == candidate.metadata->metric("gate_candidate_coverage"));
    REQUIRE(candidate.calibration);
    REQUIRE(candidate.calibration->interval);
    CHECK(candidate.calibration->interval->coverage == 0.9);
    CHECK(candidate.calibration->interval->rows == static_cast<std::uint64_t>(number_at(j, "rows.validation")));
    CHECK(contains(r.out,
                   "  coverage     bands on the holdout, nominal 0.9: incumbent " + six_digits(number_at(j, "calibration.incumbent_coverage")) +
                       ", mean band width "));

    CHECK(contains(r.out, "  metric       rmse (lower is better) on 80 holdout rows, margin 0\n"));
    CHECK(contains(r.out, "  incumbent    " + six_digits(incumbent_score) + "\n"));
    CHECK(contains(r.out, "  candidate    " + six_digits(candidate_score) + "\n"));
    CHECK(contains(r.out, "  rows         400 new (0 refused): 80 holdout, 320 for training; "));
    CHECK(contains(r.out, "  training     " + at(j, "training.epochs") + " epochs, "));
    CHECK(contains(r.out, " in all, budget none\n"));
    CHECK(contains(r.out, "candidate written to " + out + "\n"));
    CHECK(contains(r.out, "report written to " + report + "\n"));

    // On drifted rows neither model saw, the promoted one is better.
    const auto fresh = p.dir.write("fresh.csv", press_csv(300, 13, true));
    const double old_rmse = infer_rmse(p.dir, p.model, fresh), new_rmse = infer_rmse(p.dir, out, fresh);
    CAPTURE(old_rmse);
    CAPTURE(new_rmse);
    CHECK(new_rmse < old_rmse);
    // inspect reads the candidate.
    const auto inspect = run({"inspect", "--model", out});
    CHECK(inspect.status == 0);
    CHECK(contains(inspect.out, "gate_candidate_score"));
}

TEST_CASE("retrain --training-seed draws another batch order on the same holdout; equal to --seed it changes nothing; the report records both") {
    press_model p("training_seed");
    const auto recent = p.dir.write("recent.csv", press_csv(400, 12, true));
    const auto retrain = [&](const std::string& name, std::vector<std::string> extra) {
        std::vector<std::string> args{
            "retrain", "--model", p.model, "--data", recent, "--out", p.dir.file(name + ".tnm"), "--seed", "5", "--json", p.dir.file(name + ".json"),
            "--quiet"};
        args.insert(args.end(), extra.begin(), extra.end());
        REQUIRE(run(args).status == tenon_cli::exit_success);
        return parse_json(read_file(p.dir.file(name + ".json")));
    };
    const auto plain = retrain("plain", {});
    const auto same = retrain("same", {"--training-seed", "5"});
    const auto other = retrain("other", {"--training-seed", "6"});
    // Equal seeds: the same candidate, to the last digit of its score.
    CHECK(at(same, "gate.candidate_score") == at(plain, "gate.candidate_score"));
    // Another training seed: the same holdout (so the incumbent scores alike), another candidate.
    CHECK(at(other, "gate.incumbent_score") == at(plain, "gate.incumbent_score"));
    CHECK(number_at(other, "rows.holdout") == number_at(plain, "rows.holdout"));
    CHECK(number_at(other, "rows.new_training") == number_at(plain, "rows.new_training"));
    CHECK(at(other, "gate.candidate_score") != at(plain, "gate.candidate_score"));
    // The report records both seeds, so the run can be repeated from it.
    CHECK(number_at(plain, "training.seed") == 5);
    CHECK(number_at(plain, "training.training_seed") == 5);
    CHECK(number_at(other, "training.seed") == 5);
    CHECK(number_at(other, "training.training_seed") == 6);
    const auto text = run({"retrain", "--model", p.model, "--data", recent, "--out", p.dir.file("text.tnm"), "--seed", "5", "--training-seed", "6"});
    REQUIRE(text.status == tenon_cli::exit_success);
    CHECK(contains(text.out, "; seed 5, training seed 6"));

    check_failure(p.dir, {"retrain", "--model", p.model, "--data", recent, "--out", p.dir.file("bad.tnm"), "--training-seed", "-1"},
                  "tenon retrain: error: [cli.option.value] --training-seed '-1': not a whole number between 0 and 18446744073709551615\n");
}

TEST_CASE("retrain continues every network of an ensemble and writes them all; --threads 2 gives the same weights") {
    scratch_dir dir("ensemble");
    const auto data = dir.write("history.csv", press_csv(600, 11, false));
    const auto model = dir.file("press.tnm");
    REQUIRE(
        run({"train", "--data", data, "--target", "amps", "--epochs", "40", "--seed", "3", "--ensemble", "3", "--model", model, "--quiet"}).status ==
        0);
    const tenon::model_file<float> incumbent = tenon::load_model_file<float>(model);
    REQUIRE(incumbent.members.size() == 2);
    const auto recent = dir.write("recent.csv", press_csv(400, 12, true));
    const auto one = dir.file("one.tnm"), two = dir.file("two.tnm");
    const auto r1 = run({"retrain", "--model", model, "--data", recent, "--out", one, "--seed", "5", "--json", dir.file("one.json")});
    const auto r2 =
        run({"retrain", "--model", model, "--data", recent, "--out", two, "--seed", "5", "--threads", "2", "--json", dir.file("two.json")});
    REQUIRE(r1.status == tenon_cli::exit_success);
    REQUIRE(r2.status == tenon_cli::exit_success);
    CHECK(contains(r1.out, "; all 3 networks of the ensemble continued (epochs and steps: the first's)\n"));
    const auto j1 = parse_json(read_file(dir.file("one.json"))), j2 = parse_json(read_file(dir.file("two.json")));
    CHECK(number_at(j1, "training.members") == 3);
    CHECK(at(j1, "gate.candidate_score") == at(j2, "gate.candidate_score"));
    CHECK(at(j1, "gate.incumbent_score") == at(j2, "gate.incumbent_score"));
    const tenon::model_file<float> a = tenon::load_model_file<float>(one), b = tenon::load_model_file<float>(two);
    REQUIRE(a.members.size() == 2);
    REQUIRE(b.members.size() == 2);
    const auto same = [](const std::vector<tenon::named_matrix<float>>& x, const std::vector<tenon::named_matrix<float>>& y) {
        if (x.size() != y.size()) return false;
        for (std::size_t i = 0; i < x.size(); ++i)
            if (x[i].name != y[i].name ||
                !std::equal(x[i].values.data(), x[i].values.data() + x[i].values.size(), y[i].values.data(), y[i].values.data() + y[i].values.size()))
                return false;
        return true;
    };
    for (std::size_t k = 0; k < 3; ++k) {
        CAPTURE(k);
        const auto& mine = k == 0 ? a.weights : a.members[k - 1];
        CHECK(same(mine, k == 0 ? b.weights : b.members[k - 1]));  // 1 and 2 threads agree
        CHECK_FALSE(same(mine, k == 0 ? incumbent.weights : incumbent.members[k - 1]));  // every member trained
    }
    // The promoted ensemble serves: tenon infer averages its three networks.
    CHECK(infer_rmse(dir, one, recent) < infer_rmse(dir, model, recent));
    check_failure(dir, {"retrain", "--model", model, "--data", recent, "--out", dir.file("x.tnm"), "--threads", "0"},
                  "tenon retrain: error: [cli.option.value] --threads '0': must be at least 1\n");
}

TEST_CASE("retrain on rows like the training rows with a large margin keeps the incumbent: exit 4, no model written") {
    press_model p("kept");
    const auto same = p.dir.write("same.csv", press_csv(400, 14, false));
    const std::string incumbent_bytes = read_file(p.model);
    const auto out = p.dir.file("press2.tnm"), report = p.dir.file("report.json");
    const auto r = run({"retrain", "--model", p.model, "--data", same, "--out", out, "--margin", "1000", "--json", report});
    CHECK(r.status == tenon_cli::exit_kept_incumbent);
    CHECK(r.status == 4);
    CHECK(r.err.empty());
    CHECK(r.out.rfind("kept the incumbent: the candidate ", 0) == 0);
    CHECK(contains(r.out, "margin 1000\n"));
    CHECK(contains(r.out, "nothing written; " + p.model + " stays in service\n"));
    CHECK(p.dir.listing() == std::vector<std::string>{"history.csv", "press.tnm", "report.json", "same.csv"});
    CHECK(read_file(p.model) == incumbent_bytes);
    const auto j = parse_json(read_file(report));
    CHECK(at(j, "promoted") == "false");
    CHECK(at(j, "decision") == "kept_incumbent");
    CHECK(at(j, "file_written") == "false");
    CHECK(number_at(j, "gate.margin") == 1000.0);
    CHECK(number_at(j, "gate.improvement") < 1000.0);
    CHECK(contains(r.out, "  incumbent    " + six_digits(number_at(j, "gate.incumbent_score")) + "\n"));
    CHECK(contains(r.out, "  candidate    " + six_digits(number_at(j, "gate.candidate_score")) + "\n"));

    // --json - prints the report instead of the summary; the decision is the same.
    const auto printed = run({"retrain", "--model", p.model, "--data", same, "--out", out, "--margin", "1000", "--json", "-"});
    CHECK(printed.status == 4);
    const auto k = parse_json(printed.out);
    CHECK(at(k, "decision") == "kept_incumbent");
    CHECK(at(k, "gate.candidate_score") == at(j, "gate.candidate_score"));  // same seed, same data: same run
    // --quiet prints nothing; the exit status still tells.
    const auto quiet = run({"retrain", "--model", p.model, "--data", same, "--out", out, "--margin", "1000", "--quiet"});
    CHECK(quiet.status == 4);
    CHECK(quiet.out.empty());
    CHECK(p.dir.listing() == std::vector<std::string>{"history.csv", "press.tnm", "report.json", "same.csv"});
}

TEST_CASE("retrain with --out equal to --model keeps the incumbent's exact bytes at MODEL.previous, or at --rollback") {
    press_model p("in_place");
    const auto recent = p.dir.write("recent.csv", press_csv(400, 12, true));
    const std::string incumbent_bytes = read_file(p.model);
    const auto r = run({"retrain", "--model", p.model, "--data", recent, "--out", p.model, "--seed", "5"});
    REQUIRE(r.status == 0);
    CHECK(contains(r.out, "candidate written to " + p.model + "; the previous model kept at " + p.model + ".previous\n"));
    CHECK(p.dir.listing() == std::vector<std::string>{"history.csv", "press.tnm", "press.tnm.previous", "recent.csv"});
    CHECK(read_file(p.model + ".previous") == incumbent_bytes);
    CHECK(read_file(p.model) != incumbent_bytes);
    CHECK(tenon::load_model_file<float>(p.model).metadata->metric("retrainings") == 1.0);
    // The library's rollback helper puts the incumbent back.
    tenon::roll_back_model_file(p.model);
    CHECK(read_file(p.model) == incumbent_bytes);

    // With --rollback PATH; a kept incumbent writes neither file.
    const auto keep = p.dir.file("keep.tnm");
    const auto kept = run({"retrain", "--model", p.model, "--data", recent, "--out", p.model, "--rollback", keep, "--margin", "1000", "--quiet"});
    CHECK(kept.status == 4);
    CHECK(p.dir.listing() == std::vector<std::string>{"history.csv", "press.tnm", "press.tnm.previous", "recent.csv"});
    const auto promoted = run({"retrain", "--model", p.model, "--data", recent, "--out", p.model, "--rollback", keep, "--seed", "5", "--quiet"});
    CHECK(promoted.status == 0);
    CHECK(promoted.out.empty());
    CHECK(read_file(keep) == incumbent_bytes);
    CHECK(p.dir.listing() == std::vector<std::string>{"history.csv", "keep.tnm", "press.tnm", "press.tnm.previous", "recent.csv"});
}

TEST_CASE("inspect after a retrain shows where the current weights came from, and the replaced training as history") {
    press_model p("inspect_after");
    const auto before = tenon::inspect_model_file(p.model);
    REQUIRE(before.metadata);
    CHECK(before.history.empty());
    const double old_test_rmse = before.metadata->metric("test_rmse");
    REQUIRE(std::isfinite(old_test_rmse));
    const auto recent = p.dir.write("recent.csv", press_csv(400, 12, true));
    REQUIRE(run({"retrain", "--model", p.model, "--data", recent, "--out", p.model, "--seed", "5", "--quiet"}).status == 0);

    // The library: the metadata describe the new weights only; the old ones are history.
    const auto after = tenon::inspect_model_file(p.model);
    REQUIRE(after.metadata);
    const tenon::training_metadata& now = *after.metadata;
    CHECK(std::isnan(now.metric("test_rmse")));  // the old test score is not the new weights' score
    CHECK(std::isfinite(now.metric("gate_candidate_score")));
    std::string data, origin, target;
    for (const auto& kv : now.settings) {
        if (kv.first == "data") data = kv.second;
        if (kv.first == "origin") origin = kv.second;
        if (kv.first == "target") target = kv.second;
        CHECK(kv.first != "split");  // how the replaced weights were split is theirs
    }
    CHECK(data == "recent.csv");
    CHECK(origin == "retraining");
    CHECK(target == "amps");  // still describes the model
    REQUIRE(after.history.size() == 1);
    CHECK(after.history[0].metric("test_rmse") == old_test_rmse);
    CHECK(after.history[0].data_fingerprint == before.metadata->data_fingerprint);
    CHECK(after.history[0].created_unix_seconds == before.metadata->created_unix_seconds);

    // The tool's text and JSON.
    const auto text = run({"inspect", "--model", p.model});
    REQUIRE(text.status == 0);
    CHECK(contains(text.out, "\nProvenance of the current weights\n  made by      retraining 1 (promoted over the weights before it)\n"));
    CHECK(contains(text.out, "  data         recent.csv, fingerprint "));
    CHECK(contains(text.out, " against the replaced weights' "));
    CHECK(contains(text.out, "\nHistory: 1 earlier training whose weights were replaced, oldest first\n  1. "));
    CHECK(contains(text.out, ", training, data history.csv, fingerprint "));
    CHECK(contains(text.out, "test_rmse " + tenon_cli::detail::significant(old_test_rmse)));
    const auto json = run({"inspect", "--model", p.model, "--json"});
    REQUIRE(json.status == 0);
    CHECK(contains(json.out, "\"origin\": \"retraining\""));
    const std::size_t history_at = json.out.find("\"history\": [");
    REQUIRE(history_at != std::string::npos);
    CHECK(json.out.find("\"data\": \"history.csv\"", history_at) != std::string::npos);
    CHECK(json.out.find("\"test_rmse\": ", history_at) != std::string::npos);
}

TEST_CASE("retrain --budget is read on the injected clock: a budget spent before training keeps the incumbent") {
    press_model p("budget");
    const auto recent = p.dir.write("recent.csv", press_csv(400, 12, true));
    const auto out = p.dir.file("press2.tnm");
    double now = 0.0;
    const auto clock = [&now] { return now += 10.0; };  // every reading 10 s later
    const auto r = run({"retrain", "--model", p.model, "--data", recent, "--out", out, "--budget", "5", "--json", "-"}, clock);
    CHECK(r.status == 4);
    const auto j = parse_json(r.out);
    CHECK(number_at(j, "time_budget_seconds") == 5.0);
    CHECK(number_at(j, "training.epochs") == 0);
    CHECK(at(j, "training.stop_reason") == "time_budget");
    CHECK(number_at(j, "gate.improvement") == 0.0);  // the candidate is the incumbent
    CHECK(number_at(j, "seconds") >= 10.0);
    CHECK(!fs::exists(out));
    const auto text = run({"retrain", "--model", p.model, "--data", recent, "--out", out, "--budget", "5"}, clock);
    CHECK(text.status == 4);
    CHECK(contains(text.out, "  training     0 epochs, 0 steps, stopped: time_budget ("));
    CHECK(contains(text.out, " in all, budget 5.0s\n"));
}

TEST_CASE("retrain counts the rows the frozen preparation refuses and still decides") {
    press_model p("refused");
    std::string csv = press_csv(200, 12, true);
    csv += "1500,0.5,synthetic,\n";  // no target
    csv += "1500,0.5,,20\n";  // a missing oil grade: filled (most frequent), so usable
    csv += "fast,0.5,mineral,20\n";  // not a number
    const auto recent = p.dir.write("recent.csv", csv);
    const auto r = run({"retrain", "--model", p.model, "--data", recent, "--out", p.dir.file("o.tnm"), "--json", "-"});
    CHECK((r.status == 0 || r.status == 4));
    const auto j = parse_json(r.out);
    CHECK(number_at(j, "rows.new") == 203);
    CHECK(number_at(j, "rows.new_refused") == 2);
    CHECK(number_at(j, "rows.refused_missing_target") == 1);
    CHECK(number_at(j, "rows.refused_not_numeric") == 1);
    const auto text = run({"retrain", "--model", p.model, "--data", recent, "--out", p.dir.file("o.tnm"), "--margin", "1000"});
    CHECK(text.status == 4);
    CHECK(contains(text.out, "  rows         203 new (2 refused, 1 missing target, 1 not a number): 41 holdout, 160 for training; "));
}

TEST_CASE("retrain errors are named, exit 2 (3 for an unwritable output), and leave no file behind") {
    press_model p("errors");
    const auto recent = p.dir.write("recent.csv", press_csv(100, 12, true));
    const auto out = p.dir.file("o.tnm");
    const std::string e = "tenon retrain: error: ";
    const auto absent = p.dir.file("absent.tnm");
    check_failure(p.dir, {"retrain", "--model", absent, "--data", recent, "--out", out},
                  e + "[deploy.file.io] --model '" + absent + "': cannot read it (No such file or directory)\n");
    check_failure(p.dir, {"retrain", "--model", p.model, "--data", recent, "--out", out, "--margin", "-0.5"},
                  e + "[cli.option.value] --margin '-0.5': must be zero or more, in the gate metric's units\n");
    check_failure(p.dir, {"retrain", "--model", p.model, "--data", recent, "--out", out, "--margin", "lots"},
                  e + "[cli.option.value] --margin 'lots': not a finite number\n");
    check_failure(p.dir, {"retrain", "--model", p.model, "--data", recent, "--out", out, "--budget", "-1"},
                  e + "[cli.option.value] --budget '-1': must be zero (no limit) or more seconds\n");
    check_failure(p.dir, {"retrain", "--model", p.model, "--data", recent, "--out", out, "--metric", "f1"},
                  e + "[cli.option.value] --metric 'f1': not one of auto, accuracy, log-loss, rmse\n");
    check_failure(p.dir, {"retrain", "--model", p.model, "--data", recent, "--out", out, "--holdout-share", "1"},
                  e + "[cli.option.value] --holdout-share '1': must lie strictly between 0 and 1\n");
    check_failure(p.dir, {"retrain", "--model", p.model, "--data", recent, "--out", out, "--holdout", "oldest"},
                  e + "[cli.option.value] --holdout 'oldest': not one of random, latest\n");
    check_failure(p.dir, {"retrain", "--model", p.model, "--data", recent},
                  e + "[cli.option.missing] tenon retrain needs --out NEW_MODEL.tnm (it may be the --model file)\n");
    check_failure(p.dir, {"retrain", "--data", recent, "--out", out}, e + "[cli.option.missing] tenon retrain needs --model MODEL.tnm\n");
    check_failure(p.dir, {"retrain", "--model", p.model, "--out", out}, e + "[cli.option.missing] tenon retrain needs --data NEW.csv\n");
    check_failure(p.dir, {"retrain", "--model", p.model, "--data", recent, "--out", recent},
                  e + "[cli.option.conflict] --out and --data name the same file '" + recent + "'\n");
    check_failure(p.dir, {"retrain", "--model", p.model, "--data", recent, "--out", out, "--rollback", p.dir.file("r.tnm")},
                  e + "[cli.option.conflict] --rollback names where the replaced model is kept; it applies only when --out is the --model file\n");
    check_failure(p.dir, {"retrain", "--model", p.model, "--data", recent, "--out", out, "--json", out},
                  e + "[cli.option.conflict] --json and --out name the same file '" + out + "'\n");
    check_failure(p.dir, {"retrain", "--model", p.model, "--data", recent, "--out", out, "--epochs", "0"},
                  e + "[cli.option.value] --epochs '0': must be at least 1\n");

    // Data problems.
    const auto no_oil = p.dir.write("no_oil.csv", "speed,load,amps\n1500,0.5,20\n");
    check_failure(
        p.dir, {"retrain", "--model", p.model, "--data", no_oil, "--out", out},
        e + "[cli.column.missing] " + no_oil +
            ": retraining needs 'oil' (the model's inputs and its target 'amps'), which the data does not have (columns: speed, load, amps)\n");
    const auto no_target = p.dir.write("no_target.csv", "speed,load\n1500,0.5\n");
    check_failure(
        p.dir, {"retrain", "--model", p.model, "--data", no_target, "--out", out},
        e + "[cli.column.missing] " + no_target +
            ": retraining needs 'oil', 'amps' (the model's inputs and its target 'amps'), which the data does not have (columns: speed, load)\n");
    const auto header_only = p.dir.write("header_only.csv", "speed,load,oil,amps\n");
    check_failure(p.dir, {"retrain", "--model", p.model, "--data", header_only, "--out", out},
                  e + "[cli.data.empty] " + header_only + ": no data rows below the header\n");
    const auto few = p.dir.write("few.csv", press_csv(20, 12, true));
    check_failure(p.dir, {"retrain", "--model", p.model, "--data", few, "--out", out},
                  e +
                      "[deploy.retrain.too_few_rows] retrain_model: 20 of the 20 new rows are usable (0 refused); the holdout needs 30 and training "
                      "at least 1 more\n");
    check_failure(p.dir, {"retrain", "--model", p.model, "--data", recent, "--out", out, "--metric", "accuracy"},
                  e + "[deploy.retrain.option] retrain_model: the gate metric accuracy does not fit a regression model\n");
    // A file that is not a model: the library's reader names the problem.
    const auto not_a_model = p.dir.write("not_a_model.tnm", "speed,load\n");
    std::string damaged;
    try {
        tenon::inspect_model_file(not_a_model);
    } catch (const tenon::error& x) {
        damaged = x.what();
    }
    REQUIRE(!damaged.empty());
    check_failure(p.dir, {"retrain", "--model", not_a_model, "--data", recent, "--out", out}, e + damaged + "\n");

    // An output directory that does not exist: status 3, before any training.
    const auto nowhere = p.dir.file("no_such_dir/o.tnm");
    check_failure(p.dir, {"retrain", "--model", p.model, "--data", recent, "--out", nowhere},
                  e + "[cli.output.write] --out '" + nowhere + "': the directory '" + std::filesystem::path(nowhere).parent_path().string() +
                      "' does not exist\n",
                  tenon_cli::exit_output_failed);
    const auto report_nowhere = p.dir.file("no_such_dir/r.json");
    check_failure(p.dir, {"retrain", "--model", p.model, "--data", recent, "--out", out, "--json", report_nowhere},
                  e + "[cli.output.write] --json '" + report_nowhere + "': the directory '" +
                      std::filesystem::path(report_nowhere).parent_path().string() + "' does not exist\n",
                  tenon_cli::exit_output_failed);
}

// ---------------------------------------------------------------------------
// tenon drift

TEST_CASE("drift on rows like the training rows flags nothing: exit 0; --json parses") {
    press_model p("no_drift");
    const auto recent = p.dir.write("recent.csv", press_csv(400, 21, false));
    const auto r = run({"drift", "--model", p.model, "--data", recent});
    CHECK(r.status == tenon_cli::exit_success);
    CHECK(r.err.empty());
    CHECK(r.out.rfind("drift of 3 input columns: 400 rows of " + recent + " against the ", 0) == 0);
    CHECK(!contains(r.out, "drifted  "));
    CHECK(contains(r.out, "\nno column drifted"));
    CHECK(contains(r.out, " (exit status 0)\n"));

    const auto js = run({"drift", "--model", p.model, "--data", recent, "--json"});
    CHECK(js.status == 0);
    const auto j = parse_json(js.out);
    CHECK(number_at(j, "window_rows") == 400);
    CHECK(number_at(j, "drifted_columns") == 0);
    CHECK(number_at(j, "options.psi_threshold") == 0.25);
    for (int k = 0; k < 3; ++k) {
        const std::string c = "columns." + std::to_string(k) + ".";
        CAPTURE(at(j, c + "column"));
        CHECK(at(j, c + "status") != "drifted");
        CHECK(at(j, c + "psi_flag") == "false");
        CHECK(at(j, c + "ks_flag") == "false");
        CHECK(number_at(j, c + "psi") < 0.25);
    }
    CHECK(p.dir.listing() == std::vector<std::string>{"history.csv", "press.tnm", "recent.csv"});
}

TEST_CASE("drift on drifted rows flags the changed columns: exit 5; text and JSON agree with the library's report") {
    press_model p("drifted");
    const auto recent = p.dir.write("recent.csv", press_csv(400, 22, true));
    const auto r = run({"drift", "--model", p.model, "--data", recent});
    CHECK(r.status == tenon_cli::exit_drift_flagged);
    CHECK(r.status == 5);
    CHECK(r.err.empty());
    CHECK(contains(r.out, "\n2 of 3 columns drifted: speed, oil"));
    CHECK(contains(r.out, " (exit status 5)\n"));

    // The table is the library's, for the library's report on the same rows.
    const tenon::model_file<float> file = tenon::load_model_file<float>(p.model);
    const tenon::drift_report expected = tenon::measure_drift(file.references, tenon::read_csv_file(recent));
    CHECK(contains(r.out, tenon::drift_table(expected)));
    CHECK(expected.feature("speed").drifted());
    CHECK(expected.feature("oil").drifted());
    CHECK(!expected.feature("load").drifted());

    const auto js = run({"drift", "--model", p.model, "--data", recent, "--json"});
    CHECK(js.status == 5);
    CHECK(js.out == tenon::to_json(expected) + "\n");
    const auto j = parse_json(js.out);
    CHECK(number_at(j, "drifted_columns") == 2);
    std::map<std::string, std::string> status;
    for (int k = 0; k < 3; ++k) {
        const std::string c = "columns." + std::to_string(k) + ".";
        status[at(j, c + "column")] = at(j, c + "status");
        if (at(j, c + "column") == "speed") {
            CHECK(at(j, c + "psi_flag") == "true");
            CHECK(at(j, c + "ks_flag") == "true");
            CHECK(number_at(j, c + "above_range") > 0);
            CHECK(number_at(j, c + "ks") > number_at(j, c + "ks_limit"));
        }
        if (at(j, c + "column") == "oil") {
            CHECK(at(j, c + "psi_flag") == "true");
            CHECK(at(j, c + "ks") == "null");  // categorical: no KS
        }
    }
    CHECK(status == std::map<std::string, std::string>{{"load", status["load"]}, {"oil", "drifted"}, {"speed", "drifted"}});
    CHECK(status["load"] != "drifted");

    // Thresholds no column reaches: nothing is flagged.
    const auto lenient = run({"drift", "--model", p.model, "--data", recent, "--psi-threshold", "100", "--ks-threshold", "1", "--json"});
    CHECK(lenient.status == 0);
    const auto l = parse_json(lenient.out);
    CHECK(number_at(l, "drifted_columns") == 0);
    CHECK(number_at(l, "options.psi_threshold") == 100.0);
    CHECK(number_at(l, "options.ks_threshold") == 1.0);
    CHECK(number_at(l, "options.psi_watch") == 0.1);
    // A low threshold also lowers the watch level unless --psi-watch is given.
    const auto strict = run({"drift", "--model", p.model, "--data", recent, "--psi-threshold", "0.05", "--json"});
    CHECK(strict.status == 5);
    CHECK(number_at(parse_json(strict.out), "options.psi_watch") == 0.05);
    const auto quiet = run({"drift", "--model", p.model, "--data", recent, "--quiet"});
    CHECK(quiet.status == 5);
    CHECK(quiet.out.empty());
    CHECK(p.dir.listing() == std::vector<std::string>{"history.csv", "press.tnm", "recent.csv"});
}

TEST_CASE("drift errors are named, exit 2") {
    press_model p("drift_errors");
    const auto recent = p.dir.write("recent.csv", press_csv(50, 22, true));
    const std::string e = "tenon drift: error: ";
    const auto no_oil = p.dir.write("no_oil.csv", "speed,amps\n1500,20\n");
    check_failure(p.dir, {"drift", "--model", p.model, "--data", no_oil},
                  e + "[cli.column.missing] " + no_oil + ": the model reads 'load', 'oil', which the data does not have (columns: speed, amps)\n");
    const auto header_only = p.dir.write("header_only.csv", "speed,load,oil\n");
    check_failure(p.dir, {"drift", "--model", p.model, "--data", header_only},
                  e + "[cli.data.empty] " + header_only + ": no data rows below the header\n");
    const auto absent = p.dir.file("absent.tnm");
    check_failure(p.dir, {"drift", "--model", absent, "--data", recent},
                  e + "[deploy.file.io] --model '" + absent + "': cannot read it (No such file or directory)\n");
    check_failure(p.dir, {"drift", "--model", p.model, "--data", recent, "--psi-threshold", "0"},
                  e + "[cli.option.value] --psi-threshold '0': must be positive\n");
    check_failure(p.dir, {"drift", "--model", p.model, "--data", recent, "--ks-threshold", "1.5"},
                  e + "[cli.option.value] --ks-threshold '1.5': must lie in [0, 1] (0: the critical value at --ks-significance)\n");
    check_failure(p.dir, {"drift", "--model", p.model, "--data", recent, "--ks-significance", "0"},
                  e + "[cli.option.value] --ks-significance '0': must lie strictly between 0 and 1\n");
    check_failure(p.dir, {"drift", "--model", p.model, "--data", recent, "--psi-watch", "0.5"},
                  e + "[cli.option.conflict] --psi-watch 0.5 is above --psi-threshold 0.25\n");
    check_failure(p.dir, {"drift", "--model", p.model, "--data", recent, "--json", "--quiet"},
                  e + "[cli.option.conflict] --json prints the report and --quiet prints nothing: give one of them\n");
    check_failure(p.dir, {"drift", "--model", p.model}, e + "[cli.option.missing] tenon drift needs --data RECENT.csv\n");
    check_failure(p.dir, {"drift", "--data", recent}, e + "[cli.option.missing] tenon drift needs --model MODEL.tnm\n");
    check_failure(p.dir, {"drift", "--model", p.model, "--data", recent, "--out", "x"},
                  e + "[cli.option.unknown] unknown option '--out' for 'tenon drift' (see tenon drift --help)\n");

    // A model file without the summaries of its training rows.
    tenon::model_file<float> file = tenon::load_model_file<float>(p.model);
    file.references.clear();
    const auto bare = p.dir.file("bare.tnm");
    tenon::save_model_file(bare, file);
    check_failure(p.dir, {"drift", "--model", bare, "--data", recent},
                  e + "[cli.model.unusable] " + bare +
                      ": the model holds no summaries of its training rows (section REFS), so drift cannot be measured\n");
}

// ---------------------------------------------------------------------------
// Help

TEST_CASE("retrain and drift explain every option with its default and their exit statuses; tenon --help lists them") {
    const auto retrain = run({"retrain", "--help"});
    CHECK(retrain.status == 0);
    for (const char* text : {"  --model ",
                             "  --data ",
                             "  --out ",
                             "  --margin ",
                             "  --budget ",
                             "  --metric ",
                             "  --epochs ",
                             "  --seed ",
                             "  --training-seed ",
                             "  --threads ",
                             "  --holdout-share ",
                             "  --min-holdout ",
                             "  --holdout ",
                             "  --rollback ",
                             "  --json ",
                             "  --quiet ",
                             "(default 0: any",
                             "(default 0:\n",
                             "(default auto",
                             "(default 30)",
                             "(default 1)",
                             "(default 0.2)",
                             "(default 30);",
                             "(default\n                         random)",
                             "(default MODEL.tnm.previous)",
                             "0 the candidate was promoted",
                             "4 the incumbent was kept",
                             "2 bad command line",
                             "3 an output file"}) {
        CAPTURE(std::string(text));
        CHECK(contains(retrain.out, text));
    }
    const auto drift = run({"drift", "--help"});
    CHECK(drift.status == 0);
    for (const char* text : {"  --model ", "  --data ", "  --psi-threshold ", "  --psi-watch ", "  --ks-threshold ", "  --ks-significance ",
                             "  --json ", "  --quiet ", "(default 0.25)", "(default 0.1,", "(default 0: the", "(default 0.01)",
                             "0 no column drifted; 5 at least one column drifted; 2 bad command line"}) {
        CAPTURE(std::string(text));
        CHECK(contains(drift.out, text));
    }
    CHECK(run({"help", "retrain"}).out == tenon_cli::retrain_help());
    CHECK(run({"help", "drift"}).out == tenon_cli::drift_help());
    const auto help = run({"--help"});
    for (const char* text : {"  retrain  continue training a saved model", "  drift    compare recent rows", "retrain: 4 the incumbent was kept",
                             "drift: 5 at least one column drifted"}) {
        CAPTURE(std::string(text));
        CHECK(contains(help.out, text));
    }
}
