// Tests of the model commands of the `tenon` tool (examples/cli/, library tenon_tool), run
// in process: `tenon train --model`, `tenon infer` and `tenon inspect`. The
// predictions of `tenon infer` are compared bit for bit with the trainer's
// own path (the stored plan applied to the table, the rebuilt network's
// outputs, softmax or the target's inverse scaling); every error path checks
// its exact message and that no output file is left behind.
#include <doctest/doctest.h>

#include <algorithm>
#include <cmath>
#include <cstdlib>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <limits>
#include <sstream>
#include <string>
#include <vector>

#include "cli_test_support.hpp"

namespace fs = std::filesystem;

namespace {

using cli_test::cli_result;
using cli_test::on_builtin_kernels;

cli_result run(std::vector<std::string> args) { return cli_test::run_tool(std::move(args)); }

// A fresh, empty directory per test case.
struct scratch_dir : cli_test::scratch_dir {
    explicit scratch_dir(const std::string& name) : cli_test::scratch_dir("tenon_cli_model_tests_", name) {}
};

using cli_test::read_file;

// Every record of a CSV file as field texts (the header first), read with
// the library's reader, so quoted fields come back unquoted.
std::vector<std::vector<std::string>> read_records(const std::string& path) {
    std::ifstream in(path, std::ios::binary);
    tenon::csv_record_reader reader(in, ',', path);
    std::vector<std::vector<std::string>> records;
    while (reader.next()) {
        records.emplace_back();
        for (std::size_t k = 0; k < reader.field_count(); ++k) records.back().emplace_back(reader.field(k));
    }
    return records;
}

bool same_bits(float a, float b) {
    std::uint32_t x, y;
    std::memcpy(&x, &a, 4);
    std::memcpy(&y, &b, 4);
    return x == y;
}

// Invented: a filling line's cap check (tight or loose) from the closing
// torque and angle, by shift; each cap has an id.
std::string caps_csv(std::size_t rows, std::uint64_t seed) {
    tenon::random_engine rng(seed);
    std::string csv = "cap_id,torque,angle,shift,verdict\n";
    for (std::size_t i = 0; i < rows; ++i) {
        const double torque = rng.uniform(1.0, 3.0), angle = rng.uniform(200.0, 400.0);
        const bool ok = torque * angle > 600.0;
        csv += "C" + std::to_string(1000 + i) + "," + std::to_string(torque) + "," + std::to_string(angle) + "," + (i % 3 == 0 ? "night" : "day") +
            "," + (ok ? "tight" : "loose") + "\n";
    }
    return csv;
}

// Invented: a motor's current from its speed (missing in some rows) and load.
std::string motor_csv(std::size_t rows, std::uint64_t seed) {
    tenon::random_engine rng(seed);
    std::string csv = "speed,load,amps\n";
    for (std::size_t i = 0; i < rows; ++i) {
        const double speed = rng.uniform(500.0, 1500.0), load = rng.uniform(0.0, 1.0);
        csv += (i % 17 == 0 ? std::string("NA") : std::to_string(speed)) + "," + std::to_string(load) + "," +
            std::to_string(10.0 + 0.01 * speed * load + rng.normal(0.0, 0.2)) + "\n";
    }
    return csv;
}

// The table and holdout split `tenon train` uses for these arguments.
struct tool_view {
    tenon::table table;
    tenon::holdout_split split;
};

tool_view split_like_the_tool(const std::vector<std::string>& train_args) {
    const tenon_cli::train_request q = tenon_cli::parse_train_request(train_args);
    tool_view v{tenon_cli::load_table(q), {}};
    const tenon_cli::training_setup s = tenon_cli::make_setup(v.table, q);
    v.split = tenon_cli::make_holdout(v.table, q, s);
    return v;
}

// The trainer's path for every row of `t`: the stored plan, the rebuilt
// network's outputs (train/trainer.hpp network_outputs), then softmax (of
// the logits over the stored temperature, train/calibration.hpp, when the
// file is calibrated) or the inverse target scaling, as predict_prepared in
// train/workflow.hpp does.
tenon::matrix<float> trainer_predictions(const std::string& model_path, const tenon::table& t) {
    const tenon::model_file<float> file = tenon::load_model_file<float>(model_path);
    std::vector<std::size_t> rows(t.row_count());
    for (std::size_t r = 0; r < rows.size(); ++r) rows[r] = r;
    tenon::matrix<float> features;
    file.plan->apply_features(t, rows, features);
    // A seed ensemble's mean: each member's probabilities (or prepared
    // values) summed in member order and divided by the count, as fit_model
    // does. A calibrated single network's probabilities are softmax(logits /
    // temperature); a calibrated ensemble's are softmax(log(mean) /
    // temperature) (train/calibration.hpp, ensemble_outputs).
    const bool classify = file.plan->target_type() == tenon::target_kind::classification;
    const tenon::class_calibration* classes = file.calibration && file.calibration->classes ? &*file.calibration->classes : nullptr;
    const bool one = file.members.empty();
    tenon::matrix<float> out;
    for (std::size_t m = 0; m <= file.members.size(); ++m) {
        tenon::network<float> net = tenon::rebuild_member(file, m);
        tenon::matrix<float> member = tenon::network_outputs(net, features);
        if (classify) member = one && classes ? tenon::tempered_softmax_rows(member, classes->temperature) : tenon::softmax_rows(member);
        if (m == 0)
            out = member;
        else
            for (std::size_t k = 0; k < out.size(); ++k) out.data()[k] += member.data()[k];
    }
    if (!one)
        for (std::size_t k = 0; k < out.size(); ++k) out.data()[k] /= static_cast<float>(file.members.size() + 1);
    if (classify && !one && classes) {
        for (std::size_t k = 0; k < out.size(); ++k) out.data()[k] = std::log(std::max(out.data()[k], std::numeric_limits<float>::min()));
        return tenon::tempered_softmax_rows(out, classes->temperature);
    }
    if (classify) return out;
    for (std::size_t k = 0; k < out.size(); ++k) out.data()[k] = static_cast<float>(file.plan->restore_target(static_cast<double>(out.data()[k])));
    return out;
}

}  // namespace

// ---------------------------------------------------------------------------
// train --model, then infer

