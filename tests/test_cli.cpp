// Tests of the `tenon` command-line tool (examples/cli/, library tenon_tool), run in
// process: the command line, every bad-input path with its exact message and
// no file left behind, determinism, the metrics file, the progress modes, and
// the baselines: on invented nonlinear data the default network must beat a
// least-squares line or a logistic model fitted on the same training rows.
#include <doctest/doctest.h>

#include <Eigen/Dense>

#include <algorithm>
#include <cmath>
#include <filesystem>
#include <fstream>
#include <map>
#include <set>
#include <sstream>
#include <string>
#include <vector>

#include "cli_test_support.hpp"

namespace fs = std::filesystem;

namespace {

using cli_test::cli_result;
using cli_test::on_builtin_kernels;

cli_result run(std::vector<std::string> args, bool terminal = false) {
    tenon_cli::cli_environment env;
    env.terminal = terminal;
    return cli_test::run_tool(std::move(args), env);
}

// A fresh, empty directory per test case.
struct scratch_dir : cli_test::scratch_dir {
    explicit scratch_dir(const std::string& name) : cli_test::scratch_dir("tenon_cli_tests_", name) {}
};

using cli_test::read_file;

using cli_test::json_flattener;

std::map<std::string, std::string> read_metrics(const std::string& path) { return json_flattener(read_file(path)).values; }

double number_at(const std::map<std::string, std::string>& m, const std::string& key) {
    const auto it = m.find(key);
    if (it == m.end()) throw std::runtime_error("metrics have no '" + key + "'");
    return std::stod(it->second);
}

// A small classification file: an invented filling line's cap check.
std::string small_classification_csv(std::size_t rows = 120) {
    tenon::random_engine rng(5);
    std::string csv = "torque,angle,shift,verdict\n";
    for (std::size_t i = 0; i < rows; ++i) {
        const double torque = rng.uniform(1.0, 3.0), angle = rng.uniform(200.0, 400.0);
        const bool ok = torque * angle > 600.0;
        csv += std::to_string(torque) + "," + std::to_string(angle) + "," + (i % 3 == 0 ? "night" : "day") + "," + (ok ? "tight" : "loose") + "\n";
    }
    return csv;
}

}  // namespace

// ---------------------------------------------------------------------------
// Help

TEST_CASE("tenon train --help explains every option with its default") {
    const auto r = run({"train", "--help"});
    CHECK(r.status == 0);
    CHECK(r.err.empty());
    for (const char* option : {"--data",           "--target", "--task",     "--ignore",     "--split",  "--time-column", "--group-column",
                               "--fractions",      "--folds",  "--hidden",   "--activation", "--loss",   "--optimizer",   "--learning-rate",
                               "--epochs",         "--batch",  "--patience", "--ensemble",   "--search", "--refit",       "--class-weights",
                               "--target-scaling", "--seed",   "--threads",  "--metrics",    "--report", "--model",       "--quiet"}) {
        CAPTURE(std::string(option));
        CHECK(r.out.find(std::string("  ") + option + " ") != std::string::npos);
    }
    for (const char* default_text :
         {"default auto", "default 0.7,0.15,0.15", "(default: 64,32 under 8192", "(default relu)", "(default adam)", "default 0.001",
          "(default 1000;", "(default 32)", "(default 15", "(default 1)", "default 1),",
          "for at most SECONDS of wall-clock time, then train\n                         with the best as usual (default: off)",
          "the\n                         results are the same bits for every N"}) {
        CAPTURE(std::string(default_text));
        CHECK(r.out.find(default_text) != std::string::npos);
    }
}

TEST_CASE("tenon --help lists the commands; no arguments is a usage error") {
    const auto help = run({"--help"});
    CHECK(help.status == 0);
    CHECK(help.out.find("  train    train a perceptron") != std::string::npos);
    CHECK(help.out.find("Exit status") != std::string::npos);
    const auto bare = run({});
    CHECK(bare.status == tenon_cli::exit_bad_input);
    CHECK(bare.err.find("Usage: tenon COMMAND") != std::string::npos);
    CHECK(run({"help", "train"}).out == tenon_cli::train_help());
    CHECK(run({"--version"}).out == std::string("tenon ") + tenon::version_string() + "\n");
}

// ---------------------------------------------------------------------------
// Bad input: exit status 2, one line naming the problem, no output file

namespace {

// Runs a failing command with --metrics and --report in `dir`, checks the
// status, the exact message and that the directory holds only `before`.
void check_failure(const scratch_dir& dir, std::vector<std::string> args, const std::string& message, int status = 2) {
    const auto before = dir.listing();
    args.insert(args.end(), {"--metrics", dir.file("m.json"), "--report", dir.file("r.svg"), "--quiet"});
    const auto r = run(args);
    CHECK(r.status == status);
    CHECK(r.err == "tenon train: error: " + message + "\n");
    CHECK(r.out.empty());
    CHECK(dir.listing() == before);
}

}  // namespace

TEST_CASE("a missing data file is named") {
    scratch_dir dir("missing_file");
    const auto path = dir.file("absent.csv");
    check_failure(dir, {"train", "--data", path, "--target", "y"},
                  "[prep.file.open] --data '" + path + "': cannot read it (No such file or directory)");
}

TEST_CASE("an unknown column is named with the option and the columns") {
    scratch_dir dir("unknown_column");
    const auto path = dir.write("caps.csv", small_classification_csv());
    check_failure(dir, {"train", "--data", path, "--target", "verdikt"},
                  "[cli.column.unknown] " + path + ": --target names 'verdikt', which is not a column (columns: torque, angle, shift, verdict)");
    check_failure(dir, {"train", "--data", path, "--target", "verdict", "--ignore", "shift,operator"},
                  "[cli.column.unknown] " + path + ": --ignore names 'operator', which is not a column (columns: torque, angle, shift, verdict)");
    check_failure(dir, {"train", "--data", path, "--target", "amps", "--task", "regress"},
                  "[cli.column.unknown] " + path + ": --target names 'amps', which is not a column");
}

TEST_CASE("empty data is refused") {
    scratch_dir dir("empty_data");
    const auto header_only = dir.write("header.csv", "torque,angle,verdict\n");
    check_failure(dir, {"train", "--data", header_only, "--target", "verdict"},
                  "[cli.data.empty] " + header_only + ": no data rows below the header");
    const auto empty = dir.write("empty.csv", "");
    check_failure(dir, {"train", "--data", empty, "--target", "verdict"}, "[prep.csv.no_header] " + empty + ": no header row (the input is empty)");
    const auto no_targets = dir.write("no_targets.csv", "torque,verdict\n1.5,\n2.5,NA\n");
    check_failure(dir, {"train", "--data", no_targets, "--target", "verdict"},
                  "[cli.data.empty] " + no_targets + ": every row's target 'verdict' is missing");
}

