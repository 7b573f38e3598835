// Tests of time stamps as plant loggers write them: the forms of
// prep/cell_parsing.hpp, per-column detection in prep/csv.hpp, the form kept
// in the plan (prep/plan.hpp) and the cyclic time values.
//
// Expected epoch seconds are computed here by counting days year by year and
// month by month from 1970-01-01 (the plain definition of the proleptic
// Gregorian calendar, ISO 8601:2004 section 3.2.1), independently of the
// library's days_from_civil (Hinnant 2013, "chrono-Compatible Low-Level Date
// Algorithms"), and checked once against a well-known value.
#include <doctest/doctest.h>

#include <cmath>
#include <cstdint>
#include <sstream>
#include <string>
#include <vector>

#include <tenon/prep/cell_parsing.hpp>
#include <tenon/prep/csv.hpp>
#include <tenon/prep/plan.hpp>
#include <tenon/prep/split.hpp>

#include "prep_test_support.hpp"

using prep_test::error_code_of;

namespace {

// Days from 1970-01-01 to y-m-d by counting whole years and months.
std::int64_t counted_days(int year, int month, int day) {
    const auto leap = [](int y) { return (y % 4 == 0 && y % 100 != 0) || y % 400 == 0; };
    const int month_days[12] = {31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31};
    std::int64_t days = 0;
    for (int y = 1970; y < year; ++y) days += leap(y) ? 366 : 365;
    for (int y = year; y < 1970; ++y) days -= leap(y) ? 366 : 365;
    for (int m = 1; m < month; ++m) days += month_days[m - 1] + (m == 2 && leap(year) ? 1 : 0);
    return days + day - 1;
}

double counted_seconds(int year, int month, int day, int hour = 0, int minute = 0, double second = 0) {
    return static_cast<double>(counted_days(year, month, day)) * 86400.0 + hour * 3600.0 + minute * 60.0 + second;
}

tenon::table read_text(const std::string& text, const tenon::csv_options& options = {}) {
    std::istringstream in(text);
    return tenon::read_csv(in, options, "log.csv");
}

double read_as(const char* cell, tenon::time_format form) {
    double t = -1;
    REQUIRE_MESSAGE(tenon::parse_datetime(cell, form, t), cell);
    return t;
}

}  // namespace

TEST_CASE("the day count of the test agrees with a well-known epoch value") {
    // 2010-01-01T00:00:00Z is 1262304000 s after the epoch (from memory; the
    // count: 40 years of which 10 leap years = 14610 days).
    CHECK(counted_seconds(2010, 1, 1) == 1262304000.0);
    CHECK(counted_days(1969, 12, 31) == -1);
}