TEST_CASE("infer reproduces the trained classifier's predictions to the last bit and its test accuracy exactly") {
    // infer predicts in batches of 64 rows, the trainer's outputs below come
    // in one chunk of 400: the same bits on tenon's own kernels.
    const on_builtin_kernels builtin;
    scratch_dir dir("classify_roundtrip");
    const auto data = dir.write("caps.csv", caps_csv(400, 21));
    const std::vector<std::string> train_args{"--data", data, "--target", "verdict", "--ignore", "cap_id", "--epochs", "25", "--seed", "7"};
    std::vector<std::string> train{"train"};
    train.insert(train.end(), train_args.begin(), train_args.end());
    train.insert(train.end(), {"--model", dir.file("caps.tnm"), "--quiet"});
    const auto t = run(train);
    REQUIRE(t.status == 0);
    CHECK(t.out.empty());
    CHECK(dir.listing() == std::vector<std::string>{"caps.csv", "caps.tnm"});

    const auto r = run({"infer", "--model", dir.file("caps.tnm"), "--data", data, "--out", dir.file("p.csv"), "--keep", "cap_id"});
    REQUIRE(r.status == 0);
    CHECK(r.err.empty());
    CHECK(r.out.rfind("predicted 400 rows (", 0) == 0);
    const auto records = read_records(dir.file("p.csv"));
    REQUIRE(records.size() == 401);
    const tenon::model_file<float> file = tenon::load_model_file<float>(dir.file("caps.tnm"));
    const std::vector<std::string> classes = file.plan->class_names();
    REQUIRE(classes.size() == 2);
    CHECK(records[0] ==
          std::vector<std::string>{"cap_id", "predicted", "p(" + classes[0] + ")", "p(" + classes[1] + ")", "likely_classes", "out_of_range"});
    REQUIRE(file.calibration);
    REQUIRE(file.calibration->classes);
    CHECK(file.calibration->classes->coverage == 0.9);
    CHECK(file.calibration->classes->rows == file.metadata->validation_rows);  // calibrated on the validation rows

    const tool_view v = split_like_the_tool(train_args);
    const tenon::matrix<float> expected = trainer_predictions(dir.file("caps.tnm"), v.table);
    std::size_t mismatches = 0;
    for (std::size_t i = 0; i < 400; ++i) {
        const auto& row = records[i + 1];
        REQUIRE(row.size() == 6);
        CHECK(row[0] == "C" + std::to_string(1000 + i));
        // The predictor flushes a subnormal result to zero (deploy/predictor.hpp,
        // "Denormals"); the temperature's division can make such tiny probabilities.
        for (std::size_t c = 0; c < 2; ++c) {
            const float written = std::strtof(row[2 + c].c_str(), nullptr);
            const bool flushed = written == 0.0f && std::abs(expected(i, c)) < std::numeric_limits<float>::min();
            mismatches += same_bits(written, expected(i, c)) || flushed ? 0 : 1;
        }
        CHECK(row[1] == classes[expected(i, 1) > expected(i, 0) ? 1 : 0]);
        // The set: the classes with 1 - p <= the threshold, the predicted one always among them, joined by '|'.
        std::string likely;
        for (std::size_t c = 0; c < 2; ++c)
            if (1.0 - static_cast<double>(expected(i, c)) <= file.calibration->classes->set_threshold || classes[c] == row[1])
                likely += (likely.empty() ? "" : "|") + classes[c];
        CHECK(row[4] == likely);
    }
    CHECK(mismatches == 0);

    // The test rows' accuracy from infer's output is the one train stored.
    const tenon::column& verdict = v.table.at("verdict");
    std::size_t correct = 0;
    for (auto row : v.split.test) correct += records[row + 1][1] == verdict.category(row) ? 1 : 0;
    const double accuracy = static_cast<double>(correct) / static_cast<double>(v.split.test.size());
    REQUIRE(file.metadata.has_value());
    CHECK(accuracy == file.metadata->metric("test_accuracy"));
    CHECK(file.metadata->metric("test_rows") == static_cast<double>(v.split.test.size()));
    CHECK(file.metadata->metric("test_accuracy") > 0.8);
    CHECK(std::isfinite(file.metadata->metric("validation_log_loss")));
    CHECK(file.metadata->seed == 7);
    CHECK(file.metadata->epochs_planned == 25);
    CHECK(file.metadata->training_rows == v.split.train.size());
    CHECK(file.metadata->data_fingerprint == tenon::training_fingerprint(v.table, v.split.train));
    CHECK(file.replay.has_value());
    CHECK(file.references.size() == 3);  // torque, angle, shift: cap_id is ignored
}

