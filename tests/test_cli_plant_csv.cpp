// Tests of `tenon train` on CSV files as plants write them: identifier-like
// columns, ';' delimiters with decimal commas, forced column kinds and class
// targets coded as whole numbers. The library's column screening and dialect
// detection underneath are tested in test_prep_csv.cpp.
#include <doctest/doctest.h>

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <map>
#include <sstream>
#include <string>
#include <vector>

#include "cli_test_support.hpp"

namespace {

using cli_test::cli_result;

cli_result run(std::vector<std::string> args) { return cli_test::run_tool(std::move(args)); }

struct scratch_dir : cli_test::scratch_dir {
    explicit scratch_dir(const std::string& name) : cli_test::scratch_dir("tenon_cli_plant_tests_", name) {}
};

std::map<std::string, std::string> read_metrics(const std::string& path) { return cli_test::json_flattener(cli_test::read_file(path)).values; }

std::size_t feature_count(const std::string& metrics_path) { return static_cast<std::size_t>(std::stod(read_metrics(metrics_path).at("features"))); }

bool has_line(const std::string& text, const std::string& line) { return ("\n" + text).find("\n" + line + "\n") != std::string::npos; }

// An invented press log: a serial per part, a cycle counter, a part number
// shared by a few parts, the line and the shift, the force and the die, and
// whether the part was faulty (0/1).
std::string press_log(std::size_t rows, char delimiter = ',', bool decimal_comma = false) {
    tenon::random_engine rng(7);
    std::string csv;
    const std::string d(1, delimiter);
    csv += "serial" + d + "cycle" + d + "part_id" + d + "line_id" + d + "shift" + d + "force" + d + "die" + d + "fault\n";
    for (std::size_t i = 0; i < rows; ++i) {
        const double force = rng.uniform(40.0, 80.0);
        const int die = i % 2 == 0 ? 7 : 9;
        const bool fault = force + (die == 9 ? 8.0 : 0.0) > 68.0;
        char number[32];
        std::snprintf(number, sizeof number, "%.1f", force);
        std::string force_text = number;
        if (decimal_comma) force_text[force_text.find('.')] = ',';
        char serial[32];
        std::snprintf(serial, sizeof serial, "SN-%06zu", 4711 * i % 1000003);
        csv += std::string(serial) + d + std::to_string(1000 + i) + d + "P" + std::to_string(i % 40) + d + "L" + std::to_string(i % 3) + d +
            (i % 3 == 0 ? "night" : "day") + d + force_text + d + std::to_string(die) + d + (fault ? "1" : "0") + "\n";
    }
    return csv;
}

}  // namespace

// ---------------------------------------------------------------------------
// Item: identifier-like columns

TEST_CASE("tenon train leaves identifier-like columns out, says so in one line each, and --use brings one back") {
    scratch_dir dir("identifiers");
    const auto path = dir.write("press.csv", press_log(300));
    const auto r = run({"train", "--data", path, "--target", "fault", "--epochs", "3", "--metrics", dir.file("m.json")});
    REQUIRE(r.status == 0);
    CHECK(has_line(r.out,
                   "note: leaving out 'serial' (300 distinct values in 300 rows: nearly every value is distinct, as in an "
                   "identifier); --use serial keeps it"));
    CHECK(has_line(r.out, "note: leaving out 'cycle' (whole numbers that rise (or fall) on every row, as a counter does); --use cycle keeps it"));
    CHECK(has_line(r.out,
                   "note: leaving out 'part_id' (its name reads as an identifier, and it holds 40 distinct values in 300 rows); "
                   "--use part_id keeps it"));
    CHECK(r.out.find("'shift'") == std::string::npos);  // two categories: not flagged
    CHECK(r.out.find("'line_id'") == std::string::npos);
    // line_id (3) + shift (2) + force + die: the identifiers add nothing.
    CHECK(feature_count(dir.file("m.json")) == 7);

    const auto kept = run({"train", "--data", path, "--target", "fault", "--epochs", "3", "--use", "serial", "--metrics", dir.file("u.json")});
    REQUIRE(kept.status == 0);
    CHECK(kept.out.find("'serial'") == std::string::npos);
    CHECK(feature_count(dir.file("u.json")) > 7 + 200);  // one one-hot input per training row's serial (about 70% of 300)

    // --use names a column; it cannot also be ignored.
    const auto unknown = run({"train", "--data", path, "--target", "fault", "--use", "serail"});
    CHECK(unknown.status == 2);
    CHECK(unknown.err ==
          "tenon train: error: [cli.column.unknown] " + path +
              ": --use names 'serail', which is not a column (columns: serial, cycle, part_id, line_id, shift, force, die, fault)\n");
    const auto both = run({"train", "--data", path, "--target", "fault", "--use", "serial", "--ignore", "serial"});
    CHECK(both.status == 2);
    CHECK(both.err == "tenon train: error: [cli.option.conflict] --ignore and --use both name the column 'serial'\n");
}