TEST_CASE("every time-stamp form reads to the counted epoch seconds") {
    using tf = tenon::time_format;
    // YYYY-MM-DD HH:MM[:SS[.fff]] and ISO 8601 with T, Z and offsets.
    CHECK(read_as("2010-01-02 00:00", tf::iso) == counted_seconds(2010, 1, 2));
    CHECK(read_as("2023-07-14 06:45:09", tf::iso) == counted_seconds(2023, 7, 14, 6, 45, 9));
    CHECK(read_as("2023-07-14 06:45:09.250", tf::iso) == doctest::Approx(counted_seconds(2023, 7, 14, 6, 45, 9.25)));
    CHECK(read_as("2023-07-14T06:45:09Z", tf::iso) == counted_seconds(2023, 7, 14, 6, 45, 9));
    CHECK(read_as("2023-07-14T08:45:09+02:00", tf::iso) == counted_seconds(2023, 7, 14, 6, 45, 9));
    CHECK(read_as("2023-07-14T08:45:09+0200", tf::iso) == counted_seconds(2023, 7, 14, 6, 45, 9));
    CHECK(read_as("2023-07-14T01:15:09-05:30", tf::iso) == counted_seconds(2023, 7, 14, 6, 45, 9));
    CHECK(read_as("2024-02-29", tf::iso) == counted_seconds(2024, 2, 29));
    // YYYY/MM/DD HH:MM[:SS], the form of issue 21's logger.
    CHECK(read_as("2010/01/02 00:00", tf::year_slash) == counted_seconds(2010, 1, 2));
    CHECK(read_as("2010/01/02 13:07:59", tf::year_slash) == counted_seconds(2010, 1, 2, 13, 7, 59));
    CHECK(read_as("1999/12/31", tf::year_slash) == counted_seconds(1999, 12, 31));
    // DD.MM.YYYY HH:MM[:SS]
    CHECK(read_as("02.01.2010 00:00", tf::day_dot) == counted_seconds(2010, 1, 2));
    CHECK(read_as("31.12.1969 23:59:59", tf::day_dot) == counted_seconds(1969, 12, 31, 23, 59, 59));
    // Slash dates, day first and month first.
    CHECK(read_as("03/04/2021 10:30", tf::day_slash) == counted_seconds(2021, 4, 3, 10, 30));
    CHECK(read_as("03/04/2021 10:30", tf::month_slash) == counted_seconds(2021, 3, 4, 10, 30));
    // Unix epoch seconds and milliseconds.
    CHECK(read_as("1262390400", tf::epoch_seconds) == counted_seconds(2010, 1, 2));
    CHECK(read_as("1262390400500", tf::epoch_milliseconds) == doctest::Approx(counted_seconds(2010, 1, 2, 0, 0, 0.5)));
    // detect reads the three unambiguous text forms.
    CHECK(read_as("2010/01/02 00:00", tf::detect) == counted_seconds(2010, 1, 2));
    CHECK(read_as("02.01.2010", tf::detect) == counted_seconds(2010, 1, 2));
    double t = 0;
    CHECK_FALSE(tenon::parse_datetime("03/04/2021", tf::detect, t));  // ambiguous: never guessed
    CHECK_FALSE(tenon::parse_datetime("2010/01/02T00:00", tf::year_slash, t));
    CHECK_FALSE(tenon::parse_datetime("2010-01-02 00:00", tf::year_slash, t));  // one form per column
    CHECK_FALSE(tenon::parse_datetime("13/13/2021", tf::day_slash, t));
    CHECK_FALSE(tenon::parse_datetime("29.02.2023", tf::day_dot, t));  // not a leap year
    CHECK_FALSE(tenon::parse_datetime("02.01.2010 24:00", tf::day_dot, t));
    CHECK_FALSE(tenon::parse_datetime("2023-07-14T08:45+02:", tf::iso, t));
    CHECK_FALSE(tenon::parse_datetime("12:30", tf::epoch_seconds, t));
}

TEST_CASE("time formats have names that read back") {
    for (std::uint8_t k = 0; k <= 7; ++k) {
        const auto form = static_cast<tenon::time_format>(k);
        tenon::time_format back = tenon::time_format::detect;
        CHECK(tenon::time_format_from_text(tenon::to_string(form), back));
        CHECK(back == form);
    }
    tenon::time_format unused{};
    CHECK_FALSE(tenon::time_format_from_text("YYYY-DD-MM", unused));
}

TEST_CASE("read_csv detects one form per column and keeps it") {
    const auto t = read_text("a,b,c,d,e\n"
                             "2010/01/02 00:00,02.01.2010 00:00,2010-01-02T00:00Z,25/12/2020,12/25/2020\n"
                             "2010/01/02 01:00,02.01.2010 01:00,2010-01-02 01:00,26/12/2020,12/26/2020\n");
    CHECK(t.at("a").time_form() == tenon::time_format::year_slash);
    CHECK(t.at("b").time_form() == tenon::time_format::day_dot);
    CHECK(t.at("c").time_form() == tenon::time_format::iso);
    CHECK(t.at("d").time_form() == tenon::time_format::day_slash);  // 25 cannot be a month
    CHECK(t.at("e").time_form() == tenon::time_format::month_slash);  // 25 cannot be a month
    for (const char* name : {"a", "b", "c"}) {
        CHECK(t.at(name).kind() == tenon::column_kind::datetime);
        CHECK(t.at(name).number(1) == counted_seconds(2010, 1, 2, 1, 0));
    }
    CHECK(t.at("d").number(0) == counted_seconds(2020, 12, 25));
    CHECK(t.at("e").number(1) == counted_seconds(2020, 12, 26));
}