TEST_CASE("a target with a single class is refused") {
    scratch_dir dir("single_class");
    const auto path = dir.write("one.csv", "torque,verdict\n1.5,tight\n2.5,tight\n,tight\n2.0,\n");
    check_failure(dir, {"train", "--data", path, "--target", "verdict"},
                  "[cli.target.single_class] " + path +
                      ": the target 'verdict' has a single class ('tight') in all 3 rows with a target; "
                      "classification needs at least 2");
}

TEST_CASE("an unparseable cell is named by file, line, column and value") {
    scratch_dir dir("bad_cell");
    // Column 'angle' is numbers except one typo on line 7 (the header is line 1).
    std::string csv = "torque,angle,verdict\n";
    for (int i = 0; i < 30; ++i)
        csv += std::to_string(1 + i % 3) + "," + (i == 5 ? std::string("3O5") : std::to_string(300 + i)) + "," + (i % 2 ? "tight" : "loose") + "\n";
    const auto path = dir.write("typo.csv", csv);
    check_failure(dir, {"train", "--data", path, "--target", "verdict"},
                  "[prep.cell.not_numeric] " + path + " line 7 column 2 ('angle'): '3O5' is not a finite number");
    // A regression target must be numeric in every row.
    const auto text_target = dir.write("text_target.csv", "torque,amps\n1,2.5\n2,high\n3,3.5\n");
    check_failure(dir, {"train", "--data", text_target, "--target", "amps", "--task", "regress"},
                  "[prep.cell.not_numeric] " + text_target + " line 3 column 2 ('amps'): 'high' is not a finite number");
    const auto ragged = dir.write("ragged.csv", "torque,amps\n1,2.5\n2,3.5,9\n");
    check_failure(dir, {"train", "--data", ragged, "--target", "amps"}, "[prep.csv.ragged] " + ragged + " line 3: expected 2 fields, found 3");
}

TEST_CASE("impossible fractions are refused before the data is read") {
    scratch_dir dir("fractions");
    const auto path = dir.write("caps.csv", small_classification_csv());
    check_failure(dir, {"train", "--data", path, "--target", "verdict", "--fractions", "0.5,0.25,0.5"},
                  "[cli.option.value] --fractions '0.5,0.25,0.5': the fractions sum to 1.25, not 1");
    check_failure(dir, {"train", "--data", path, "--target", "verdict", "--fractions", "0.7,0.3"},
                  "[cli.option.value] --fractions '0.7,0.3': expected three numbers TRAIN,VAL,TEST, found 2");
    check_failure(dir, {"train", "--data", path, "--target", "verdict", "--fractions", "1,0,0"},
                  "[cli.option.value] --fractions '1,0,0': train and test must lie strictly between 0 and 1, validation in [0, 1)");
    check_failure(dir, {"train", "--data", path, "--target", "verdict", "--fractions", "0.7,x,0.15"},
                  "[cli.option.value] --fractions 'x': not a finite number");
    // Possible fractions that leave a class too small for a stratified split:
    // the library says so, and the tool names the class by its label.
    const auto tiny = dir.write("tiny.csv", "torque,verdict\n1,tight\n2,tight\n3,loose\n4,loose\n5,tight\n");
    check_failure(dir, {"train", "--data", tiny, "--target", "verdict"},
                  "[prep.split.class_too_small] " + tiny +
                      ": stratified holdout: class 'loose' of the target 'verdict' has 2 rows, fewer than the 3 non-empty subsets");
}

TEST_CASE("unknown options, bad numbers and missing values are named") {
    scratch_dir dir("options");
    const auto path = dir.write("caps.csv", small_classification_csv());
    const std::vector<std::string> base{"train", "--data", path, "--target", "verdict"};
    auto with = [&](std::vector<std::string> extra) {
        auto a = base;
        a.insert(a.end(), extra.begin(), extra.end());
        return a;
    };
    check_failure(dir, with({"--epoch", "5"}), "[cli.option.unknown] unknown option '--epoch' for 'tenon train' (see tenon train --help)");
    check_failure(dir, with({"extra"}),
                  "[cli.option.unknown] unexpected argument 'extra' for 'tenon train' (options start with --; see tenon train --help)");
    check_failure(dir, with({"--epochs", "ten"}), "[cli.option.value] --epochs 'ten': not a whole number");
    check_failure(dir, with({"--epochs", "-3"}), "[cli.option.value] --epochs '-3': not a whole number");
    check_failure(dir, with({"--epochs", "0"}), "[cli.option.value] --epochs '0': must be at least 1");
    check_failure(dir, with({"--batch=12x"}), "[cli.option.value] --batch '12x': not a whole number");
    check_failure(dir, with({"--threads", "0"}), "[cli.option.value] --threads '0': must be at least 1");
    check_failure(dir, with({"--ensemble", "0"}), "[cli.option.value] --ensemble '0': must be at least 1");
    check_failure(dir, with({"--ensemble", "101"}), "[cli.option.value] --ensemble '101': at most 100 networks");
    check_failure(dir, with({"--folds", "1"}), "[cli.option.value] --folds '1': must be at least 2");
    check_failure(dir, with({"--search", "-1"}), "[cli.option.value] --search '-1': must be a positive number of seconds");
    check_failure(dir, with({"--search", "0"}), "[cli.option.value] --search '0': must be a positive number of seconds");
    check_failure(dir, with({"--search", "x"}), "[cli.option.value] --search 'x': not a finite number");
    check_failure(dir, with({"--search", "30", "--hidden", "8"}),
                  "[cli.option.conflict] --search chooses the hidden layers and the learning rate; it cannot be combined with --hidden");
    check_failure(dir, with({"--learning-rate", "0.01", "--search", "30"}),
                  "[cli.option.conflict] --search chooses the hidden layers and the learning rate; it cannot be combined with --learning-rate");
    check_failure(dir, with({"--search", "30", "--folds", "3"}),
                  "[cli.option.conflict] --search chooses the settings of one holdout run; it cannot be combined with --folds 3");
    check_failure(dir, with({"--hidden", "64,,32"}), "[cli.option.value] --hidden '64,,32': an empty width between commas");
    check_failure(dir, with({"--learning-rate", "fast"}), "[cli.option.value] --learning-rate 'fast': not a finite number");
    check_failure(dir, with({"--learning-rate", "-0.1"}), "[cli.option.value] --learning-rate '-0.1': must be positive");
    check_failure(dir, with({"--seed", "1e3"}), "[cli.option.value] --seed '1e3': not a whole number between 0 and 18446744073709551615");
    check_failure(dir, with({"--activation", "relu6"}),
                  "[cli.option.value] --activation 'relu6': not one of relu, leaky-relu, elu, tanh, sigmoid, softplus, gelu");
    check_failure(dir, with({"--optimizer", "sgd"}),
                  "[cli.option.value] --optimizer 'sgd': not one of gd, momentum, nesterov, adam, adamw, rmsprop, adagrad");
    check_failure(dir, with({"--task", "cluster"}), "[cli.option.value] --task 'cluster': not one of auto, classify, regress");
    check_failure(dir, with({"--split", "shuffled"}),
                  "[cli.option.value] --split 'shuffled': not one of auto, random, stratified, chronological, grouped");
    check_failure(dir, with({"--loss", "l2"}), "[cli.option.conflict] --loss l2 does not fit a classification target (use cross-entropy)");
    check_failure(dir, with({"--seed", "4", "--seed", "5"}), "[cli.option.conflict] --seed is given more than once");
    check_failure(dir, with({"--split", "chronological"}), "[cli.option.missing] --split chronological needs --time-column COLUMN");
    check_failure(dir, with({"--split", "stratified", "--task", "regress", "--ignore", "verdict,shift", "--target", "torque"}),
                  "[cli.option.conflict] --target is given more than once");
    check_failure(dir, with({"--time-column", "shift", "--split", "chronological"}),
                  "[cli.option.value] " + path + ": --time-column 'shift' holds text such as 'night', not numbers or dates");
    check_failure(dir, {"train", "--data", path, "--target", "torque", "--split", "stratified", "--ignore", "verdict"},
                  "[cli.option.conflict] --split stratified needs a classification target; 'torque' is regressed");
    check_failure(dir, {"train", "--target", "verdict"}, "[cli.option.missing] tenon train needs --data FILE.csv");
    check_failure(dir, {"train", "--data", path}, "[cli.option.missing] tenon train needs --target COLUMN");
    {
        // The value is missing: nothing follows the option (no --metrics here).
        const auto r = run(with({"--epochs"}));
        CHECK(r.status == 2);
        CHECK(r.err == "tenon train: error: [cli.option.missing] --epochs needs a value\n");
    }
    const auto r = run({"trian"});
    CHECK(r.status == 2);
    CHECK(r.err ==
          "tenon: error: [cli.command.unknown] unknown command 'trian' (commands: train, infer, inspect, retrain, drift; see tenon --help)\n");
}