TEST_CASE("tenon train warns about a categorical column with more categories than 10% of the rows") {
    scratch_dir dir("crowded");
    tenon::random_engine rng(9);
    std::string csv = "operator,speed,amps\n";
    for (int i = 0; i < 200; ++i) {
        const double speed = rng.uniform(1.0, 2.0);
        csv += "op" + std::to_string((i * 7) % 30) + "," + std::to_string(speed) + "," + std::to_string(3.0 * speed + rng.uniform(0.0, 0.1)) + "\n";
    }
    const auto path = dir.write("crowded.csv", csv);
    const auto r = run({"train", "--data", path, "--target", "amps", "--epochs", "2"});
    REQUIRE(r.status == 0);
    CHECK(has_line(r.out,
                   "warning: 'operator' has 30 categories in 200 rows, about 6 rows per category: each one-hot input is learned "
                   "from few rows (more categories than 10% of the rows); --ignore operator leaves it out"));
    const auto quiet = run({"train", "--data", path, "--target", "amps", "--epochs", "2", "--quiet"});
    CHECK(quiet.out.empty());
}

// ---------------------------------------------------------------------------
// Item: decimal commas and semicolons

TEST_CASE("tenon train reads a ';' file with decimal commas as numbers, told from the file or named") {
    scratch_dir dir("decimal_comma");
    const auto comma_path = dir.write("comma.csv", press_log(300));
    const auto semi_path = dir.write("semi.csv", press_log(300, ';', true));
    const std::vector<std::string> common = {"--target", "fault", "--epochs", "3", "--seed", "4"};
    auto with = [&](std::vector<std::string> a, const std::string& metrics) {
        a.insert(a.begin(), "train");
        a.insert(a.end(), common.begin(), common.end());
        a.insert(a.end(), {"--metrics", dir.file(metrics)});
        return run(a);
    };
    const auto plain = with({"--data", comma_path}, "plain.json");
    REQUIRE(plain.status == 0);
    CHECK(plain.out.find("note: " + comma_path + " is read") == std::string::npos);  // a comma file reads as before
    const auto detected = with({"--data", semi_path}, "semi.json");
    REQUIRE(detected.status == 0);
    CHECK(has_line(detected.out,
                   "note: " + semi_path +
                       " is read with ';' between fields and decimal commas (told from its first rows; "
                       "--delimiter and --decimal-comma name them)"));
    // "59,8" is a number: the same features and the same scores as the comma file.
    auto a = read_metrics(dir.file("plain.json")), b = read_metrics(dir.file("semi.json"));
    CHECK(a.at("features") == b.at("features"));
    CHECK(a.at("test.accuracy") == b.at("test.accuracy"));
    CHECK(a.at("test.log_loss") == b.at("test.log_loss"));
    const auto named = with({"--data", semi_path, "--delimiter", ";", "--decimal-comma"}, "named.json");
    REQUIRE(named.status == 0);
    CHECK(has_line(named.out, "note: " + semi_path + " is read with ';' between fields and decimal commas"));
    CHECK(read_metrics(dir.file("named.json")).at("test.log_loss") == a.at("test.log_loss"));
    // A tab file is found too.
    std::string tabbed = press_log(300);
    for (auto& c : tabbed)
        if (c == ',') c = '\t';
    const auto tab_path = dir.write("tab.csv", tabbed);
    const auto tab = with({"--data", tab_path}, "tab.json");
    REQUIRE(tab.status == 0);
    CHECK(has_line(tab.out,
                   "note: " + tab_path +
                       " is read with tab between fields and decimal points (told from its first rows; "
                       "--delimiter and --decimal-comma name them)"));
    CHECK(read_metrics(dir.file("tab.json")).at("test.log_loss") == a.at("test.log_loss"));
}