TEST_CASE("slash dates that read both ways are refused unless the form is given") {
    const std::string text = "stamp,x\n03/04/2021 10:30,1\n05/06/2021 11:00,2\n";
    std::string message;
    CHECK(error_code_of([&] { read_text(text); }, &message) == "prep.time.ambiguous");
    CHECK(message ==
          "[prep.time.ambiguous] log.csv, column 'stamp': dates such as '03/04/2021 10:30' read both day-first (DD/MM/YYYY) "
          "and month-first (MM/DD/YYYY); give the time format");
    tenon::csv_options day_first;
    day_first.default_time_format = tenon::time_format::day_slash;
    CHECK(read_text(text, day_first).at("stamp").number(0) == counted_seconds(2021, 4, 3, 10, 30));
    tenon::csv_options month_first;
    month_first.time_formats["stamp"] = tenon::time_format::month_slash;
    const auto t = read_text(text, month_first);
    CHECK(t.at("stamp").number(0) == counted_seconds(2021, 3, 4, 10, 30));
    CHECK(t.at("stamp").time_form() == tenon::time_format::month_slash);
}

TEST_CASE("epoch columns are numbers unless a form names them") {
    const std::string text = "ms,s\n1262390400000,1262390400\n1262390460000,1262390460\n";
    const auto plain = read_text(text);
    CHECK(plain.at("ms").kind() == tenon::column_kind::numeric);
    tenon::csv_options o;
    o.time_formats["ms"] = tenon::time_format::epoch_milliseconds;
    o.time_formats["s"] = tenon::time_format::epoch_seconds;
    const auto t = read_text(text, o);
    CHECK(t.at("ms").kind() == tenon::column_kind::datetime);
    CHECK(t.at("ms").number(1) == counted_seconds(2010, 1, 2, 0, 1));
    CHECK(t.at("s").number(1) == counted_seconds(2010, 1, 2, 0, 1));
    std::string message;
    o.time_formats["ms"] = tenon::time_format::day_dot;
    CHECK(error_code_of([&] { read_text(text, o); }, &message) == "prep.cell.not_datetime");
    CHECK(message == "[prep.cell.not_datetime] log.csv line 2 column 1 ('ms'): '1262390400000' is not a date/time in the form DD.MM.YYYY");
    tenon::csv_options unknown;
    unknown.time_formats["when"] = tenon::time_format::iso;
    CHECK(error_code_of([&] { read_text(text, unknown); }) == "prep.column.unknown");
}

TEST_CASE("a chronological split gives the same rows whichever form the file uses") {
    // Twelve rows out of time order; the same instants written five ways.
    const int order[12] = {7, 2, 11, 0, 5, 9, 1, 3, 10, 6, 4, 8};
    const auto write = [&](int form) {
        std::string text = "stamp,x\n";
        for (int k = 0; k < 12; ++k) {
            const int i = order[k];
            const int day = 1 + i % 28, month = 1 + (i * 5) % 12, hour = (i * 7) % 24;
            const auto two = [](int v) { return std::string(v < 10 ? "0" : "") + std::to_string(v); };
            const double seconds = counted_seconds(2020 + i / 6, month, day, hour, 15);
            std::string cell;
            switch (form) {
            case 0: cell = std::to_string(2020 + i / 6) + "-" + two(month) + "-" + two(day) + " " + two(hour) + ":15"; break;
            case 1: cell = std::to_string(2020 + i / 6) + "/" + two(month) + "/" + two(day) + " " + two(hour) + ":15:00"; break;
            case 2: cell = two(day) + "." + two(month) + "." + std::to_string(2020 + i / 6) + " " + two(hour) + ":15"; break;
            case 3:
                cell = std::to_string(2020 + i / 6) + "-" + two(month) + "-" + two(day) + "T" + two((hour + 1) % 24) + ":15+01:00";
                if (hour == 23) cell = std::to_string(2020 + i / 6) + "-" + two(month) + "-" + two(day) + "T" + two(hour) + ":15Z";
                break;
            default: cell = std::to_string(static_cast<std::int64_t>(seconds) * 1000); break;
            }
            text += cell + "," + std::to_string(k) + "\n";
        }
        return text;
    };
    std::vector<std::size_t> reference_test;
    for (int form = 0; form < 5; ++form) {
        tenon::csv_options o;
        if (form == 4) o.time_formats["stamp"] = tenon::time_format::epoch_milliseconds;
        const auto t = read_text(write(form), o);
        REQUIRE(t.at("stamp").kind() == tenon::column_kind::datetime);
        std::vector<double> times(t.row_count());
        for (std::size_t r = 0; r < times.size(); ++r) times[r] = t.at("stamp").number(r);
        const auto split = tenon::chronological_holdout(times, {0.5, 0.25, 0.25});
        if (form == 0) {
            reference_test = split.test;
            // The test subset is the file rows of the three latest instants.
            std::vector<std::pair<double, std::size_t>> by_time;
            for (std::size_t r = 0; r < times.size(); ++r) by_time.emplace_back(times[r], r);
            std::sort(by_time.begin(), by_time.end());
            std::vector<std::size_t> latest;
            for (std::size_t k = 9; k < 12; ++k) latest.push_back(by_time[k].second);
            std::sort(latest.begin(), latest.end());
            CHECK(split.test == latest);
        } else {
            CHECK_MESSAGE(split.test == reference_test, "form " << form);
        }
    }
}