TEST_CASE("an output file that cannot be written fails before training, with status 3") {
    scratch_dir dir("unwritable");
    const auto path = dir.write("caps.csv", small_classification_csv());
    const auto missing_dir = dir.file("no_such_dir/m.json");
    const auto r = run({"train", "--data", path, "--target", "verdict", "--metrics", missing_dir});
    CHECK(r.status == tenon_cli::exit_output_failed);
    CHECK(r.err ==
          "tenon train: error: [cli.output.write] --metrics '" + missing_dir + "': the directory '" +
              std::filesystem::path(missing_dir).parent_path().string() + "' does not exist\n");
    CHECK(r.out.empty());
    CHECK(dir.listing() == std::vector<std::string>{"caps.csv"});
}

TEST_CASE("a failed run leaves an existing output file unchanged") {
    scratch_dir dir("keep_old");
    const auto path = dir.write("one.csv", "torque,verdict\n1.5,tight\n2.5,tight\n");
    dir.write("m.json", "{\"old\": true}\n");
    const auto r = run({"train", "--data", path, "--target", "verdict", "--metrics", dir.file("m.json")});
    CHECK(r.status == 2);
    CHECK(read_file(dir.file("m.json")) == "{\"old\": true}\n");
    CHECK(dir.listing() == std::vector<std::string>{"m.json", "one.csv"});
}

// ---------------------------------------------------------------------------
// Output

TEST_CASE("the JSON writer escapes strings and writes non-finite numbers as null") {
    CHECK(tenon_cli::json_writer::escape("a\"b\\c\n\t\x01\xc3\xa9") == "a\\\"b\\\\c\\n\\t\\u0001\xc3\xa9");
    tenon_cli::json_writer j;
    j.open_object().number("nan", std::nan("")).number("inf", HUGE_VAL).number("third", 1.0 / 3.0).text("name", "x\"y").close_object();
    const auto m = json_flattener(j.finish()).values;
    CHECK(m.at("nan") == "null");
    CHECK(m.at("inf") == "null");
    CHECK(std::stod(m.at("third")) == 1.0 / 3.0);  // shortest round-trip text reads back exactly
    CHECK(m.at("name") == "x\"y");
}

TEST_CASE("--search chooses the settings by k-fold on the training rows within its budget; the metrics record it") {
    scratch_dir dir("search");
    const auto path = dir.write("caps.csv", small_classification_csv(200));
    // A clock a millisecond later at every reading: the search's times, and
    // with them its record, are the same on every run and machine.
    double now = 0.0;
    tenon_cli::cli_environment env;
    env.clock = [&now] { return now += 0.001; };
    const auto train = [&](const std::string& metrics, std::vector<std::string> extra) {
        std::vector<std::string> args{"train", "--data", path, "--target", "verdict", "--epochs", "10", "--metrics", dir.file(metrics)};
        args.insert(args.end(), extra.begin(), extra.end());
        now = 0.0;
        return cli_test::run_tool(args, env);
    };
    const auto r = train("m.json", {"--search", "1.5"});
    REQUIRE(r.status == 0);
    CHECK(r.err.empty());
    const auto m = read_metrics(dir.file("m.json"));
    CHECK(number_at(m, "search.budget_seconds") == 1.5);
    CHECK(number_at(m, "search.folds") == 3);
    CHECK(number_at(m, "search.candidates_listed") == 108);
    const auto tried = static_cast<std::size_t>(number_at(m, "search.candidates_tried"));
    CHECK(tried >= 2);  // each candidate takes a few hundred readings
    CHECK(tried < 108);  // the budget ended the search
    CHECK(number_at(m, "search.seconds") <= 1.5 + 0.05);
    // The defaults first; the chosen one has the lowest mean fold loss among
    // the complete candidates, or is the defaults (when the lowest does not
    // beat them by more than the folds' noise).
    CHECK(m.at("search.candidates.0.hidden.0") == "64");
    CHECK(m.at("search.candidates.0.hidden.1") == "32");
    CHECK(number_at(m, "search.candidates.0.learning_rate") == 0.001);
    CHECK(number_at(m, "search.candidates.0.weight_decay") == 0);
    double lowest = 1e300;
    for (std::size_t i = 0; i < tried; ++i) {
        const std::string c = "search.candidates." + std::to_string(i) + ".";
        CHECK(m.count(c + "seconds") == 1);
        CHECK(m.count(c + "fold_losses.0") == 1);
        if (m.at(c + "cut_short") == "false" && number_at(m, c + "folds_completed") == 3)
            lowest = std::min(lowest, number_at(m, c + "mean_fold_loss"));
    }
    const double chosen = number_at(m, "search.chosen.mean_fold_loss");
    CHECK((chosen == lowest || chosen == number_at(m, "search.candidates.0.mean_fold_loss")));
    CHECK(chosen >= lowest);
    CHECK(number_at(m, "search.candidates." + m.at("search.lowest") + ".mean_fold_loss") == lowest);
    CHECK(number_at(m, "search.candidates." + m.at("search.chosen_index") + ".mean_fold_loss") == chosen);
    // One summary line naming the choice, which the final fit used.
    std::string hidden = m.at("search.chosen.hidden.0");
    for (std::size_t k = 1; m.count("search.chosen.hidden." + std::to_string(k)); ++k)
        hidden += "," + m.at("search.chosen.hidden." + std::to_string(k));
    const std::string line = ", chose hidden " + hidden + ", learning rate " + tenon::number_to_text(number_at(m, "search.chosen.learning_rate")) +
        ", weight decay " + tenon::number_to_text(number_at(m, "search.chosen.weight_decay")) + "; mean fold loss ";
    CHECK(r.out.rfind("search: " + std::to_string(tried) + " candidates in ", 0) == 0);
    CHECK(r.out.find(line) != std::string::npos);
    // The same seed: the same search record.
    REQUIRE(train("again.json", {"--search", "1.5"}).status == 0);
    const auto again = read_metrics(dir.file("again.json"));
    for (const auto& kv : m) {
        if (kv.first.rfind("search.", 0) != 0) continue;
        CAPTURE(kv.first);
        CHECK(again.at(kv.first) == kv.second);
    }
    // Without --search: null, and no search line.
    const auto plain = train("plain.json", {});
    REQUIRE(plain.status == 0);
    CHECK(read_metrics(dir.file("plain.json")).at("search") == "null");
    CHECK(plain.out.find("search:") == std::string::npos);
}