TEST_CASE("tenon train refuses an ambiguous dialect and bad dialect options") {
    scratch_dir dir("ambiguous");
    const auto before = dir.listing();
    const auto grouped = dir.write("grouped.csv", "force;fault\n1.234,5;0\n2.345,5;1\n");
    auto r = run({"train", "--data", grouped, "--target", "fault", "--metrics", dir.file("m.json")});
    CHECK(r.status == 2);
    CHECK(r.err ==
          "tenon train: error: [prep.csv.dialect_ambiguous] " + grouped +
              " line 2 column 1 ('force'): '1.234,5' holds both '.' and ',': thousands separators are not read; write numbers "
              "without them\n");
    const auto thousands = dir.write("thousands.csv", "force;fault\n1,234;0\n2,345;1\n");
    r = run({"train", "--data", thousands, "--target", "fault"});
    CHECK(r.status == 2);
    CHECK(r.err.find("[prep.csv.dialect_ambiguous] " + thousands + ": the decimal mark is ambiguous: every cell with a comma") != std::string::npos);
    const auto two = dir.write("two.csv", "a;b,c\n1;2,3\n");
    r = run({"train", "--data", two, "--target", "c"});
    CHECK(r.status == 2);
    CHECK(r.err ==
          "tenon train: error: [prep.csv.dialect_ambiguous] " + two +
              ": the delimiter is ambiguous: ',' (2 fields) and ';' (2 fields) each split the header and the first rows evenly; "
              "name the delimiter\n");
    r = run({"train", "--data", two, "--target", "b", "--delimiter", "colon"});
    CHECK(r.err == "tenon train: error: [cli.option.value] --delimiter 'colon': not one of ,, ;, tab, |\n");
    r = run({"train", "--data", two, "--target", "b", "--delimiter", ",", "--decimal-comma"});
    CHECK(r.err ==
          "tenon train: error: [cli.option.conflict] --decimal-comma cannot go with --delimiter ',': a comma cannot separate both "
          "fields and decimals\n");
    const auto comma_file = dir.write("comma.csv", "a,b\n1,2\n");
    r = run({"train", "--data", comma_file, "--target", "b", "--decimal-comma"});
    CHECK(r.err ==
          "tenon train: error: [cli.option.conflict] --decimal-comma: " + comma_file +
              " is delimited by ','; a comma cannot separate both fields and decimals (give --delimiter if the file uses another)\n");
    r = run({"train", "--data", comma_file, "--target", "b", "--decimal-comma=yes"});
    CHECK(r.err == "tenon train: error: [cli.option.value] --decimal-comma takes no value\n");
    // Named, the thousands file reads as decimal commas: 1,234 is 1.234.
    r = run({"train", "--data", thousands, "--target", "fault", "--delimiter", ";", "--decimal-comma", "--epochs", "1", "--quiet"});
    CHECK(r.err.find("dialect") == std::string::npos);
    std::vector<std::string> expected = before;
    for (const char* f : {"comma.csv", "grouped.csv", "thousands.csv", "two.csv"}) expected.push_back(f);
    std::sort(expected.begin(), expected.end());
    CHECK(dir.listing() == expected);  // no output file was left
}

// ---------------------------------------------------------------------------
// Item: forcing a column's kind

TEST_CASE("--categorical and --numeric force a column's kind; unknown names and clashes are refused") {
    scratch_dir dir("forced");
    const auto path = dir.write("press.csv", press_log(300));
    const std::vector<std::string> common = {"train", "--data", path, "--target", "fault", "--epochs", "2", "--quiet"};
    auto with = [&](std::vector<std::string> extra) {
        std::vector<std::string> a = common;
        a.insert(a.end(), extra.begin(), extra.end());
        return run(a);
    };
    REQUIRE(with({"--metrics", dir.file("n.json")}).status == 0);
    // die coded 7 or 9: one input as a number, two one-hot inputs as categories.
    REQUIRE(with({"--categorical", "die", "--metrics", dir.file("c.json")}).status == 0);
    CHECK(feature_count(dir.file("c.json")) == feature_count(dir.file("n.json")) + 1);
    // The library reads the same way.
    tenon::csv_options options;
    options.forced_kinds["die"] = tenon::column_kind::categorical;
    const tenon::table t = tenon::read_csv_file(path, options);
    CHECK(t.at("die").kind() == tenon::column_kind::categorical);
    CHECK(t.at("die").categories() == std::vector<std::string>{"7", "9"});

    // --numeric: the first cell that is not a number is named.
    const auto typo = dir.write("typo.csv", "force,grade,fault\n1.5,A,0\n2.5,B,1\n");
    auto r = run({"train", "--data", typo, "--target", "fault", "--numeric", "grade"});
    CHECK(r.status == 2);
    CHECK(r.err == "tenon train: error: [prep.cell.not_numeric] " + typo + " line 2 column 2 ('grade'): 'A' is not a finite number\n");
    r = with({"--categorical", "dye"});
    CHECK(r.status == 2);
    CHECK(r.err ==
          "tenon train: error: [cli.column.unknown] " + path +
              ": --categorical names 'dye', which is not a column (columns: serial, cycle, part_id, line_id, shift, force, die, fault)\n");
    r = with({"--numeric", "forse"});
    CHECK(r.err ==
          "tenon train: error: [cli.column.unknown] " + path +
              ": --numeric names 'forse', which is not a column (columns: serial, cycle, part_id, line_id, shift, force, die, fault)\n");
    r = with({"--categorical", "die", "--numeric", "force,die"});
    CHECK(r.err == "tenon train: error: [cli.option.conflict] --categorical and --numeric both name the column 'die'\n");
    r = with({"--categorical", "fault", "--task", "regress"});
    CHECK(r.err == "tenon train: error: [cli.option.conflict] --categorical names the target 'fault', which --task regress needs as numbers\n");
    r = with({"--categorical", "die,"});
    CHECK(r.err == "tenon train: error: [cli.option.value] --categorical 'die,': an empty column name\n");
}