TEST_CASE("the plan keeps the form, so raw rows read like the training file") {
    tenon::csv_options o;
    o.default_time_format = tenon::time_format::day_slash;
    const auto t = read_text("stamp,y\n03/04/2021 10:30,1\n05/06/2021 11:00,2\n07/08/2021 12:00,3\n", o);
    tenon::plan preparation;
    preparation.set_target("y", tenon::target_kind::regression);
    const auto measured = preparation.measure(t, {0, 1, 2});
    CHECK(measured.feature_time_form("stamp") == tenon::time_format::day_slash);
    const auto back = tenon::measured_plan::from_bytes(measured.to_bytes());
    CHECK(back.feature_time_form("stamp") == tenon::time_format::day_slash);
    const std::string_view day_first = "05/06/2021 11:00";
    double a = 0, b = 0;
    back.apply_cells(&day_first, 1, &a);
    measured.apply_cells(&day_first, 1, &b);
    CHECK(a == b);
    CHECK(a == doctest::Approx(measured.feature_scaling("stamp").forward(counted_seconds(2021, 6, 5, 11, 0))));
    const std::string_view other_form = "2021-06-05 11:00";
    std::string message;
    CHECK(error_code_of([&] { back.apply_cells(&other_form, 1, &a); }, &message) == "prep.cell.not_datetime");
    CHECK(message == "[prep.cell.not_datetime] raw row, column 'stamp': '2021-06-05 11:00' is not a date/time in the form DD/MM/YYYY");
}

TEST_CASE("cyclic time values: hour of day, day of week, day of year") {
    const double pi = 3.14159265358979323846;
    double c[6];
    // 2024-01-01 was a Monday (from memory; 2024-01-01 is day 19723 and
    // (19723 + 3) mod 7 = 0 with day 0, 1970-01-01, a Thursday = 3).
    tenon::time_cycles(counted_seconds(2024, 1, 1, 6, 0), c);
    CHECK(c[0] == doctest::Approx(std::sin(2 * pi * 6 / 24)));
    CHECK(c[1] == doctest::Approx(std::cos(2 * pi * 6 / 24)).epsilon(1e-12).scale(1));
    CHECK(c[2] == doctest::Approx(0.0).scale(1));  // Monday = 0
    CHECK(c[3] == doctest::Approx(1.0));
    CHECK(c[4] == doctest::Approx(0.0).scale(1));  // 1 January = day 0 of the year
    CHECK(c[5] == doctest::Approx(1.0));
    // 2024-12-31 18:30 is a Tuesday, day 365 of a 366-day year.
    tenon::time_cycles(counted_seconds(2024, 12, 31, 18, 30), c);
    CHECK(c[0] == doctest::Approx(std::sin(2 * pi * 18.5 / 24)));
    CHECK(c[2] == doctest::Approx(std::sin(2 * pi * 1 / 7)));
    CHECK(c[4] == doctest::Approx(std::sin(2 * pi * 365 / 366)));
    CHECK(c[5] == doctest::Approx(std::cos(2 * pi * 365 / 366)));
    // Before the epoch: 1969-12-31 23:00 is a Wednesday, day 364 of 365.
    tenon::time_cycles(counted_seconds(1969, 12, 31, 23, 0), c);
    CHECK(c[0] == doctest::Approx(std::sin(2 * pi * 23 / 24)));
    CHECK(c[2] == doctest::Approx(std::sin(2 * pi * 2 / 7)));
    CHECK(c[4] == doctest::Approx(std::sin(2 * pi * 364 / 365)));
}