TEST_CASE("classification metrics hold every documented field; the report has the confusion matrix") {
    scratch_dir dir("classification_fields");
    const auto path = dir.write("caps.csv", small_classification_csv(300));
    const auto r =
        run({"train", "--data", path, "--target", "verdict", "--epochs", "30", "--metrics", dir.file("m.json"), "--report", dir.file("r.svg")});
    REQUIRE(r.status == 0);
    CHECK(r.err.empty());
    const auto m = read_metrics(dir.file("m.json"));
    CHECK(m.at("task") == "classification");
    CHECK(m.at("split") == "stratified");
    CHECK(number_at(m, "rows.training") + number_at(m, "rows.validation") + number_at(m, "rows.test") + number_at(m, "rows.dropped") == 300);
    CHECK(std::abs(number_at(m, "rows.test") - 45.0) <= 1.0);  // 0.15 of each class, rounded per class
    CHECK(number_at(m, "epochs_run") >= 1);
    CHECK(number_at(m, "epochs_run") <= 30);
    CHECK((m.at("stop_reason") == "no_improvement" || m.at("stop_reason") == "epoch_limit"));
    CHECK(number_at(m, "training_seconds") >= 0);
    for (const char* subset : {"validation", "test"}) {
        for (const char* score : {"accuracy", "macro_f1", "log_loss"}) {
            CAPTURE(subset);
            CAPTURE(score);
            CHECK(m.count(std::string(subset) + "." + score) == 1);
        }
    }
    CHECK(number_at(m, "test.accuracy") > 0.8);
    // The plain baseline on the same rows (issue 19): its kind, its scores, and which of the two was shipped.
    CHECK(m.at("baseline.kind") == "logistic regression");
    CHECK(number_at(m, "baseline.test.rows") == number_at(m, "test.rows"));
    CHECK(number_at(m, "baseline.validation.rows") == number_at(m, "validation.rows"));
    CHECK(number_at(m, "ensemble") == 5);  // the default under 10,000 training rows
    CHECK((m.at("shipped") == "network" || m.at("shipped") == "baseline"));
    CHECK(r.out.find("baseline (logistic regression): accuracy ") != std::string::npos);
    CHECK(((m.at("classes.0") == "loose" && m.at("classes.1") == "tight") || (m.at("classes.0") == "tight" && m.at("classes.1") == "loose")));
    CHECK(m.count("per_epoch.0.training_loss") == 1);
    CHECK(m.count("per_epoch.0.validation_loss") == 1);
    CHECK(number_at(m, "per_epoch.0.epoch") == 1);
    CHECK(number_at(m, "per_epoch.0.learning_rate") > 0);
    for (const auto& kv : m) {  // every key spelled out
        CAPTURE(kv.first);
        CHECK(kv.first.find("val.") == std::string::npos);
        CHECK(kv.first.find("train_") == std::string::npos);
    }
    const std::string svg = read_file(dir.file("r.svg"));
    CHECK(svg.rfind("<?xml", 0) == 0);
    CHECK(svg.find("</svg>") != std::string::npos);
    CHECK(svg.find("loose") != std::string::npos);  // class names label the heat map
    CHECK(svg.find("Reliability (test)") != std::string::npos);  // the calibration's panel
    for (const char* score : {"set_coverage", "set_mean_size", "ece_uncalibrated", "ece"}) CHECK(m.count(std::string("test.") + score) == 1);
    CHECK(dir.listing() == std::vector<std::string>{"caps.csv", "m.json", "r.svg"});
    CHECK(r.out.find("metrics written to " + dir.file("m.json")) != std::string::npos);
}

TEST_CASE("regression metrics are in the target's units; missing targets are counted as dropped") {
    scratch_dir dir("regression_fields");
    tenon::random_engine rng(11);
    std::string csv = "speed,load,amps\n";
    for (int i = 0; i < 400; ++i) {
        const double speed = rng.uniform(500.0, 1500.0), load = rng.uniform(0.0, 1.0);
        const bool no_target = i % 40 == 0;
        csv += (i % 17 == 0 ? std::string("NA") : std::to_string(speed)) + "," + std::to_string(load) + "," +
            (no_target ? std::string("") : std::to_string(1000.0 + 0.5 * speed * load + rng.normal(0.0, 2.0))) + "\n";
    }
    const auto path = dir.write("motor.csv", csv);
    const auto r = run({"train", "--data", path, "--target", "amps", "--metrics", dir.file("m.json"), "--quiet"});
    REQUIRE(r.status == 0);
    CHECK(r.out.empty());
    const auto m = read_metrics(dir.file("m.json"));
    CHECK(m.at("task") == "regression");
    CHECK(m.at("split") == "random");
    CHECK(number_at(m, "rows.dropped") == 10);
    CHECK(number_at(m, "rows.training") + number_at(m, "rows.validation") + number_at(m, "rows.test") == 390);
    CHECK(number_at(m, "features") == 3);  // speed, its missing indicator, load
    for (const char* score : {"rmse", "mae", "r2"}) {
        CHECK(m.count(std::string("validation.") + score) == 1);
        CHECK(m.count(std::string("test.") + score) == 1);
    }
    // The target spreads over about 0..750 amps above 1000: an RMSE in scaled
    // units would be below 1, one in amps is not.
    CHECK(number_at(m, "test.rmse") > 1.0);
    CHECK(number_at(m, "test.r2") > 0.75);  // rows with the speed missing cannot be predicted well
    // amps grows with speed x load, which no linear function of speed and
    // load fits: the network beats the least-squares baseline (issue 19).
    CHECK(m.at("baseline.kind") == "ridge least squares");
    CHECK(number_at(m, "baseline.test.rows") == number_at(m, "test.rows"));
    CHECK(m.at("shipped") == "network");
    CHECK(number_at(m, "test.rmse") < number_at(m, "baseline.test.rmse"));
}