// ---------------------------------------------------------------------------
// Item: class targets coded as whole numbers

TEST_CASE("a target of 2 to 20 whole numbers is classified by default and says so; --task regress regresses it") {
    scratch_dir dir("class_codes");
    const auto path = dir.write("press.csv", press_log(300));
    auto r = run({"train", "--data", path, "--target", "fault", "--epochs", "2", "--metrics", dir.file("c.json")});
    REQUIRE(r.status == 0);
    CHECK(has_line(r.out, "note: classifying 'fault': it holds 2 distinct whole numbers (0, 1), read as class codes; --task regress regresses it"));
    CHECK(read_metrics(dir.file("c.json")).at("task") == "classification");
    r = run({"train", "--data", path, "--target", "fault", "--epochs", "2", "--task", "regress", "--metrics", dir.file("r.json")});
    REQUIRE(r.status == 0);
    CHECK(r.out.find("classifying") == std::string::npos);
    CHECK(read_metrics(dir.file("r.json")).at("task") == "regression");

    // The rule's edges: 20 values classify, 21 do not; fractions and too few rows per value do not.
    auto target_file = [&](const std::string& name, std::size_t rows, auto value_of) {
        std::string csv = "x,y\n";
        for (std::size_t i = 0; i < rows; ++i) csv += std::to_string(i % 13) + "," + value_of(i) + "\n";
        return dir.write(name, csv);
    };
    auto task_of = [&](const std::string& data) {
        const auto m = dir.file(data + ".json");
        const auto result = run({"train", "--data", data, "--target", "y", "--epochs", "1", "--split", "random", "--quiet", "--metrics", m});
        REQUIRE(result.status == 0);
        return read_metrics(m).at("task");
    };
    CHECK(task_of(target_file("twenty.csv", 200, [](std::size_t i) { return std::to_string(i % 20); })) == "classification");
    CHECK(task_of(target_file("twentyone.csv", 210, [](std::size_t i) { return std::to_string(i % 21); })) == "regression");
    CHECK(task_of(target_file("halves.csv", 200, [](std::size_t i) { return std::to_string(i % 2) + ".5"; })) == "regression");
    CHECK(task_of(target_file("sparse.csv", 49, [](std::size_t i) { return std::to_string(i % 10); })) == "regression");  // 4.9 rows per value
    CHECK(task_of(target_file("enough.csv", 50, [](std::size_t i) { return std::to_string(i % 10); })) == "classification");
}