TEST_CASE("the plan gives cyclic values on request, also of the time column alone") {
    const auto t = read_text("stamp,load,y\n2024-01-01 06:00,1,1\n2024-12-31 18:30,2,2\n2024-06-15 12:00,3,3\n");
    tenon::plan preparation;
    preparation.set_target("y", tenon::target_kind::regression);
    tenon::feature_steps with_cycles;
    with_cycles.time = tenon::time_encoding::value_and_cycles;
    with_cycles.missing_indicator = true;
    with_cycles.fill = tenon::fill_method::median;
    preparation.set_steps("stamp", with_cycles);
    const auto measured = preparation.measure(t, {0, 1, 2});
    const std::vector<std::string> names = {"stamp",
                                            "stamp#hour_sin",
                                            "stamp#hour_cos",
                                            "stamp#weekday_sin",
                                            "stamp#weekday_cos",
                                            "stamp#yearday_sin",
                                            "stamp#yearday_cos",
                                            "stamp#missing",
                                            "load"};
    CHECK(measured.feature_names() == names);
    const auto rows = measured.apply<double>(t, {1});
    double c[6];
    tenon::time_cycles(counted_seconds(2024, 12, 31, 18, 30), c);
    for (std::size_t k = 0; k < 6; ++k) CHECK(rows.features(0, 1 + k) == doctest::Approx(c[k]));
    CHECK(rows.features(0, 7) == 0.0);
    // The same features from raw cells, and through the plan's bytes.
    const auto back = tenon::measured_plan::from_bytes(measured.to_bytes());
    const std::string_view cells[2] = {"2024-12-31 18:30", "2"};
    std::vector<double> raw(back.feature_count());
    back.apply_cells(cells, 2, raw.data());
    for (std::size_t k = 0; k < raw.size(); ++k) CHECK(raw[k] == doctest::Approx(rows.features(0, k)));

    // The time column (the split's) gives its cyclic values alone.
    tenon::plan by_time;
    by_time.set_target("y", tenon::target_kind::regression);
    by_time.set_role("stamp", tenon::column_role::time);
    tenon::feature_steps cycles;
    cycles.time = tenon::time_encoding::cycles;
    by_time.set_steps("stamp", cycles);
    const auto timed = by_time.measure(t, {0, 1, 2});
    CHECK(timed.time_column() == "stamp");
    CHECK(timed.feature_count() == 7);
    CHECK(timed.feature_names().front() == "stamp#hour_sin");
    CHECK(timed.feature_time_encoding("stamp") == tenon::time_encoding::cycles);

    // Cycles asked of a numeric column by name are refused.
    tenon::plan wrong;
    wrong.set_target("y", tenon::target_kind::regression);
    wrong.set_steps("load", cycles);
    CHECK(error_code_of([&] { wrong.measure(t, {0, 1, 2}); }) == "prep.column.kind");
}

TEST_CASE("plans without time forms are still written as plan version 1, and version 1 still reads") {
    // A date/time column made by a host (no form): the bytes are version 1,
    // as before forms were kept, and read back with the form detect.
    tenon::table host("host");
    host.add_column("when", tenon::column_kind::datetime);
    host.add_column("y", tenon::column_kind::numeric);
    for (int i = 0; i < 3; ++i) {
        host[0].push_number(counted_seconds(2024, 1, 1 + i));
        host[1].push_number(i);
    }
    tenon::plan preparation;
    preparation.set_target("y", tenon::target_kind::regression);
    const auto bytes = preparation.measure(host, {0, 1, 2}).to_bytes();
    CHECK(bytes[4] == 1);  // u16 little-endian version after the magic TNPL
    CHECK(bytes[5] == 0);
    const auto back = tenon::measured_plan::from_bytes(bytes);
    CHECK(back.feature_time_form("when") == tenon::time_format::detect);
    const std::string_view cells[] = {"02.01.2024 00:00"};  // detect reads every unambiguous text form
    double x = 0;
    back.apply_cells(cells, 1, &x);
    CHECK(x == doctest::Approx(back.feature_scaling("when").forward(counted_seconds(2024, 1, 2))));
    // A column read from a file keeps its form: version 2.
    const auto t = read_text("when,y\n2024-01-01,0\n2024-01-02,1\n2024-01-03,2\n");
    CHECK(preparation.measure(t, {0, 1, 2}).to_bytes()[4] == 2);
}