TEST_CASE("the same seed gives the same metrics apart from timings; another seed does not") {
    scratch_dir dir("determinism");
    const auto path = dir.write("caps.csv", small_classification_csv(300));
    auto metrics = [&](const std::string& seed, const std::string& name) {
        const auto r =
            run({"train", "--data", path, "--target", "verdict", "--epochs", "25", "--seed", seed, "--metrics", dir.file(name), "--quiet"});
        REQUIRE(r.status == 0);
        auto m = read_metrics(dir.file(name));
        REQUIRE(m.erase("training_seconds") == 1);
        return m;
    };
    const auto first = metrics("42", "a.json"), second = metrics("42", "b.json"), other = metrics("43", "c.json");
    CHECK(first == second);
    CHECK(first.at("per_epoch.0.training_loss") != other.at("per_epoch.0.training_loss"));
}

// 64 x 128 x 64 products are above the size gemm splits across threads.
TEST_CASE("--threads splits the products across threads and gives the same metrics as one thread") {
    // tenon's own kernels; with the BLAS backend each band is a BLAS call,
    // whose bits tenon does not promise (see --help).
    const on_builtin_kernels builtin;
    scratch_dir dir("threads");
    const auto path = dir.write("caps.csv", small_classification_csv(300));
    auto metrics = [&](const std::string& threads, const std::string& name) {
        const auto r = run({"train", "--data", path, "--target", "verdict", "--epochs", "10", "--hidden", "128,64", "--batch", "64", "--threads",
                            threads, "--metrics", dir.file(name), "--quiet"});
        REQUIRE(r.status == 0);
        auto m = read_metrics(dir.file(name));
        REQUIRE(m.erase("training_seconds") == 1);
        return m;
    };
    const auto one = metrics("1", "one.json");
    CHECK(one == metrics("2", "two.json"));
    CHECK(one == metrics("3", "three.json"));
}

TEST_CASE("cross-validation reports the mean and spread over folds") {
    scratch_dir dir("folds");
    const auto path = dir.write("caps.csv", small_classification_csv(300));
    const auto r = run({"train", "--data", path, "--target", "verdict", "--folds", "3", "--epochs", "20", "--metrics", dir.file("m.json")});
    REQUIRE(r.status == 0);
    const auto m = read_metrics(dir.file("m.json"));
    CHECK(number_at(m, "folds") == 3);
    CHECK(m.count("epochs_run.2") == 1);
    double mean = 0;
    for (int f = 0; f < 3; ++f) mean += number_at(m, "per_fold." + std::to_string(f) + ".accuracy") / 3.0;
    CHECK(number_at(m, "test.accuracy") == doctest::Approx(mean));
    CHECK(number_at(m, "test_spread.accuracy") >= 0);
    CHECK(number_at(m, "per_fold.0.rows") + number_at(m, "per_fold.1.rows") + number_at(m, "per_fold.2.rows") == 300);
    CHECK(r.out.find("fold 3 of 3 | epoch 1 of 20 | training loss ") != std::string::npos);
    CHECK(r.out.find("3 folds") != std::string::npos);
    // A report draws one holdout run only.
    const auto both = run({"train", "--data", path, "--target", "verdict", "--folds", "3", "--report", dir.file("r.svg")});
    CHECK(both.status == 2);
    CHECK(both.err == "tenon train: error: [cli.option.conflict] --report draws one holdout run; it cannot be combined with --folds 3\n");
}

TEST_CASE("progress: a redrawn line on a terminal, one line per epoch elsewhere, nothing with --quiet") {
    scratch_dir dir("progress");
    const auto path = dir.write("caps.csv", small_classification_csv(200));
    const std::vector<std::string> args{"train", "--data", path, "--target", "verdict", "--epochs", "6", "--patience", "0"};
    const auto plain = run(args, false);
    REQUIRE(plain.status == 0);
    CHECK(plain.out.find('\r') == std::string::npos);
    for (int e = 1; e <= 6; ++e) CHECK(plain.out.find("epoch " + std::to_string(e) + " of 6 | training loss ") != std::string::npos);
    CHECK(plain.out.find(" | validation loss ") != std::string::npos);
    CHECK(plain.out.find(" | validation accuracy ") != std::string::npos);
    CHECK(plain.out.find("  accuracy  ") != std::string::npos);  // the summary table
    CHECK(plain.out.find("6 epochs in ") != std::string::npos);

    const auto terminal = run(args, true);
    REQUIRE(terminal.status == 0);
    CHECK(terminal.out.find("\repoch 6 of 6 <######################> training loss ") != std::string::npos);
    CHECK(terminal.out.find(" more") != std::string::npos);
    CHECK(terminal.out.find("epoch 1 of 6 | training loss") == std::string::npos);

    auto quiet_args = args;
    quiet_args.push_back("--quiet");
    const auto quiet = run(quiet_args, true);
    CHECK(quiet.status == 0);
    CHECK(quiet.out.empty());
    CHECK(quiet.err.empty());
}