TEST_CASE("a model trained on a ';' file with decimal commas infers, retrains and measures drift on such files") {
    scratch_dir dir("dialect_after_training");
    const auto comma_path = dir.write("comma.csv", press_log(300));
    const auto semi_path = dir.write("semi.csv", press_log(300, ';', true));
    REQUIRE(
        run({"train", "--data", semi_path, "--target", "fault", "--epochs", "3", "--categorical", "die", "--model", dir.file("press.tnm"), "--quiet"})
            .status == 0);
    // The same rows written either way give the same predictions.
    REQUIRE(run({"infer", "--model", dir.file("press.tnm"), "--data", semi_path, "--out", dir.file("semi_p.csv"), "--quiet"}).status == 0);
    REQUIRE(run({"infer", "--model", dir.file("press.tnm"), "--data", comma_path, "--out", dir.file("comma_p.csv"), "--quiet"}).status == 0);
    const std::string predicted = cli_test::read_file(dir.file("semi_p.csv"));
    CHECK(predicted.size() > 300 * 10);
    CHECK(predicted == cli_test::read_file(dir.file("comma_p.csv")));
    // Retraining and drift read the file the same way (the die stays categorical through the model's plan).
    const auto retrained = run({"retrain", "--model", dir.file("press.tnm"), "--data", semi_path, "--out", dir.file("next.tnm"), "--epochs", "2"});
    CHECK((retrained.status == 0 || retrained.status == 4));
    CHECK(retrained.err.empty());
    const auto drift = run({"drift", "--model", dir.file("press.tnm"), "--data", semi_path});
    CHECK(drift.status == 0);  // the training rows themselves: nothing drifted
    CHECK(drift.err.empty());
}

TEST_CASE("tenon train --help explains the options for plant files") {
    const auto r = run({"train", "--help"});
    CHECK(r.status == 0);
    for (const char* option : {"--use COL,COL", "--categorical COL,COL", "--numeric COL,COL", "--delimiter D", "--decimal-comma"}) {
        CAPTURE(std::string(option));
        CHECK(r.out.find(std::string("  ") + option + " ") != std::string::npos);
    }
    for (const char* rule : {"2 to 20 distinct whole numbers", "95% of 20 or more rows",
                             "more categories than 10% of\n                         the rows", "Thousands separators are never read"}) {
        CAPTURE(std::string(rule));
        CHECK(r.out.find(rule) != std::string::npos);
    }
}

// The last reading repeated (persistence, the usual first yardstick of a
// forecast) is reported for a series: the rows are written out of time order
// so that the tool must order them by the time column, not by the file.
TEST_CASE("a chronological regression reports the last reading repeated, ordered by the time column") {
    scratch_dir dir("last_reading");
    tenon::random_engine rng(11);
    const std::size_t n = 400;
    std::vector<double> level(n);
    double x = 50.0;
    for (std::size_t h = 0; h < n; ++h) {
        x += rng.normal(0.0, 1.0);  // a random walk: the last reading is the best forecast
        level[h] = x;
    }
    std::vector<std::size_t> file_order(n);
    for (std::size_t i = 0; i < n; ++i) file_order[i] = (i * 7) % n;  // 7 and 400 are coprime: every hour once
    std::string csv = "hour,ambient,level\n";
    for (std::size_t h : file_order) csv += std::to_string(h) + "," + std::to_string(rng.uniform(15.0, 25.0)) + "," + std::to_string(level[h]) + "\n";
    const std::string path = dir.write("tank.csv", csv);
    const auto r = run({"train", "--data", path, "--target", "level", "--split", "chronological", "--time-column", "hour", "--epochs", "3",
                        "--ensemble", "1", "--metrics", dir.file("m.json")});
    REQUIRE(r.status == 0);
    const auto m = read_metrics(dir.file("m.json"));
    // The test rows are the latest 15% of hours (60 of 400); each is
    // predicted by the hour before it, read back from the CSV text's values.
    const std::size_t test_rows = static_cast<std::size_t>(std::stod(m.at("rows.test")));
    REQUIRE(test_rows == 60);
    double squares = 0.0;
    for (std::size_t h = n - test_rows; h < n; ++h) {
        const double now = std::stod(std::to_string(level[h])), before = std::stod(std::to_string(level[h - 1]));
        squares += (now - before) * (now - before);
    }
    CHECK(std::stod(m.at("last_reading.test.rows")) == doctest::Approx(static_cast<double>(test_rows)));
    CHECK(std::stod(m.at("last_reading.test.rmse")) == doctest::Approx(std::sqrt(squares / static_cast<double>(test_rows))).epsilon(1e-9));
    CHECK(m.count("last_reading.validation.rmse") == 1);
    CHECK(r.out.find("last reading repeated: RMSE ") != std::string::npos);
    // Not a series: no such yardstick.
    const auto random_split =
        run({"train", "--data", path, "--target", "level", "--epochs", "2", "--ensemble", "1", "--metrics", dir.file("r.json"), "--quiet"});
    REQUIRE(random_split.status == 0);
    CHECK(read_metrics(dir.file("r.json")).at("last_reading") == "null");
}