TEST_CASE("infer reproduces a regression model's values in the target's units and its test RMSE") {
    const on_builtin_kernels builtin;  // as above
    scratch_dir dir("regress_roundtrip");
    const auto data = dir.write("motor.csv", motor_csv(300, 33));
    const std::vector<std::string> train_args{"--data", data, "--target", "amps", "--epochs", "30"};
    std::vector<std::string> train{"train"};
    train.insert(train.end(), train_args.begin(), train_args.end());
    train.insert(train.end(), {"--model", dir.file("motor.tnm"), "--metrics", dir.file("m.json"), "--quiet"});
    REQUIRE(run(train).status == 0);
    const auto r = run({"infer", "--model", dir.file("motor.tnm"), "--data", data, "--out", dir.file("p.csv"), "--quiet"});
    REQUIRE(r.status == 0);
    CHECK(r.out.empty());
    const auto records = read_records(dir.file("p.csv"));
    REQUIRE(records.size() == 301);
    CHECK(records[0] == std::vector<std::string>{"predicted", "predicted_low", "predicted_high", "out_of_range"});

    const tool_view v = split_like_the_tool(train_args);
    const tenon::matrix<float> expected = trainer_predictions(dir.file("motor.tnm"), v.table);
    std::size_t mismatches = 0;
    for (std::size_t i = 0; i < 300; ++i) mismatches += same_bits(std::strtof(records[i + 1][0].c_str(), nullptr), expected(i, 0)) ? 0 : 1;
    CHECK(mismatches == 0);
    // The band: the predictor's, written as it computes it: the value -+ the
    // stored half width for one network, -+ q (spread + floor) for the
    // default ensemble (checked against the library in
    // tests/test_deploy_calibration.cpp).
    const tenon::model_file<float> calibrated = tenon::load_model_file<float>(dir.file("motor.tnm"));
    REQUIRE(calibrated.calibration);
    REQUIRE(calibrated.calibration->interval);
    CHECK(calibrated.calibration->interval->has_spread == !calibrated.members.empty());
    tenon::predictor<float> served(calibrated, 300);
    std::vector<std::size_t> all(300);
    for (std::size_t i = 0; i < all.size(); ++i) all[i] = i;
    tenon::matrix<float> features;
    calibrated.plan->apply_features(v.table, all, features);
    const auto band = served.predict_prepared(features.data(), all.size());
    REQUIRE(band.has_interval());
    std::size_t band_mismatches = 0;
    const auto h = static_cast<float>(calibrated.calibration->interval->half_width);
    for (std::size_t i = 0; i < 300; ++i) {
        band_mismatches += same_bits(band.at(i, 0), expected(i, 0)) ? 0 : 1;
        band_mismatches += same_bits(std::strtof(records[i + 1][1].c_str(), nullptr), band.low_at(i, 0)) ? 0 : 1;
        band_mismatches += same_bits(std::strtof(records[i + 1][2].c_str(), nullptr), band.high_at(i, 0)) ? 0 : 1;
        if (calibrated.members.empty()) band_mismatches += same_bits(band.low_at(i, 0), expected(i, 0) - h) ? 0 : 1;
    }
    CHECK(band_mismatches == 0);

    // RMSE over the test rows (Hyndman & Koehler 2006, section 3.1) from the
    // written values. The truth is taken as evaluate_model takes it: the
    // target scaled in float by the plan, then restored to amps.
    const tenon::model_file<float> file = tenon::load_model_file<float>(dir.file("motor.tnm"));
    const tenon::prepared_rows<float> truth = file.plan->apply<float>(v.table, v.split.test);
    REQUIRE(truth.rows.size() == v.split.test.size());
    double squares = 0;
    for (std::size_t i = 0; i < truth.rows.size(); ++i) {
        const double e = static_cast<double>(std::strtof(records[truth.rows[i] + 1][0].c_str(), nullptr)) -
            file.plan->restore_target(static_cast<double>(truth.targets(i, 0)));
        squares += e * e;
    }
    const double rmse = std::sqrt(squares / static_cast<double>(truth.rows.size()));
    CHECK(rmse == doctest::Approx(file.metadata->metric("test_rmse")).epsilon(1e-12));
    CHECK(std::isfinite(file.metadata->metric("test_r2")));
    CHECK(std::isfinite(file.metadata->metric("validation_mae")));
}

TEST_CASE("infer keeps columns, takes columns in any order, ignores extra ones and flags cells outside the training range") {
    scratch_dir dir("keep_and_flags");
    const auto data = dir.write("caps.csv", caps_csv(300, 5));
    REQUIRE(run({"train", "--data", data, "--target", "verdict", "--ignore", "cap_id", "--epochs", "10", "--model", dir.file("caps.tnm"), "--quiet"})
                .status == 0);
    // The same four rows twice: in the training file's column order, and
    // shuffled with an extra column and ids that need quoting.
    const std::string rows[] = {"2.1,300,day", "2.0,450,night", "0.5,250,evening", "2.5,,day"};
    std::string plain = "torque,angle,shift\n", shuffled = "note,shift,id,angle,torque\n";
    const std::string ids[] = {"A1", "B,2", "C\"3\"", ""};
    for (std::size_t i = 0; i < 4; ++i) {
        plain += rows[i] + "\n";
        const auto cells = tenon_cli::detail::split_list(rows[i]);
        std::string id = ids[i];
        if (id.find_first_of(",\"") != std::string::npos) {
            std::string quoted = "\"";
            for (char c : id) quoted += c == '"' ? std::string("\"\"") : std::string(1, c);
            id = quoted + "\"";
        }
        shuffled += "n" + std::to_string(i) + "," + cells[2] + "," + id + "," + cells[1] + "," + cells[0] + "\n";
    }
    dir.write("plain.csv", plain);
    dir.write("shuffled.csv", shuffled);
    REQUIRE(run({"infer", "--model", dir.file("caps.tnm"), "--data", dir.file("plain.csv"), "--out", dir.file("a.csv"), "--quiet"}).status == 0);
    REQUIRE(run({"infer", "--model", dir.file("caps.tnm"), "--data", dir.file("shuffled.csv"), "--out", dir.file("b.csv"), "--keep", "id,note",
                 "--quiet"})
                .status == 0);
    const auto a = read_records(dir.file("a.csv")), b = read_records(dir.file("b.csv"));
    REQUIRE(a.size() == 5);
    REQUIRE(b.size() == 5);
    CHECK(b[0][0] == "id");
    CHECK(b[0][1] == "note");
    for (std::size_t i = 1; i < 5; ++i) {
        CHECK(b[i][0] == ids[i - 1]);
        CHECK(b[i][1] == "n" + std::to_string(i - 1));
        CHECK(std::vector<std::string>(b[i].begin() + 2, b[i].end()) == a[i]);  // same predictions and flags
    }
    // The written file quotes the id with a comma and doubles inner quotes (RFC 4180).
    const std::string written = read_file(dir.file("b.csv"));
    CHECK(written.find("\n\"B,2\",n1,") != std::string::npos);
    CHECK(written.find("\n\"C\"\"3\"\"\",n2,") != std::string::npos);
    // Training held torque 1..3, angle 200..400 and the shifts day and night.
    const std::size_t flags = a[0].size() - 1;
    CHECK(a[0][flags] == "out_of_range");
    CHECK(a[1][flags].empty());
    CHECK(a[2][flags] == "angle:above");
    CHECK(a[3][flags] == "torque:below;shift:unseen");
    CHECK(a[4][flags].empty());  // a missing cell is filled, not flagged
    // Probabilities of a row sum to 1 (to float rounding).
    for (std::size_t i = 1; i < 5; ++i)
        CHECK(std::strtod(a[i][1].c_str(), nullptr) + std::strtod(a[i][2].c_str(), nullptr) == doctest::Approx(1.0).epsilon(1e-6));
}

TEST_CASE("infer on a file with a header only writes a header only") {
    scratch_dir dir("header_only");
    const auto data = dir.write("caps.csv", caps_csv(200, 9));
    REQUIRE(run({"train", "--data", data, "--target", "verdict", "--ignore", "cap_id", "--epochs", "5", "--model", dir.file("caps.tnm"), "--quiet"})
                .status == 0);
    dir.write("empty.csv", "cap_id,torque,angle,shift\n");
    const auto r = run({"infer", "--model", dir.file("caps.tnm"), "--data", dir.file("empty.csv"), "--out", dir.file("p.csv"), "--keep", "cap_id"});
    REQUIRE(r.status == 0);
    CHECK(r.out == "predicted 0 rows (0 with inputs outside the training range) into " + dir.file("p.csv") + "\n");
    const auto classes = tenon::load_model_file<float>(dir.file("caps.tnm")).plan->class_names();
    CHECK(read_file(dir.file("p.csv")) == "cap_id,predicted,p(" + classes[0] + "),p(" + classes[1] + "),likely_classes,out_of_range\n");
}