TEST_CASE("chronological and grouped splits keep time order and whole groups") {
    scratch_dir dir("policies");
    tenon::random_engine rng(3);
    std::string csv = "day,line,temp,amps\n";
    for (int i = 0; i < 300; ++i) {
        const double temp = rng.uniform(10.0, 30.0);
        csv += std::to_string(299 - i) + ",L" + std::to_string(i % 10) + "," + std::to_string(temp) + "," +
            std::to_string(2 * temp + rng.normal(0.0, 0.5)) + "\n";
    }
    const auto path = dir.write("log.csv", csv);
    const auto c = run({"train", "--data", path, "--target", "amps", "--split", "chronological", "--time-column", "day", "--epochs", "10",
                        "--metrics", dir.file("c.json"), "--quiet"});
    REQUIRE(c.status == 0);
    const auto cm = read_metrics(dir.file("c.json"));
    CHECK(cm.at("split") == "chronological");
    CHECK(number_at(cm, "features") == 11);  // line (10 one-hot slots) and temp: the time column is not a feature
    // "day" falls by one on every row, a counter the tool leaves out unless --use keeps it.
    const auto g = run({"train", "--data", path, "--target", "amps", "--split", "grouped", "--group-column", "line", "--epochs", "10", "--use", "day",
                        "--metrics", dir.file("g.json"), "--quiet"});
    REQUIRE(g.status == 0);
    const auto gm = read_metrics(dir.file("g.json"));
    CHECK(gm.at("split") == "grouped");
    CHECK(number_at(gm, "features") == 2);  // day and temp
    CHECK(static_cast<long>(number_at(gm, "rows.test")) % 30 == 0);  // whole lines of 30 rows each

    // --search's folds of the training rows keep the same rules: no fold
    // trains on a later day than it is scored on, or on a line it is scored on.
    const auto folds_of = [&](const std::vector<std::string>& split_args) {
        std::vector<std::string> args = {"--data", path, "--target", "amps", "--search", "5", "--use", "day"};
        args.insert(args.end(), split_args.begin(), split_args.end());
        const tenon_cli::train_request q = tenon_cli::parse_train_request(args);
        const tenon::table t = tenon_cli::load_table(q);
        const tenon_cli::training_setup s = tenon_cli::make_setup(t, q);
        const tenon::holdout_split split = tenon_cli::make_holdout(t, q, s);
        const std::vector<tenon::fold> folds = tenon_cli::search_folds(t, q, s, split.train);
        for (const auto& f : folds)
            for (const auto* part : {&f.train, &f.test})
                for (auto r : *part) CHECK(std::find(split.train.begin(), split.train.end(), r) != split.train.end());
        return folds;
    };
    const auto day = [](std::size_t row) { return 299 - static_cast<long>(row); };
    const auto by_time = folds_of({"--split", "chronological", "--time-column", "day"});
    REQUIRE(by_time.size() == 3);
    for (const auto& f : by_time) {
        REQUIRE(!f.train.empty());
        REQUIRE(!f.test.empty());
        long latest_train = -1, earliest_test = 1000;
        for (auto r : f.train) latest_train = std::max(latest_train, day(r));
        for (auto r : f.test) earliest_test = std::min(earliest_test, day(r));
        CHECK(latest_train < earliest_test);
    }
    const auto by_line = folds_of({"--split", "grouped", "--group-column", "line"});
    REQUIRE(by_line.size() == 3);
    for (const auto& f : by_line) {
        std::set<std::size_t> train_lines;
        for (auto r : f.train) train_lines.insert(r % 10);
        for (auto r : f.test) CHECK(train_lines.count(r % 10) == 0);
    }
    CHECK(folds_of({"--split", "random"}).empty());  // the search draws its own folds

    // Too few groups for the search's three folds: the error names --search
    // and the column, and keeps the split's reason and code.
    std::string few = "line,temp,amps\n";
    for (int i = 0; i < 200; ++i)
        few += std::string(i % 4 == 0       ? "A"
                               : i % 4 == 1 ? "B"
                               : i % 4 == 2 ? "C"
                                            : "D") +
            "," + std::to_string(i % 17) + "," + std::to_string(i % 13) + "\n";
    const auto few_path = dir.write("few.csv", few);
    const auto f = run({"train", "--data", few_path, "--target", "amps", "--split", "grouped", "--group-column", "line", "--search", "4", "--epochs",
                        "2", "--quiet"});
    CHECK(f.status == tenon_cli::exit_bad_input);
    CHECK(f.err.find("[prep.split.single_group] --search: its 3 folds of the") != std::string::npos);
    CHECK(f.err.find("by --group-column 'line'") != std::string::npos);
    CHECK(f.err.find("cannot fill 3 folds") != std::string::npos);
}

// ---------------------------------------------------------------------------
// Baselines: with no tuning flags the tool beats a linear model on the same
// training rows by a clear margin.

