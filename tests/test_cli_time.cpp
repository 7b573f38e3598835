// Tests of time stamps and drift through the `tenon` tool
// (examples/cli/, library tenon_tool), run in process: --time-format, --time-cycles, the
// form kept in the model and shown by inspect, new rows read in that form,
// and the drift table's noise floor. The press log is invented.
#include <doctest/doctest.h>

#include <cmath>
#include <string>
#include <vector>

#include "cli_test_support.hpp"

namespace {

using cli_test::cli_result;

cli_result run(std::vector<std::string> args) { return cli_test::run_tool(std::move(args)); }

struct scratch_dir : cli_test::scratch_dir {
    explicit scratch_dir(const std::string& name) : cli_test::scratch_dir("tenon_cli_time_tests_", name) {}
};

bool contains(const std::string& text, const std::string& part) { return text.find(part) != std::string::npos; }

// An invented press log, one row an hour from 2021-01-01 00:00 for `rows`
// hours; the force follows the hour of day (a day shift runs hotter), so
// the stamps matter. `form` 0 writes DD/MM/YYYY HH:MM, 1 YYYY/MM/DD HH:MM.
std::string press_log(int rows, int form, int first_day = 1) {
    std::string text = "stamp,strokes,force\n";
    const int month_days[12] = {31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31};
    int month = 1, day = first_day;
    for (int i = 0; i < rows; ++i) {
        const int hour = i % 24;
        if (i > 0 && hour == 0 && ++day > month_days[month - 1]) {
            day = 1;
            ++month;
        }
        const auto two = [](int v) { return std::string(v < 10 ? "0" : "") + std::to_string(v); };
        const std::string stamp =
            form == 0 ? two(day) + "/" + two(month) + "/2021 " + two(hour) + ":00" : "2021/" + two(month) + "/" + two(day) + " " + two(hour) + ":00";
        const int strokes = 2 + (i * 7) % 5;
        const double force = 100.0 + 10.0 * std::sin(6.283185307179586 * hour / 24.0) + strokes;
        text += stamp + "," + std::to_string(strokes) + "," + std::to_string(force) + "\n";
    }
    return text;
}

}  // namespace

TEST_CASE("the tool refuses ambiguous slash dates until --time-format says which") {
    scratch_dir dir("ambiguous");
    // Days 1-12 of January: every stamp reads day-first and month-first.
    const std::string data = dir.write("press.csv", press_log(200, 0));
    const auto refused = run({"train", "--data", data, "--target", "force", "--epochs", "2", "--quiet"});
    CHECK(refused.status == 2);
    CHECK(contains(refused.err,
                   "[prep.time.ambiguous] " + data +
                       ", column 'stamp': dates such as '01/01/2021 00:00' read both "
                       "day-first (DD/MM/YYYY) and month-first (MM/DD/YYYY); give the time format with --time-format "
                       "DD/MM/YYYY or MM/DD/YYYY (or COLUMN=FORM)"));
    const auto bad = run({"train", "--data", data, "--target", "force", "--time-format", "DD-MM-YYYY"});
    CHECK(bad.status == 2);
    CHECK(contains(bad.err,
                   "[cli.option.value] --time-format 'DD-MM-YYYY': 'DD-MM-YYYY' is not a time format (one of YYYY-MM-DD, "
                   "YYYY/MM/DD, DD.MM.YYYY, DD/MM/YYYY, MM/DD/YYYY, epoch-seconds, epoch-milliseconds)"));
    const auto epoch = run({"train", "--data", data, "--target", "force", "--time-format", "epoch-seconds"});
    CHECK(epoch.status == 2);
    CHECK(contains(epoch.err,
                   "[cli.option.missing] --time-format epoch-seconds needs --time-column COLUMN, or name the column: "
                   "--time-format COLUMN=epoch-seconds"));

    const auto day_first = run({"train", "--data", data, "--target", "force", "--time-format", "stamp=DD/MM/YYYY", "--time-column", "stamp",
                                "--split", "chronological", "--time-cycles", "--epochs", "2", "--quiet", "--model", dir.file("press.tnm")});
    REQUIRE_MESSAGE(day_first.status == 0, day_first.err);
    const auto shown = run({"inspect", "--model", dir.file("press.tnm")});
    REQUIRE(shown.status == 0);
    CHECK(contains(shown.out, "  stamp (datetime)\n"));
    CHECK(contains(shown.out, "    time form    DD/MM/YYYY\n"));
    CHECK(contains(shown.out, "only hour of day, day of week, day of year as sine/cosine pairs"));
    CHECK(contains(shown.out, "-> 7 features"));  // strokes + six cyclic values of the time column
    const auto json = run({"inspect", "--model", dir.file("press.tnm"), "--json"});
    CHECK(contains(json.out, "\"time_format\": \"DD/MM/YYYY\""));
    CHECK(contains(json.out, "\"time_features\": \"cycles\""));

    // New rows are read in the kept form: infer and drift on rows whose
    // stamps alone would be refused as ambiguous.
    const std::string later = dir.write("later.csv", press_log(100, 0, 2));
    const auto inferred = run({"infer", "--model", dir.file("press.tnm"), "--data", later, "--out", dir.file("p.csv"), "--quiet"});
    CHECK_MESSAGE(inferred.status == 0, inferred.err);
    const auto drift = run({"drift", "--model", dir.file("press.tnm"), "--data", later});
    CHECK_MESSAGE(drift.status != 2, drift.err);
    CHECK(contains(drift.out, "PSI noise"));
}

TEST_CASE("a whole-number column's drift bins are labelled by value, and unchanged rows are stable") {
    scratch_dir dir("discrete");
    const std::string data = dir.write("press.csv", press_log(600, 1));
    REQUIRE(run({"train", "--data", data, "--target", "force", "--epochs", "2", "--quiet", "--model", dir.file("press.tnm")}).status == 0);
    const auto json = run({"drift", "--model", dir.file("press.tnm"), "--data", data, "--json"});
    CHECK_MESSAGE(json.status == 0, json.out);  // the training rows themselves: nothing drifted
    for (const char* label : {"\"label\": \"2\"", "\"label\": \"3\"", "\"label\": \"6\"", "\"label\": \"(between values)\""})
        CHECK(contains(json.out, label));
    CHECK_FALSE(contains(json.out, "[2, "));
    const auto shown = run({"inspect", "--model", dir.file("press.tnm")});
    CHECK(contains(shown.out, "    time form    YYYY/MM/DD\n"));
}