TEST_CASE("infer reads a model saved in double precision by a host") {
    scratch_dir dir("double_model");
    const auto data = dir.write("motor.csv", motor_csv(200, 4));
    const tenon::table t = tenon::read_csv_file(data);
    tenon::plan preparation;
    preparation.set_target("amps", tenon::target_kind::regression);
    tenon::feature_steps filled;
    filled.fill = tenon::fill_method::median;
    filled.missing_indicator = true;
    preparation.set_steps("speed", filled);
    std::vector<std::size_t> train(150), validation(50);
    for (std::size_t r = 0; r < 150; ++r) train[r] = r;
    for (std::size_t r = 0; r < 50; ++r) validation[r] = 150 + r;
    tenon::model_settings settings;
    settings.hidden = {8};
    settings.epochs = 5;
    tenon::fitted_model<double> model = tenon::fit_model<double>(t, preparation, train, validation, settings);
    tenon::save_model_file(dir.file("host.tnm"), tenon::make_model_file(model, t, train, settings));
    const auto r = run({"infer", "--model", dir.file("host.tnm"), "--data", data, "--out", dir.file("p.csv"), "--quiet"});
    REQUIRE(r.status == 0);
    const auto records = read_records(dir.file("p.csv"));
    REQUIRE(records.size() == 201);
    const tenon::matrix<double> expected = tenon::predict_prepared(model, model.plan.apply<double>(t, {0, 1, 2}).features);
    for (std::size_t i = 0; i < 3; ++i)
        CHECK(std::strtod(records[i + 1][0].c_str(), nullptr) == expected(i, 0));  // shortest double text reads back exactly
    const auto inspected = run({"inspect", "--model", dir.file("host.tnm")});
    CHECK(inspected.out.find("double weights") != std::string::npos);
}

// ---------------------------------------------------------------------------
// inspect

TEST_CASE("inspect shows the inputs, classes, layers, parameter count, scores and provenance") {
    scratch_dir dir("inspect");
    const auto data = dir.write("caps.csv", caps_csv(300, 8));
    REQUIRE(run({"train", "--data", data, "--target", "verdict", "--ignore", "cap_id", "--epochs", "12", "--hidden", "16,8", "--seed", "42",
                 "--model", dir.file("caps.tnm"), "--quiet"})
                .status == 0);
    const auto r = run({"inspect", "--model", dir.file("caps.tnm")});
    REQUIRE(r.status == 0);
    CHECK(r.err.empty());
    const std::string& s = r.out;
    const tenon::model_file_summary m = tenon::inspect_model_file(dir.file("caps.tnm"));
    // 4 features (torque, angle, day and night) -> 16 -> 8 -> 2 classes: weights and biases.
    CHECK(m.parameter_values == 4 * 16 + 16 + 16 * 8 + 8 + 8 * 2 + 2);
    for (const std::string& expected : std::vector<std::string>{"tenon model file, format version 2, float weights",
                                                                "verdict: classification into 2 classes: loose, tight",
                                                                "Inputs: 3 columns -> 4 features",
                                                                "  torque (numeric)",
                                                                "  angle (numeric)",
                                                                "  shift (categorical)",
                                                                "categories   day, night",
                                                                "one-hot, unseen -> all zeros",
                                                                "z-score",
                                                                "Network: 5 layers, " + std::to_string(m.parameter_values) + " parameter values",
                                                                "hidden1          dense        4 -> 16",
                                                                "hidden1_act      activation   relu",
                                                                "hidden2          dense        16 -> 8",
                                                                "output           dense        8 -> 2",
                                                                "test_accuracy",
                                                                "validation_accuracy",
                                                                "seed         42",
                                                                "library      tenon " + std::string(tenon::version_string()),
                                                                "data         caps.csv, fingerprint 0x",
                                                                "epochs       ",
                                                                " of 12, best ",
                                                                " UTC",
                                                                "hidden                   16,8"}) {
        CAPTURE(expected);
        CHECK(s.find(expected) != std::string::npos);
    }
    CHECK(s.find("cap_id") == std::string::npos);  // ignored columns are not inputs
    // The training range of each numeric input, as stored.
    for (const auto& ref : m.references)
        if (ref.kind == tenon::column_kind::numeric)
            CHECK(s.find(tenon_cli::detail::significant(ref.minimum) + " .. " + tenon_cli::detail::significant(ref.maximum)) != std::string::npos);

    const auto j = run({"inspect", "--model", dir.file("caps.tnm"), "--json"});
    REQUIRE(j.status == 0);
    for (const std::string& expected : std::vector<std::string>{
             "\"task\": \"classification\"", "\"classes\": [\n      \"loose\",\n      \"tight\"\n    ]", "\"column\": \"shift\"",
             "\"resumable\": false", "\"missing_indicator\": false", "\"parameter_values\": " + std::to_string(m.parameter_values), "\"seed\": 42",
             "\"name\": \"hidden2\"", "\"outputs\": 8", "\"test_accuracy\": "}) {
        CAPTURE(expected);
        CHECK(j.out.find(expected) != std::string::npos);
    }
}

TEST_CASE("creation times are shown in UTC by the civil calendar") {
    CHECK(tenon_cli::detail::utc_text(0) == "1970-01-01 00:00:00 UTC");
    CHECK(tenon_cli::detail::utc_text(951782400) == "2000-02-29 00:00:00 UTC");  // a leap day of a year divisible by 400
    CHECK(tenon_cli::detail::utc_text(1700000000) == "2023-11-14 22:13:20 UTC");
    CHECK(tenon_cli::detail::utc_text(-1) == "1969-12-31 23:59:59 UTC");
}

// ---------------------------------------------------------------------------
// Errors: status 2 (3 for an output that cannot be written), one line, no
// output file left behind