namespace {

// The tool's own split and preparation for `args`, so the baseline sees the
// same training rows and the same encoded, imputed, scaled features.
struct prepared_split {
    bool classify = false;
    Eigen::MatrixXd train_x, test_x;
    Eigen::VectorXd train_y, test_y;  // regression: original units
    std::vector<std::size_t> train_class, test_class;  // classification
    std::size_t classes = 0;
};

prepared_split prepare_like_the_tool(const std::vector<std::string>& args) {
    const tenon_cli::train_request q = tenon_cli::parse_train_request(args);
    const tenon::table t = tenon_cli::load_table(q);
    tenon_cli::training_setup s = tenon_cli::make_setup(t, q);
    const tenon::holdout_split split = tenon_cli::make_holdout(t, q, s);
    const tenon::measured_plan plan = s.preparation.measure(t, split.train);
    prepared_split p;
    p.classify = s.classify;
    p.classes = plan.class_count();
    auto convert = [&](const std::vector<std::size_t>& rows, Eigen::MatrixXd& x, Eigen::VectorXd& y, std::vector<std::size_t>& c) {
        const auto prepared = plan.apply<double>(t, rows);
        const std::size_t n = prepared.features.shape()[0], d = prepared.features.shape()[1];
        x.resize(static_cast<Eigen::Index>(n), static_cast<Eigen::Index>(d + 1));
        y.resize(static_cast<Eigen::Index>(n));
        for (std::size_t i = 0; i < n; ++i) {
            for (std::size_t j = 0; j < d; ++j) x(static_cast<Eigen::Index>(i), static_cast<Eigen::Index>(j)) = prepared.features(i, j);
            x(static_cast<Eigen::Index>(i), static_cast<Eigen::Index>(d)) = 1.0;  // intercept
            if (s.classify)
                c.push_back(prepared.classes[i]);
            else
                y(static_cast<Eigen::Index>(i)) = plan.restore_target(prepared.targets(i, 0));
        }
    };
    convert(split.train, p.train_x, p.train_y, p.train_class);
    convert(split.test, p.test_x, p.test_y, p.test_class);
    return p;
}

// Ordinary least squares by a column-pivoting QR decomposition (Golub & Van
// Loan 2013, section 5.4.1); returns the test RMSE.
double least_squares_test_rmse(const prepared_split& p) {
    const Eigen::VectorXd w = p.train_x.colPivHouseholderQr().solve(p.train_y);
    const Eigen::VectorXd residual = p.test_x * w - p.test_y;
    return std::sqrt(residual.squaredNorm() / static_cast<double>(residual.size()));
}

// Multinomial logistic regression by full-batch gradient descent on the mean
// cross-entropy with a small L2 penalty (Bishop 2006, section 4.3.4, eq.
// 4.109 for the gradient); the loss is convex, so enough steps reach its
// minimum. Returns the test accuracy.
double logistic_test_accuracy(const prepared_split& p) {
    const Eigen::Index n = p.train_x.rows(), d = p.train_x.cols(), k = static_cast<Eigen::Index>(p.classes);
    Eigen::MatrixXd onehot = Eigen::MatrixXd::Zero(n, k);
    for (Eigen::Index i = 0; i < n; ++i) onehot(i, static_cast<Eigen::Index>(p.train_class[static_cast<std::size_t>(i)])) = 1.0;
    Eigen::MatrixXd w = Eigen::MatrixXd::Zero(d, k);
    const double step = 0.5, penalty = 1e-4;
    auto softmax = [](Eigen::MatrixXd z) {
        for (Eigen::Index i = 0; i < z.rows(); ++i) {
            z.row(i).array() -= z.row(i).maxCoeff();
            z.row(i) = z.row(i).array().exp().matrix();
            z.row(i) /= z.row(i).sum();
        }
        return z;
    };
    for (int iteration = 0; iteration < 3000; ++iteration) {
        const Eigen::MatrixXd probabilities = softmax(p.train_x * w);
        const Eigen::MatrixXd gradient = p.train_x.transpose() * (probabilities - onehot) / static_cast<double>(n) + penalty * w;
        w -= step * gradient;
    }
    const Eigen::MatrixXd scores = p.test_x * w;
    std::size_t correct = 0;
    for (Eigen::Index i = 0; i < scores.rows(); ++i) {
        Eigen::Index best = 0;
        scores.row(i).maxCoeff(&best);
        correct += static_cast<std::size_t>(best) == p.test_class[static_cast<std::size_t>(i)];
    }
    return static_cast<double>(correct) / static_cast<double>(scores.rows());
}

// Invented: a rotary dryer's exhaust temperature [deg C] from burner fuel
// rate, air ratio, feed moisture and drum speed; the air ratio acts through
// a combustion optimum and moisture interacts with the drum speed.
std::string dryer_csv(std::size_t rows, std::uint64_t seed) {
    tenon::random_engine rng(seed);
    std::string csv = "fuel_rate,air_ratio,feed_moisture,drum_rpm,exhaust_temp\n";
    for (std::size_t i = 0; i < rows; ++i) {
        const double fuel = rng.uniform(0.5, 1.5), air = rng.uniform(0.8, 1.6), moisture = rng.uniform(0.05, 0.35), rpm = rng.uniform(2.0, 8.0);
        const double efficiency = std::exp(-std::pow((air - 1.15) / 0.18, 2));
        const double temp =
            120.0 + 90.0 * fuel * efficiency - 160.0 * moisture * std::sin(0.5 * rpm) + 6.0 * std::cos(2.0 * rpm) + rng.normal(0.0, 2.0);
        csv += std::to_string(fuel) + "," + std::to_string(air) + "," + std::to_string(moisture) + "," + std::to_string(rpm) + "," +
            std::to_string(temp) + "\n";
    }
    return csv;
}

// Invented: drying time [min] of a paint booth coat from booth temperature,
// humidity, film thickness, paint type and airflow (airflow sensor readings
// are missing in about 5% of the rows, some drying times too).
std::string paint_csv(std::size_t rows, std::uint64_t seed) {
    tenon::random_engine rng(seed);
    const char* paints[] = {"waterborne", "solvent", "two_component"};
    const double paint_factor[] = {1.6, 1.0, 0.6};
    std::string csv = "booth_temp_c,humidity_pct,film_um,paint,airflow_m_s,dry_minutes\n";
    for (std::size_t i = 0; i < rows; ++i) {
        const double temp = rng.uniform(15.0, 40.0), humidity = rng.uniform(20.0, 85.0), film = rng.uniform(40.0, 160.0),
                     airflow = rng.uniform(0.2, 1.5);
        const std::size_t paint = static_cast<std::size_t>(rng.below(3));
        // Waterborne paint slows down sharply with humidity; all coats dry faster when warm and ventilated.
        const double humidity_effect = paint == 0 ? std::exp(0.035 * (humidity - 50.0)) : 1.0 + 0.004 * (humidity - 50.0);
        const double minutes =
            paint_factor[paint] * film * humidity_effect * std::exp(-0.045 * (temp - 25.0)) / std::sqrt(airflow) / 4.0 + rng.normal(0.0, 1.0);
        const bool airflow_missing = rng.uniform01() < 0.05, target_missing = rng.uniform01() < 0.01;
        csv += std::to_string(temp) + "," + std::to_string(humidity) + "," + std::to_string(film) + "," + paints[paint] + "," +
            (airflow_missing ? std::string() : std::to_string(airflow)) + "," + (target_missing ? std::string("NA") : std::to_string(minutes)) + "\n";
    }
    return csv;
}

// Invented: the seal quality of a packaging line's sealing jaws (weak, good,
// burnt) from jaw temperature, dwell time, jaw pressure and film type. The
// heat dose is nonlinear in temperature and dwell, and the good window moves
// with the pressure and the film.
std::string seal_csv(std::size_t rows, std::uint64_t seed) {
    tenon::random_engine rng(seed);
    const char* films[] = {"PE", "PP", "laminate"};
    const double film_shift[] = {0.0, 0.6, -0.6};
    std::string csv = "jaw_temp_c,dwell_s,pressure_bar,film,seal\n";
    for (std::size_t i = 0; i < rows; ++i) {
        const double temp = rng.uniform(130.0, 190.0), dwell = rng.uniform(0.1, 0.9), pressure = rng.uniform(2.0, 6.0);
        const std::size_t film = static_cast<std::size_t>(rng.below(3));
        const double s = (temp - 160.0) / 15.0, d = (dwell - 0.5) / 0.2, p = (pressure - 4.0) / 1.0;
        const double dose = s + d + 0.5 * s * d;
        const double centre = 1.5 * std::sin(2.0 * p) + film_shift[film];
        std::string seal = dose < centre - 0.8 ? "weak" : dose > centre + 0.8 ? "burnt" : "good";
        if (rng.uniform01() < 0.03) seal = film % 2 ? "good" : "weak";  // mislabelled by the inspectors
        csv += std::to_string(temp) + "," + std::to_string(dwell) + "," + std::to_string(pressure) + "," + films[film] + "," + seal + "\n";
    }
    return csv;
}

}  // namespace

TEST_CASE("baseline: dryer exhaust temperature, test RMSE at most 0.6x least squares") {
    scratch_dir dir("baseline_dryer");
    const auto path = dir.write("dryer.csv", dryer_csv(3000, 101));
    const std::vector<std::string> args{"--data", path, "--target", "exhaust_temp"};
    const double linear_rmse = least_squares_test_rmse(prepare_like_the_tool(args));
    std::vector<std::string> cli{"train", "--data", path, "--target", "exhaust_temp", "--metrics", dir.file("m.json"), "--quiet"};
    REQUIRE(run(cli).status == 0);
    const double network_rmse = number_at(read_metrics(dir.file("m.json")), "test.rmse");
    MESSAGE("dryer: network test RMSE " << network_rmse << ", least squares " << linear_rmse << ", ratio " << network_rmse / linear_rmse);
    CHECK(network_rmse <= 0.6 * linear_rmse);
}