namespace {

// A directory with data and a trained model, shared by the error tests.
struct trained {
    scratch_dir dir;
    std::string data, model;
    explicit trained(const std::string& name) : dir(name) {
        data = dir.write("caps.csv", caps_csv(200, 3));
        model = dir.file("caps.tnm");
        REQUIRE(run({"train", "--data", data, "--target", "verdict", "--ignore", "cap_id", "--epochs", "5", "--model", model, "--quiet"}).status ==
                0);
    }
};

void check_failure(const scratch_dir& dir, const std::vector<std::string>& args, const std::string& expected_err, int status = 2) {
    const auto before = dir.listing();
    const auto r = run(args);
    CHECK(r.status == status);
    CHECK(r.err == expected_err);
    CHECK(r.out.empty());
    CHECK(dir.listing() == before);
}

}  // namespace

TEST_CASE("a missing or damaged model file is named; nothing is written") {
    trained t("damaged");
    const auto out = t.dir.file("p.csv");
    const auto absent = t.dir.file("absent.tnm");
    check_failure(t.dir, {"infer", "--model", absent, "--data", t.data, "--out", out},
                  "tenon infer: error: [deploy.file.io] --model '" + absent + "': cannot read it (No such file or directory)\n");
    check_failure(t.dir, {"inspect", "--model", absent},
                  "tenon inspect: error: [deploy.file.io] --model '" + absent + "': cannot read it (No such file or directory)\n");

    // One byte flipped inside the weights: the section's CRC-32 catches it.
    std::string bytes = read_file(t.model);
    const tenon::model_file_summary m = tenon::inspect_model_file(t.model);
    std::size_t weights_at = 0;
    for (const auto& s : m.sections)
        if (s.id == "WGHT") weights_at = static_cast<std::size_t>(s.offset + s.length / 2);
    REQUIRE(weights_at > 0);
    bytes[weights_at] = static_cast<char>(bytes[weights_at] ^ 0x10);
    const auto damaged = t.dir.write("damaged.tnm", bytes);
    const std::string message = "[deploy.model.checksum] " + damaged + ": section 'WGHT' fails its checksum (the file is damaged)\n";
    check_failure(t.dir, {"infer", "--model", damaged, "--data", t.data, "--out", out}, "tenon infer: error: " + message);
    check_failure(t.dir, {"inspect", "--model", damaged}, "tenon inspect: error: " + message);
    // A CSV file given as the model.
    check_failure(t.dir, {"inspect", "--model", t.data},
                  "tenon inspect: error: [deploy.model.magic] " + t.data +
                      ": not a tenon model file (the first bytes are not the tenon model magic)\n");
}

TEST_CASE("infer names a column the model reads that the data lacks, and an unknown --keep column") {
    trained t("columns");
    const auto data = t.dir.write("new.csv", "angle,torque,cap_id\n300,2,x\n");
    const auto out = t.dir.file("p.csv");
    check_failure(t.dir, {"infer", "--model", t.model, "--data", data, "--out", out},
                  "tenon infer: error: [cli.column.missing] " + data +
                      ": the model reads column 'shift', which the data does not have (columns: angle, "
                      "torque, cap_id)\n");
    const auto fewer = t.dir.write("fewer.csv", "angle\n300\n");
    check_failure(t.dir, {"infer", "--model", t.model, "--data", fewer, "--out", out},
                  "tenon infer: error: [cli.column.missing] " + fewer +
                      ": the model reads columns 'torque', 'shift', which the data does not have "
                      "(columns: angle)\n");
    check_failure(t.dir, {"infer", "--model", t.model, "--data", t.data, "--out", out, "--keep", "cap_id,capid"},
                  "tenon infer: error: [cli.column.unknown] " + t.data +
                      ": --keep names 'capid', which is not a column (columns: cap_id, torque, "
                      "angle, shift, verdict)\n");
}

TEST_CASE("a cell that cannot be predicted fails the whole command with file, line, column and value; an old output stays") {
    trained t("bad_cell");
    const auto out = t.dir.write("p.csv", "old predictions\n");
    // Line 70 (the header is line 1) is past the first batch of 64 rows, so
    // the first batch was already written to the temporary file.
    std::string csv = "shift,cap_id,angle,torque\n";
    for (int i = 0; i < 80; ++i) csv += std::string(i % 2 ? "day" : "night") + ",C" + std::to_string(i) + "," + (i == 68 ? "3O5" : "300") + ",2.0\n";
    const auto typo = t.dir.write("typo.csv", csv);
    check_failure(t.dir, {"infer", "--model", t.model, "--data", typo, "--out", out},
                  "tenon infer: error: [deploy.input.not_numeric] " + typo + " line 70 column 3 ('angle'): '3O5' is not a finite number\n");
    const auto huge = t.dir.write("huge.csv", "torque,angle,shift\n2,300,day\n1e308,300,day\n");
    check_failure(t.dir, {"infer", "--model", t.model, "--data", huge, "--out", out},
                  "tenon infer: error: [deploy.input.non_finite] " + huge +
                      " line 3 column 1 ('torque'): '1e308' is beyond what the model computes with (its prepared value is not finite)\n");
    const auto ragged = t.dir.write("ragged.csv", "torque,angle,shift\n2,300,day\n2,300\n");
    check_failure(t.dir, {"infer", "--model", t.model, "--data", ragged, "--out", out},
                  "tenon infer: error: [prep.csv.ragged] " + ragged + " line 3: expected 3 fields, found 2\n");
    const auto twice = t.dir.write("twice.csv", "torque,angle,shift,angle\n2,300,day,300\n");
    check_failure(t.dir, {"infer", "--model", t.model, "--data", twice, "--out", out},
                  "tenon infer: error: [prep.csv.duplicate_column] " + twice + " line 1 column 4: the name 'angle' is used twice in the header\n");
    const auto empty = t.dir.write("empty.csv", "");
    check_failure(t.dir, {"infer", "--model", t.model, "--data", empty, "--out", out},
                  "tenon infer: error: [prep.csv.no_header] " + empty + ": no header row (the input is empty)\n");
    const auto absent = t.dir.file("absent.csv");
    check_failure(t.dir, {"infer", "--model", t.model, "--data", absent, "--out", out},
                  "tenon infer: error: [prep.file.open] --data '" + absent + "': cannot read it (No such file or directory)\n");
    CHECK(read_file(out) == "old predictions\n");
}

TEST_CASE("an --out file that cannot be created fails with status 3") {
    trained t("unwritable");
    const auto out = t.dir.file("no_such_dir/p.csv");
    check_failure(t.dir, {"infer", "--model", t.model, "--data", t.data, "--out", out},
                  "tenon infer: error: [cli.output.write] --out '" + out + "': the directory '" + std::filesystem::path(out).parent_path().string() +
                      "' does not exist\n",
                  tenon_cli::exit_output_failed);
}

TEST_CASE("bad command lines of infer and inspect are named") {
    scratch_dir dir("infer_options");
    const auto m = dir.file("m.tnm"), d = dir.file("d.csv"), o = dir.file("o.csv");
    const std::string infer = "tenon infer: error: ";
    check_failure(dir, {"infer", "--data", d, "--out", o}, infer + "[cli.option.missing] tenon infer needs --model MODEL.tnm\n");
    check_failure(dir, {"infer", "--model", m, "--out", o}, infer + "[cli.option.missing] tenon infer needs --data FILE.csv\n");
    check_failure(dir, {"infer", "--model", m, "--data", d}, infer + "[cli.option.missing] tenon infer needs --out PREDICTIONS.csv\n");
    check_failure(dir, {"infer", "--model", m, "--data", d, "--out", d},
                  infer + "[cli.option.conflict] --out and --data name the same file '" + d + "'\n");
    check_failure(dir, {"infer", "--model", m, "--data", d, "--out", m},
                  infer + "[cli.option.conflict] --out and --model name the same file '" + m + "'\n");
    check_failure(dir, {"infer", "--model", m, "--data", d, "--out", o, "--keep", "id,,x"},
                  infer + "[cli.option.value] --keep 'id,,x': an empty column name\n");
    check_failure(dir, {"infer", "--model", m, "--data", d, "--out", o, "--keep", "id,x,id"},
                  infer + "[cli.option.conflict] --keep names 'id' twice\n");
    check_failure(dir, {"infer", "--model", m, "--model", m}, infer + "[cli.option.conflict] --model is given more than once\n");
    check_failure(dir, {"infer", "--model"}, infer + "[cli.option.missing] --model needs a value\n");
    check_failure(dir, {"infer", "--model="}, infer + "[cli.option.value] --model needs a file name, got an empty one\n");
    check_failure(dir, {"infer", "--modle", m}, infer + "[cli.option.unknown] unknown option '--modle' for 'tenon infer' (see tenon infer --help)\n");
    check_failure(dir, {"infer", "m.tnm"},
                  infer + "[cli.option.unknown] unexpected argument 'm.tnm' for 'tenon infer' (options start with --; see tenon infer --help)\n");
    check_failure(dir, {"infer", "--quiet=yes"}, infer + "[cli.option.value] --quiet takes no value\n");
    const std::string inspect = "tenon inspect: error: ";
    check_failure(dir, {"inspect"}, inspect + "[cli.option.missing] tenon inspect needs --model MODEL.tnm\n");
    check_failure(dir, {"inspect", "--model", m, "--json=1"}, inspect + "[cli.option.value] --json takes no value\n");
    check_failure(dir, {"inspect", "--model", m, "--data", d},
                  inspect + "[cli.option.unknown] unknown option '--data' for 'tenon inspect' (see tenon inspect --help)\n");
}

TEST_CASE("train --model: refused with --folds or a clashing path; not written when training fails or the directory is missing") {
    scratch_dir dir("train_model_errors");
    const auto data = dir.write("caps.csv", caps_csv(120, 2));
    const auto model = dir.file("caps.tnm");
    const std::string train = "tenon train: error: ";
    check_failure(dir, {"train", "--data", data, "--target", "verdict", "--folds", "3", "--model", model},
                  train +
                      "[cli.option.conflict] --model saves the model of one holdout run; cross-validation (--folds 3) trains one model per fold and "
                      "saves none\n");
    check_failure(dir, {"train", "--data", data, "--target", "verdict", "--model", model, "--metrics", model},
                  train + "[cli.option.conflict] --metrics and --model name the same file '" + model + "'\n");
    check_failure(dir, {"train", "--data", data, "--target", "verdict", "--model", data},
                  train + "[cli.option.conflict] --model and --data name the same file '" + data + "'\n");
    check_failure(dir, {"train", "--data", data, "--target", "verdict", "--model="},
                  train + "[cli.option.value] --model needs a file name, got an empty one\n");
    const auto nowhere = dir.file("no_such_dir/caps.tnm");
    check_failure(dir, {"train", "--data", data, "--target", "verdict", "--model", nowhere},
                  train + "[cli.output.write] --model '" + nowhere + "': the directory '" + std::filesystem::path(nowhere).parent_path().string() +
                      "' does not exist\n",
                  tenon_cli::exit_output_failed);
    const auto one = dir.write("one.csv", "torque,verdict\n1.5,tight\n2.5,tight\n");
    check_failure(dir, {"train", "--data", one, "--target", "verdict", "--model", model, "--metrics", dir.file("m.json")},
                  train + "[cli.target.single_class] " + one +
                      ": the target 'verdict' has a single class ('tight') in all 2 rows with a target; "
                      "classification needs at least 2\n");
}

TEST_CASE("train --model reports the saved file and replaces an older model") {
    scratch_dir dir("train_model_summary");
    const auto data = dir.write("caps.csv", caps_csv(150, 12));
    const auto model = dir.write("caps.tnm", "an older file");
    const auto r = run({"train", "--data", data, "--target", "verdict", "--epochs", "3", "--model", model});
    REQUIRE(r.status == 0);
    CHECK(r.out.find("model written to " + model + "\n") != std::string::npos);
    CHECK(tenon::inspect_model_file(model).metadata->epochs_planned == 3);
    CHECK(dir.listing() == std::vector<std::string>{"caps.csv", "caps.tnm"});
}

// ---------------------------------------------------------------------------
// Help

TEST_CASE("infer and inspect explain their options; tenon --help lists all commands") {
    const auto infer = run({"infer", "--help"});
    CHECK(infer.status == 0);
    for (const char* text : {"  --model ", "  --data ", "  --out ", "  --keep ", "  --quiet ", "  predicted ", "  p(CLASS) ", "  out_of_range ",
                             "COLUMN:below", "COLUMN:above", "COLUMN:unseen", "line, column and value", "no --out file is created"}) {
        CAPTURE(std::string(text));
        CHECK(infer.out.find(text) != std::string::npos);
    }
    const auto inspect = run({"inspect", "--help"});
    CHECK(inspect.status == 0);
    CHECK(inspect.out.find("  --json ") != std::string::npos);
    CHECK(run({"help", "infer"}).out == tenon_cli::infer_help());
    const auto help = run({"--help"});
    for (const char* text : {"  train    train a perceptron", "  infer    predict with a saved model", "  inspect  describe a saved model"}) {
        CAPTURE(std::string(text));
        CHECK(help.out.find(text) != std::string::npos);
    }
    CHECK(run({"train", "--help"}).out.find("  --model OUT.tnm ") != std::string::npos);
}