TEST_CASE("baseline: paint drying time with a category and missing cells, test RMSE at most 0.6x least squares") {
    scratch_dir dir("baseline_paint");
    const auto path = dir.write("paint.csv", paint_csv(3000, 202));
    const std::vector<std::string> args{"--data", path, "--target", "dry_minutes"};
    const double linear_rmse = least_squares_test_rmse(prepare_like_the_tool(args));
    std::vector<std::string> cli{"train", "--data", path, "--target", "dry_minutes", "--metrics", dir.file("m.json"), "--quiet"};
    REQUIRE(run(cli).status == 0);
    const auto m = read_metrics(dir.file("m.json"));
    const double network_rmse = number_at(m, "test.rmse");
    MESSAGE("paint: network test RMSE " << network_rmse << ", least squares " << linear_rmse << ", ratio " << network_rmse / linear_rmse);
    CHECK(number_at(m, "rows.dropped") > 0);
    CHECK(network_rmse <= 0.6 * linear_rmse);
}

TEST_CASE("baseline: seal quality, test accuracy at least 0.1 above logistic regression") {
    scratch_dir dir("baseline_seal");
    const auto path = dir.write("seal.csv", seal_csv(3000, 303));
    const std::vector<std::string> args{"--data", path, "--target", "seal"};
    const double logistic_accuracy = logistic_test_accuracy(prepare_like_the_tool(args));
    std::vector<std::string> cli{"train", "--data", path, "--target", "seal", "--metrics", dir.file("m.json"), "--quiet"};
    REQUIRE(run(cli).status == 0);
    const double network_accuracy = number_at(read_metrics(dir.file("m.json")), "test.accuracy");
    MESSAGE("seal: network test accuracy " << network_accuracy << ", logistic " << logistic_accuracy);
    CHECK(network_accuracy >= logistic_accuracy + 0.1);
}

TEST_CASE("--refit: the model is refit on training + validation rows after calibrating; validation scores are of the model before") {
    scratch_dir dir("refit");
    const auto path = dir.write("dryer.csv", dryer_csv(400, 404));
    const std::vector<std::string> base{"train", "--data", path, "--target", "exhaust_temp", "--hidden", "16", "--ensemble", "2"};
    auto with = [&](std::vector<std::string> extra, const std::string& json) {
        std::vector<std::string> args = base;
        args.insert(args.end(), extra.begin(), extra.end());
        args.insert(args.end(), {"--metrics", dir.file(json)});
        return run(args);
    };
    const auto automatic = with({"--model", dir.file("auto.tnm")}, "auto.json");  // 400 rows: under 5,000, so on by default
    const auto off = with({"--refit", "off", "--model", dir.file("off.tnm")}, "off.json");
    const auto on = with({"--refit", "on"}, "on.json");
    REQUIRE(automatic.status == 0);
    REQUIRE(off.status == 0);
    REQUIRE(on.status == 0);
    const auto a = read_metrics(dir.file("auto.json")), o = read_metrics(dir.file("off.json")), n = read_metrics(dir.file("on.json"));
    CHECK(number_at(a, "refit.rows") == number_at(a, "rows.training") + number_at(a, "rows.validation"));
    CHECK(a.count("refit.steps.0") == 1);
    CHECK(a.count("refit.steps.1") == 1);
    CHECK(a.count("refit.steps.2") == 0);  // one per network
    CHECK(number_at(a, "refit.steps.0") > 0);
    CHECK(o.at("refit") == "null");
    CHECK(a.at("target_scaling") == "z-score");
    // The same validated run: equal validation scores and calibration, other test scores.
    for (const char* key : {"validation.rmse", "validation.r2", "calibration.interval.half_width", "baseline.validation.rmse", "best_epoch"}) {
        CAPTURE(key);
        if (a.count(key) == 0) continue;
        CHECK(a.at(key) == o.at(key));
    }
    CHECK(a.count("validation.rmse") == 1);
    CHECK(a.at("test.rmse") != o.at("test.rmse"));
    CHECK(a.at("test.rmse") == n.at("test.rmse"));  // auto is on here
    CHECK(a.at("baseline.test.rmse") != o.at("baseline.test.rmse"));  // the ridge line refit too
    CHECK(automatic.out.find("refit on " + a.at("refit.rows") + " training + validation rows (") != std::string::npos);
    CHECK(automatic.out.find("the validation scores and the calibration are of the model before the refit\n") != std::string::npos);
    CHECK(off.out.find("refit on") == std::string::npos);
    // The model file's settings say so (tenon inspect shows them).
    const auto inspected = json_flattener(run({"inspect", "--model", dir.file("auto.tnm"), "--json"}).out).values;
    CHECK(inspected.at("settings.refit") == a.at("refit.rows") + " rows; steps " + a.at("refit.steps.0") + "," + a.at("refit.steps.1"));
    CHECK(json_flattener(run({"inspect", "--model", dir.file("off.tnm"), "--json"}).out).values.at("settings.refit") == "off");
    check_failure(dir, {"train", "--data", path, "--target", "exhaust_temp", "--refit", "maybe"},
                  "[cli.option.value] --refit 'maybe': not one of auto, on, off");
}

TEST_CASE("--class-weights and --target-scaling: reported, and refused for the other kind of target") {
    scratch_dir dir("weights_and_scaling");
    const auto caps = dir.write("caps.csv", small_classification_csv(300));
    const auto dryer = dir.write("dryer.csv", dryer_csv(300, 405));
    REQUIRE(run({"train", "--data", caps, "--target", "verdict", "--epochs", "5", "--class-weights", "balanced", "--metrics", dir.file("c.json"),
                 "--quiet"})
                .status == 0);
    CHECK(read_metrics(dir.file("c.json")).at("class_weights") == "balanced");
    REQUIRE(run({"train", "--data", dryer, "--target", "exhaust_temp", "--epochs", "5", "--target-scaling", "median-iqr", "--metrics",
                 dir.file("r.json"), "--quiet"})
                .status == 0);
    CHECK(read_metrics(dir.file("r.json")).at("target_scaling") == "median-iqr");
    check_failure(dir, {"train", "--data", dryer, "--target", "exhaust_temp", "--class-weights", "balanced"},
                  "[cli.option.conflict] --class-weights balanced needs a classification target; 'exhaust_temp' is regressed");
    check_failure(dir, {"train", "--data", caps, "--target", "verdict", "--target-scaling", "median-iqr"},
                  "[cli.option.conflict] --target-scaling median-iqr needs a regression target; 'verdict' is classified");
}