// ---------------------------------------------------------------------------
// The library's defaults are the tool's

namespace {

// An invented press log with what plants write: rows without a fault
// label (NA), empty speed cells and empty die cells, and a quoted note
// that spans two lines, so file lines are not row numbers plus 2.
std::string press_log_text() {
    std::string text = "ram_speed,die,oil_temp,note,fault\n";
    text += "40.5,D1,60,\"changed die,\nafter lunch\",ok\n";
    const char* dies[] = {"D1", "D2", "D3", "D4"};
    for (int i = 1; i < 240; ++i) {
        const double speed = 35.0 + 0.5 * ((i * 7) % 21);
        const int oil = 55 + (i * 5) % 16;
        const char* die = dies[(i * 3) % 4];
        const char* fault = speed > 42.0 && oil > 64 ? "jam" : (std::string(die) == "D4" && oil > 60 ? "worn" : "ok");
        text += (i % 17 == 0 ? std::string() : tenon::number_to_text(speed)) + "," + (i % 23 == 0 ? "" : die) + "," + std::to_string(oil) + ",," +
            (i % 29 == 0 ? "NA" : fault) + "\n";
    }
    return text;
}

// The file line (1-based) where data row `row` starts, counted in the text.
std::size_t line_of_row(const std::string& text, std::size_t row) {
    std::size_t line = 1, records = 0;
    bool quoted = false;
    for (char c : text) {
        if (c == '"') quoted = !quoted;
        if (c == '\n') {
            ++line;
            if (!quoted && ++records == row + 1) return line;  // record 0 is the header
        }
    }
    return 0;
}

}  // namespace

TEST_CASE("one table with missing targets and missing cells gives the same model bits through the README's library path and the tool") {
    on_builtin_kernels builtin;
    scratch_dir dir("library_equals_tool");
    const std::string text = press_log_text();
    const auto data = dir.write("press_log.csv", text);
    const auto tool_model = dir.file("press.tnm");
    const auto r =
        run({"train", "--data", data, "--target", "fault", "--ignore", "note", "--seed", "7", "--epochs", "12", "--model", tool_model, "--quiet"});
    REQUIRE(r.status == 0);
    const auto from_tool = tenon::load_model_file<float>(tool_model);

    // The README's path, with the tool's seed, epochs and ignored column.
    tenon::table rows = tenon::read_csv_file(data);
    tenon::plan preparation;
    preparation.set_target("fault", tenon::target_kind::classification);
    preparation.set_role("note", tenon::column_role::ignored);
    auto labels = tenon::dense_codes(rows.at("fault"));  // rows without a label: a stratum of their own, dropped by fit_model
    auto split = tenon::stratified_holdout(labels, {0.7, 0.15, 0.15}, /*seed=*/7);
    tenon::model_settings settings;
    settings.seed = 7;
    settings.epochs = 12;
    auto model = tenon::fit_model<float>(rows, preparation, split.train, split.validation, settings);
    CHECK(model.dropped_rows > 0);
    const auto from_library = tenon::make_model_file(model, rows, split.train, settings);

    // The plans agree: the same fills (median, mode), indicators and categories.
    REQUIRE(from_tool.plan);
    CHECK(from_tool.plan->to_bytes() == from_library.plan->to_bytes());
    CHECK(from_library.plan->feature_fill("ram_speed").method == tenon::fill_method::median);
    CHECK(from_library.plan->feature_fill("die").method == tenon::fill_method::mode);
    CHECK(from_library.plan->feature_has_indicator("ram_speed"));
    CHECK(from_library.plan->feature_has_indicator("die"));
    CHECK_FALSE(from_library.plan->feature_has_indicator("oil_temp"));
    REQUIRE(from_tool.weights.size() == from_library.weights.size());
    for (std::size_t k = 0; k < from_tool.weights.size(); ++k) {
        const auto& a = from_tool.weights[k];
        const auto& b = from_library.weights[k];
        CAPTURE(a.name);
        CHECK(a.name == b.name);
        REQUIRE(a.values.size() == b.values.size());
        CHECK(std::memcmp(a.values.data(), b.values.data(), a.values.size() * sizeof(float)) == 0);
    }
}

TEST_CASE("library messages about a row name its line in the file, as the tool does") {
    scratch_dir dir("library_lines");
    const std::string text = press_log_text();
    const auto data = dir.write("press_log.csv", text);
    const tenon::table rows = tenon::read_csv_file(data);
    REQUIRE(rows.row_lines().size() == rows.row_count());
    CHECK(rows.row_lines()[0] == 2);
    CHECK(rows.row_lines()[1] == 4);  // after the note spanning lines 2 and 3
    const std::size_t row = 29;  // the first row without a fault label
    REQUIRE(rows.at("fault").is_missing(row));
    const std::string line = std::to_string(line_of_row(text, row));
    CHECK(line == "32");
    CHECK(rows.row_place(row) == data + " line " + line);

    std::string message;
    try {
        tenon::dense_codes(rows.at("fault"), /*missing_is_value=*/false);
    } catch (const tenon::error& e) {
        message = e.what();
    }
    CHECK(message == "[prep.value.missing] " + data + " line " + line + ", column 'fault': the cell is missing");

    // Strict steps refuse a missing cell and name the line the tool would.
    tenon::plan strict;
    strict.set_default_steps(tenon::strict_feature_steps()).set_role("note", tenon::column_role::ignored);
    strict.set_target("fault", tenon::target_kind::classification);
    const auto measured = strict.measure(rows, {1, 2, 3, 4, 5});
    message.clear();
    try {
        measured.apply<float>(rows, {17});
    } catch (const tenon::error& e) {
        message = e.what();
    }
    CHECK(message ==
          "[prep.value.missing] " + data + " line " + std::to_string(line_of_row(text, 17)) +
              ", column 'ram_speed': the cell is missing and the plan has no fill for it");
}

// ---------------------------------------------------------------------------
// calibration (issue 20)

TEST_CASE("train --coverage: the metrics give the band's test coverage and width, inspect shows the band") {
    scratch_dir dir("coverage_regression");
    const auto data = dir.write("motor.csv", motor_csv(600, 71));
    const auto r = run({"train", "--data", data, "--target", "amps", "--epochs", "30", "--coverage", "0.8", "--model", dir.file("motor.tnm"),
                        "--metrics", dir.file("m.json"), "--report", dir.file("r.svg")});
    REQUIRE(r.status == 0);
    CHECK(read_file(dir.file("r.svg")).find("True against predicted, with bands (test)") != std::string::npos);
    CHECK(r.out.find("calibration: band of +-") != std::string::npos);
    CHECK(r.out.find(" meant to hold the true value for 80.0% of new rows\n") != std::string::npos);
    const auto j = cli_test::json_flattener(read_file(dir.file("m.json"))).values;
    const tenon::model_file<float> file = tenon::load_model_file<float>(dir.file("motor.tnm"));
    REQUIRE(file.calibration);
    REQUIRE(file.calibration->interval);
    const double h = file.calibration->interval->half_width;
    CHECK(std::stod(j.at("calibration.band.coverage")) == 0.8);
    CHECK(std::stod(j.at("calibration.band.half_width")) == h);
    CHECK(std::stod(j.at("calibration.band.rows")) == std::stod(j.at("rows.validation")));
    // The default ensemble's band is the normalized one (its width follows
    // the members' spread); one network's is 2h on every row (to float
    // rounding of value -+ h).
    if (file.members.empty()) {
        CHECK(j.at("calibration.band.method") == "split-conformal");
        CHECK(std::stod(j.at("test.interval_mean_width")) == doctest::Approx(2.0 * h).epsilon(1e-5));
    } else {
        CHECK(j.at("calibration.band.method") == "split-conformal, normalized by the spread");
        CHECK(r.out.find(" x (the networks' spread on the row + ") != std::string::npos);
        CHECK(std::stod(j.at("test.interval_mean_width")) > 0.0);
    }
    // With n validation rows the coverage of new rows is Beta(r, n + 1 - r),
    // r = ceil((n + 1) 0.8) (Vovk 2012); the m test rows add a binomial
    // spread; 3.29 standard deviations of the sum, see tests/test_calibration.cpp.
    const double n = std::stod(j.at("rows.validation")), m = std::stod(j.at("test.rows"));
    const double rank = std::ceil((n + 1) * 0.8), p = rank / (n + 1);
    const double coverage = std::stod(j.at("test.interval_coverage"));
    CHECK(std::abs(coverage - p) <= 3.29 * std::sqrt(p * (1 - p) / (n + 2) + p * (1 - p) / m));
    CHECK(file.metadata->metric("test_interval_coverage") == coverage);

    const auto text = run({"inspect", "--model", dir.file("motor.tnm")});
    CHECK(text.out.find("\nCalibration\n  band         split-conformal, nominal coverage 0.8, from " + j.at("rows.validation") +
                        " calibration rows\n") != std::string::npos);
    const auto json = cli_test::json_flattener(run({"inspect", "--model", dir.file("motor.tnm"), "--json"}).out).values;
    CHECK(std::stod(json.at("calibration.band.half_width")) == h);
}

TEST_CASE("train on a classifier: the metrics give set coverage, set size and ECE before and after temperature scaling") {
    scratch_dir dir("coverage_classes");
    const auto data = dir.write("caps.csv", caps_csv(600, 72));
    const auto r = run({"train", "--data", data, "--target", "verdict", "--ignore", "cap_id", "--epochs", "20", "--model", dir.file("caps.tnm"),
                        "--metrics", dir.file("m.json"), "--quiet"});
    REQUIRE(r.status == 0);
    const auto j = cli_test::json_flattener(read_file(dir.file("m.json"))).values;
    const tenon::model_file<float> file = tenon::load_model_file<float>(dir.file("caps.tnm"));
    REQUIRE(file.calibration);
    REQUIRE(file.calibration->classes);
    CHECK(std::stod(j.at("calibration.classes.temperature")) == file.calibration->classes->temperature);
    CHECK(std::stod(j.at("calibration.classes.coverage")) == 0.9);
    const double set_coverage = std::stod(j.at("test.set_coverage")), set_size = std::stod(j.at("test.set_mean_size"));
    CHECK(set_size >= 1.0);
    CHECK(set_size <= 2.0);
    CHECK(set_coverage >= 0.75);  // nominal 0.9 over 90 test rows, Beta(82, 9) calibration: a lower 3.29 sd bound (tests/test_calibration.cpp)
    CHECK(std::stod(j.at("test.ece")) >= 0.0);
    CHECK(std::stod(j.at("test.ece_uncalibrated")) >= 0.0);
    CHECK(std::isfinite(std::stod(j.at("test.log_loss_calibrated"))));
    const auto text = run({"inspect", "--model", dir.file("caps.tnm")});
    CHECK(text.out.find("  classes      temperature ") != std::string::npos);
    CHECK(text.out.find("  class sets   nominal coverage 0.9; a class joins when 1 - p <= ") != std::string::npos);
}

TEST_CASE("inspect says a version-1 file carries no calibration; --coverage out of range or with --folds is refused") {
    const std::string fixture = std::string(TENON_SOURCE_DIR) + "/tests/fixtures/deploy/pump_v1_float.tnm";
    const auto text = run({"inspect", "--model", fixture});
    REQUIRE(text.status == 0);
    CHECK(text.out.find("format version 1") != std::string::npos);
    CHECK(text.out.find("\nCalibration\n  none: the file carries no calibration") != std::string::npos);
    const auto json = cli_test::json_flattener(run({"inspect", "--model", fixture, "--json"}).out).values;
    CHECK(json.at("calibration") == "null");

    scratch_dir dir("coverage_errors");
    const auto data = dir.write("caps.csv", caps_csv(120, 2));
    const std::string train = "tenon train: error: ";
    check_failure(dir, {"train", "--data", data, "--target", "verdict", "--coverage", "1"},
                  train + "[cli.option.value] --coverage '1': must be at least 0.5 and below 1 (e.g. 0.9)\n");
    check_failure(dir, {"train", "--data", data, "--target", "verdict", "--coverage", "90%"},
                  train + "[cli.option.value] --coverage '90%': not a finite number\n");
    check_failure(dir, {"train", "--data", data, "--target", "verdict", "--coverage", "0.9", "--folds", "3"},
                  train +
                      "[cli.option.conflict] --coverage calibrates the model of one holdout run on its validation rows; it cannot be combined "
                      "with --folds 3\n");
}
