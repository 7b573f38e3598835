// Tests of prep/cell_parsing.hpp, prep/csv.hpp, prep/column_screening.hpp and prep/statistics.hpp.
// CSV edge cases follow RFC 4180 (Shafranovich 2005), section 2, rules 1-7.
#include <doctest/doctest.h>

#include <cmath>
#include <map>
#include <vector>
#include <sstream>
#include <string>

#include <tenon/core/random.hpp>
#include <tenon/prep/cell_parsing.hpp>
#include <tenon/prep/column_screening.hpp>
#include <tenon/prep/csv.hpp>
#include <tenon/prep/statistics.hpp>

#include "prep_test_support.hpp"

using prep_test::error_code_of;

namespace {
tenon::table read_text(const std::string& text, const tenon::csv_options& options = {}) {
    std::istringstream in(text);
    return tenon::read_csv(in, options, "t.csv");
}
}  // namespace

TEST_CASE("numbers parse fully, finitely and independently of the locale") {
    double v = 0;
    CHECK(tenon::parse_number("3.25", v));
    CHECK(v == 3.25);
    CHECK(tenon::parse_number(" -1e3 ", v));
    CHECK(v == -1000.0);
    CHECK(tenon::parse_number("+7", v));
    CHECK(v == 7.0);
    CHECK_FALSE(tenon::parse_number("3,25", v));  // a decimal comma is not a number here
    CHECK_FALSE(tenon::parse_number("12abc", v));
    CHECK_FALSE(tenon::parse_number("inf", v));
    CHECK_FALSE(tenon::parse_number("nan", v));
    CHECK_FALSE(tenon::parse_number("1e999", v));  // overflows to infinity: not finite
    CHECK_FALSE(tenon::parse_number("+-1", v));
    CHECK_FALSE(tenon::parse_number("", v));
}

TEST_CASE("date/times: ISO 8601 and YYYY/MM/DD to seconds since the epoch") {
    double t = 0;
    // 1970-01-01 is day 0; 2000-03-01 is day 11017 (from memory; checked by
    // 30 years * 365 + 7 leap days (72,76,...,96) + Jan 31 + Feb 29 = 11017).
    CHECK(tenon::parse_datetime("1970-01-01", t));
    CHECK(t == 0.0);
    CHECK(tenon::parse_datetime("2000-03-01", t));
    CHECK(t == 11017.0 * 86400.0);
    CHECK(tenon::parse_datetime("2000/03/01", t));
    CHECK(t == 11017.0 * 86400.0);
    CHECK(tenon::parse_datetime("1970-01-01T01:02:03.5Z", t));
    CHECK(t == doctest::Approx(3723.5));
    CHECK(tenon::parse_datetime("1970-01-01 01:02", t));
    CHECK(t == 3720.0);
    CHECK(tenon::parse_datetime("1970-01-01T02:00:00+02:00", t));  // 02:00 at UTC+2 is midnight UTC
    CHECK(t == 0.0);
    CHECK(tenon::parse_datetime("1969-12-31T23:00-01:00", t));
    CHECK(t == 0.0);
    CHECK(tenon::parse_datetime("1969-12-31", t));
    CHECK(t == -86400.0);
    CHECK(tenon::parse_datetime("2024-02-29", t));  // leap year
    CHECK_FALSE(tenon::parse_datetime("2023-02-29", t));  // not a leap year
    CHECK_FALSE(tenon::parse_datetime("1900-02-29", t));  // century rule
    CHECK_FALSE(tenon::parse_datetime("2023-13-01", t));
    CHECK_FALSE(tenon::parse_datetime("2023-01-01T24:00", t));
    CHECK_FALSE(tenon::parse_datetime("2023/01/01T10:00", t));
    CHECK_FALSE(tenon::parse_datetime("2023-01-01T10:00:00.", t));
    CHECK_FALSE(tenon::parse_datetime("2023-1-01", t));
    CHECK_FALSE(tenon::parse_datetime("pump", t));
}

TEST_CASE("RFC 4180: quoted fields hold delimiters, doubled quotes and line breaks; CRLF; BOM") {
    const std::string text = "\xEF\xBB\xBF"
                             "name,note,value\r\n"
                             "\"pump, north\",\"said \"\"hi\"\"\",1\r\n"
                             "press,\"two\r\nlines\",2\r\n"
                             "line,\"\",3";  // no line break after the last record (rule 2)
    auto t = read_text(text);
    REQUIRE(t.column_count() == 3);
    REQUIRE(t.row_count() == 3);
    CHECK(t[0].name() == "name");  // the BOM is not part of the first name
    CHECK(t.at("name").category(0) == "pump, north");
    CHECK(t.at("note").category(0) == "said \"hi\"");
    CHECK(t.at("note").category(1) == "two\r\nlines");
    CHECK(t.at("note").is_missing(2));  // an empty quoted field is an empty cell
    CHECK(t.at("value").kind() == tenon::column_kind::numeric);
    CHECK(t.at("value").number(2) == 3.0);
}

TEST_CASE("a configurable delimiter, blank lines skipped, tiny chunks give the same table") {
    tenon::csv_options options;
    options.delimiter = ';';
    options.chunk_bytes = 1;  // every byte its own chunk
    auto t = read_text("a;b\n1,5;x\n\n2;\"y;z\"\n", options);
    REQUIRE(t.row_count() == 2);
    CHECK(t.at("a").kind() == tenon::column_kind::categorical);  // "1,5" is not a number
    CHECK(t.at("b").category(1) == "y;z");
}

namespace {
tenon::csv_options detect_text(const std::string& text, const tenon::csv_options& given = {}, const tenon::csv_detection& what = {}) {
    std::istringstream in(text);
    return tenon::detect_csv_dialect(in, "t.csv", given, what);
}
}  // namespace

TEST_CASE("limits: a field above max_field_bytes and a column above max_categories are refused with file, line and column") {
    // A 64 KiB field is accepted; one byte more is refused, quoted or not,
    // in the header too, and in the streaming reader.
    const std::string at_limit(std::size_t(1) << 16, 'x');
    CHECK(read_text("id,note\n1," + at_limit + "\n").at("note").category(0).size() == at_limit.size());
    CHECK_THROWS_WITH_AS(read_text("id,note\n1,2\n3," + at_limit + "y\n"),
                         "[prep.csv.oversize] t.csv line 3 column 2: a field longer than the limit of 65536 bytes (csv_options::max_field_bytes)",
                         tenon::error);
    CHECK_THROWS_WITH_AS(read_text("id,note\n1,\"" + at_limit + "\"\"\"\n"), doctest::Contains("t.csv line 2 column 2: a field longer"),
                         tenon::error);
    CHECK_THROWS_WITH_AS(read_text(at_limit + "z,b\n1,2\n"), doctest::Contains("t.csv line 1 column 1: a field longer"), tenon::error);
    tenon::csv_options small;
    small.max_field_bytes = 4;
    CHECK_THROWS_WITH_AS(read_text("a,b\n1234,12345\n", small), doctest::Contains("line 2 column 2: a field longer than the limit of 4 bytes"),
                         tenon::error);
    std::istringstream stream("a,b\n1234,12345\n");
    CHECK_THROWS_WITH_AS(tenon::summarize_csv(stream, small, "s.csv"), doctest::Contains("[prep.csv.oversize] s.csv line 2 column 2"), tenon::error);
    // Distinct categories: 3 pass with a limit of 3, the 4th is refused on its line.
    tenon::csv_options few;
    few.max_categories = 3;
    CHECK(read_text("v,k\n1,a\n2,b\n3,c\n4,a\n", few).at("k").categories().size() == 3);
    CHECK_THROWS_WITH_AS(read_text("v,k\n1,a\n2,b\n3,c\n4,a\n5,d\n", few),
                         doctest::Contains("[prep.csv.oversize] t.csv line 6 column 2 ('k'): more than 3 distinct categories"), tenon::error);
}

TEST_CASE("decimal commas: parsed without a point, refused with ',' as the delimiter") {
    double v = 0;
    CHECK(tenon::parse_decimal_comma_number("59,8", v));
    CHECK(v == 59.8);
    CHECK(tenon::parse_decimal_comma_number(" -0,5 ", v));
    CHECK(v == -0.5);
    CHECK(tenon::parse_decimal_comma_number("12", v));
    CHECK(v == 12.0);
    CHECK(tenon::parse_decimal_comma_number("1,5e3", v));
    CHECK(v == 1500.0);
    CHECK_FALSE(tenon::parse_decimal_comma_number("59.8", v));  // a point is not read with decimal commas
    CHECK_FALSE(tenon::parse_decimal_comma_number("1.234,5", v));  // nor a thousands separator
    CHECK_FALSE(tenon::parse_decimal_comma_number("1,2,3", v));
    CHECK_FALSE(tenon::parse_decimal_comma_number("abc", v));

    tenon::csv_options options;
    options.delimiter = ';';
    options.decimal_comma = true;
    auto t = read_text("force;die\n59,8;7\n-1,25;9\n", options);
    CHECK(t.at("force").kind() == tenon::column_kind::numeric);
    CHECK(t.at("force").number(0) == 59.8);
    CHECK(t.at("force").number(1) == -1.25);
    auto thousands = read_text("force\n1.234\n", options);  // never read as 1.234 nor as 1234
    CHECK(thousands.at("force").kind() == tenon::column_kind::categorical);
    options.forced_kinds["force"] = tenon::column_kind::numeric;
    std::string message;
    CHECK(error_code_of([&] { read_text("force\n5,5\n1.234\n", options); }, &message) == "prep.cell.not_numeric");
    CHECK(message == "[prep.cell.not_numeric] t.csv line 3 column 1 ('force'): '1.234' is not a finite number (read with a decimal comma)");

    tenon::csv_options clash;
    clash.decimal_comma = true;  // with the default ',' delimiter
    CHECK(error_code_of([&] { read_text("a\n1\n", clash); }, &message) == "core.argument.invalid");
    CHECK(message == "[core.argument.invalid] t.csv: decimal commas cannot be read when ',' is also the delimiter");
}

TEST_CASE("the dialect is told from the header and first rows") {
    // A plant export: ';' between fields, ',' before the decimals.
    auto o = detect_text("press;force;die\nP1;59,8;7\nP2;60,1;9\nP1;58;7\n");
    CHECK(o.delimiter == ';');
    CHECK(o.decimal_comma);
    std::istringstream in("press;force;die\nP1;59,8;7\nP2;60,1;9\nP1;58;7\n");
    auto t = tenon::read_csv(in, o, "t.csv");
    CHECK(t.at("force").kind() == tenon::column_kind::numeric);
    CHECK(t.at("force").number(0) == 59.8);
    CHECK(t.at("force").number(2) == 58.0);

    // A comma file is read as before; tab and '|' are found too.
    o = detect_text("a,b\n1.5,x\n2,\"y;z\"\n");
    CHECK(o.delimiter == ',');
    CHECK_FALSE(o.decimal_comma);
    CHECK(detect_text("a\tb\n1.5\t2\n").delimiter == '\t');
    CHECK(detect_text("a|b\n1|2\n").delimiter == '|');
    CHECK_FALSE(detect_text("a|b\n1.5|2\n").decimal_comma);
    CHECK(detect_text("value\n1\n2\n").delimiter == ',');  // one column
    // Only what is asked is detected.
    tenon::csv_options given;
    given.delimiter = ';';
    tenon::csv_detection decimal_only;
    decimal_only.delimiter = false;
    o = detect_text("a;b\n0,125;1\n", given, decimal_only);
    CHECK(o.delimiter == ';');
    CHECK(o.decimal_comma);
    // "0,125" cannot be a thousands group (a group does not start with 0).
    CHECK(detect_text("a;b\n0,125;1\n").decimal_comma);
}

TEST_CASE("ambiguous dialects are refused with the file, the candidates and the cell") {
    std::string message;
    CHECK(error_code_of([] { detect_text("x;y,z\n1;2,3\n4;5,6\n"); }, &message) == "prep.csv.dialect_ambiguous");
    CHECK(message ==
          "[prep.csv.dialect_ambiguous] t.csv: the delimiter is ambiguous: ',' (2 fields) and ';' (2 fields) each split "
          "the header and the first rows evenly; name the delimiter");
    // Decimal commas and decimal points in one file.
    CHECK(error_code_of([] { detect_text("a;b\n59,8;3.5\n"); }, &message) == "prep.csv.dialect_ambiguous");
    CHECK(message ==
          "[prep.csv.dialect_ambiguous] t.csv: the decimal mark is ambiguous: t.csv line 2 column 1 ('a'): '59,8' has a "
          "decimal comma and t.csv line 2 column 2 ('b'): '3.5' a decimal point");
    // Thousands separators are not read (decision: refused rather than guessed).
    CHECK(error_code_of([] { detect_text("a;b\n1.234,5;1\n"); }, &message) == "prep.csv.dialect_ambiguous");
    CHECK(message ==
          "[prep.csv.dialect_ambiguous] t.csv line 2 column 1 ('a'): '1.234,5' holds both '.' and ',': thousands "
          "separators are not read; write numbers without them");
    // "1,234" and "12,500" read as 1.234 or 1234 alike.
    CHECK(error_code_of([] { detect_text("a;b\n1,234;x\n12,500;y\n"); }, &message) == "prep.csv.dialect_ambiguous");
    CHECK(message ==
          "[prep.csv.dialect_ambiguous] t.csv: the decimal mark is ambiguous: every cell with a comma, such as t.csv line "
          "2 column 1 ('a'): '1,234', could be a decimal comma or a thousands separator; name the decimal mark");
    // Named explicitly, the same file reads.
    tenon::csv_options named;
    named.delimiter = ';';
    named.decimal_comma = true;
    auto t = read_text("a;b\n1,234;x\n12,500;y\n", named);
    CHECK(t.at("a").number(1) == 12.5);
    // One cell that cannot be a group settles it.
    CHECK(detect_text("a;b\n1,234;x\n12,5;y\n").decimal_comma);
}

namespace {
// An invented press log for screening: a serial per part, a cycle counter, a
// part number shared by a few parts, the line, the shift, the force, the die
// (7 or 9) and a 0/1 fault.
tenon::table press_log_table(std::size_t rows) {
    tenon::random_engine rng(7);
    std::string csv = "serial,cycle,part_id,line_id,shift,force,die,fault\n";
    for (std::size_t i = 0; i < rows; ++i) {
        const double force = rng.uniform(40.0, 80.0);
        csv += "SN-" + std::to_string(4711 * i % 1000003) + "," + std::to_string(1000 + i) + ",P" + std::to_string(i % 40) + ",L" +
            std::to_string(i % 3) + "," + (i % 3 == 0 ? "night" : "day") + "," + std::to_string(force) + "," + (i % 2 ? "9" : "7") + "," +
            (force > 68.0 ? "1" : "0") + "\n";
    }
    return read_text(csv);
}
}  // namespace

TEST_CASE("screen_columns: distinct values, identifier names, counters; a real categorical is not reported") {
    const tenon::table t = press_log_table(200);
    const auto findings = tenon::screen_columns(t, {}, {"fault"});
    std::map<std::string, tenon::screening_reason> found;
    for (const auto& f : findings) found.emplace(f.column, f.reason);
    REQUIRE(found.size() == 3);
    CHECK(found.at("serial") == tenon::screening_reason::distinct_values);
    CHECK(found.at("cycle") == tenon::screening_reason::counter);
    CHECK(found.at("part_id") == tenon::screening_reason::identifier_name);  // 40 values in 200 rows, named as an identifier
    CHECK(found.count("line_id") == 0);  // 3 lines: a real feature despite the name
    CHECK(found.count("shift") == 0);
    CHECK(found.count("force") == 0);
    CHECK(found.count("die") == 0);  // whole numbers, but not rising on every row
    CHECK(findings.front().explanation() == "200 distinct values in 200 rows: nearly every value is distinct, as in an identifier");

    // Too few rows for any rule to speak.
    CHECK(tenon::screen_columns(press_log_table(19), {}, {"fault"}).empty());
    // Names split into words: "PartSerialNo" is an identifier name, "width" is not.
    CHECK(tenon::detail::name_words("PartSerialNo") == std::vector<std::string>{"part", "serial", "no"});
    CHECK(tenon::detail::name_words("width") == std::vector<std::string>{"width"});
    CHECK(tenon::detail::name_words("station_SN2") == std::vector<std::string>{"station", "sn"});

    // Crowded categories: 30 operators in 200 rows (more than 10% of the rows) warn, without being identifiers.
    std::string csv = "operator,amps\n";
    for (int i = 0; i < 200; ++i) csv += "op" + std::to_string(i % 30) + "," + std::to_string(i % 7) + "\n";
    const auto crowded = tenon::screen_columns(read_text(csv));
    REQUIRE(crowded.size() == 1);
    CHECK(crowded[0].reason == tenon::screening_reason::many_categories);
    CHECK_FALSE(crowded[0].identifier());
    CHECK(crowded[0].explanation() == "30 categories in 200 rows, about 6 rows per category: each one-hot input is learned from few rows");
    CHECK(tenon::to_string(tenon::screening_reason::counter) == std::string("counter"));
}

TEST_CASE("kinds are inferred, missing tokens are missing, kinds can be forced") {
    auto t = read_text("temp,when,site,empty\n"
                       "20.5,2024-01-02,north,NA\n"
                       "NA,2024/01/03,?,\n"
                       "N/A,,south,null\n"
                       "-3,2024-01-04T10:00Z,north,NULL\n");
    CHECK(t.at("temp").kind() == tenon::column_kind::numeric);
    CHECK(t.at("temp").missing_count() == 2);
    CHECK(t.at("when").kind() == tenon::column_kind::datetime);
    CHECK(t.at("when").missing_count() == 1);
    CHECK(t.at("site").kind() == tenon::column_kind::categorical);
    CHECK(t.at("site").categories().size() == 2);
    CHECK(t.at("empty").kind() == tenon::column_kind::numeric);
    CHECK(t.at("empty").missing_count() == 4);

    tenon::csv_options options;
    options.forced_kinds["temp"] = tenon::column_kind::categorical;
    options.missing_tokens = {"", "NA"};
    auto forced = read_text("temp\n1\n?\nNA\n", options);
    CHECK(forced.at("temp").kind() == tenon::column_kind::categorical);
    CHECK(forced.at("temp").missing_count() == 1);
    CHECK(forced.at("temp").category(1) == "?");
}

TEST_CASE("CSV errors name the source, line and column") {
    std::string message;
    CHECK(error_code_of([] { read_text("a,b\n1,2\n3,4,5\n"); }, &message) == "prep.csv.ragged");
    CHECK(message == "[prep.csv.ragged] t.csv line 3: expected 2 fields, found 3");

    CHECK(error_code_of([] { read_text("a,b\n1,2\n3,\"open\n4,5\n"); }, &message) == "prep.csv.unterminated_quote");
    CHECK(message ==
          "[prep.csv.unterminated_quote] t.csv line 3 column 2: the quoted field opened on line 3 is not "
          "closed before the end of the input");

    CHECK(error_code_of([] { read_text("a,b\n1,x\"y\n"); }, &message) == "prep.csv.stray_quote");
    CHECK(message ==
          "[prep.csv.stray_quote] t.csv line 2 column 2: a quote inside an unquoted field (quote the whole "
          "field and double the quote)");
    CHECK(error_code_of([] { read_text("a,b\n1,\"x\"y\n"); }, &message) == "prep.csv.stray_quote");
    CHECK(message ==
          "[prep.csv.stray_quote] t.csv line 2 column 2: a closing quote must be followed by the delimiter "
          "or a line end");

    tenon::csv_options numeric;
    numeric.forced_kinds["b"] = tenon::column_kind::numeric;
    CHECK(error_code_of([&] { read_text("a,b\n1,2\n\"multi\nline\",3\n4,five\n", numeric); }, &message) == "prep.cell.not_numeric");
    CHECK(message == "[prep.cell.not_numeric] t.csv line 5 column 2 ('b'): 'five' is not a finite number");

    tenon::csv_options datetime;
    datetime.forced_kinds["a"] = tenon::column_kind::datetime;
    CHECK(error_code_of([&] { read_text("a\n2024-01-01\n2024-02-30\n", datetime); }, &message) == "prep.cell.not_datetime");
    CHECK(message == "[prep.cell.not_datetime] t.csv line 3 column 1 ('a'): '2024-02-30' is not a date/time");

    tenon::csv_options unknown;
    unknown.forced_kinds["zzz"] = tenon::column_kind::numeric;
    CHECK(error_code_of([&] { read_text("a\n1\n", unknown); }, &message) == "prep.column.unknown");
    CHECK(message == "[prep.column.unknown] t.csv: a kind is forced for column 'zzz', which the header does not name");

    CHECK(error_code_of([] { read_text(""); }, &message) == "prep.csv.no_header");
    CHECK(message == "[prep.csv.no_header] t.csv: no header row (the input is empty)");

    CHECK(error_code_of([] { read_text("a,b,a\n1,2,3\n"); }, &message) == "prep.csv.duplicate_column");
    CHECK(message == "[prep.csv.duplicate_column] t.csv line 1 column 3: the name 'a' is used twice in the header");

    CHECK(error_code_of([] { tenon::read_csv_file("/nonexistent/tenon/x.csv"); }, &message) == "prep.file.open");
    CHECK(
        message ==
        "[prep.file.open] /nonexistent/tenon/x.csv: cannot open for reading (No such file or directory)");  // the system's reason (glibc's text of ENOENT)
    // A directory is not read as an empty or endless file.
    CHECK(error_code_of([] { tenon::read_csv_file(std::string(TENON_SOURCE_DIR) + "/tests"); }, &message) == "prep.file.open");
    CHECK(message.find("cannot") != std::string::npos);

    CHECK(error_code_of([] { read_text("a\n1\n").at("b"); }, &message) == "prep.column.unknown");
    CHECK(message == "[prep.column.unknown] t.csv: no column named 'b'");
}

TEST_CASE("reading from a file gives the same table as from a stream") {
    prep_test::temp_file file("read.csv", "x,y\n1,a\n2,b\n");
    auto t = tenon::read_csv_file(file.path);
    CHECK(t.source() == file.path);
    CHECK(t.row_count() == 2);
    CHECK(t.at("y").category(1) == "b");
}

TEST_CASE("one streaming pass gathers counts, extremes, moments and category sets") {
    std::istringstream in("v,c,t\n1,a,2024-01-01\n2,b,2024-01-02\nNA,a,\n6,c,2024-01-03\n");
    tenon::csv_options options;
    options.chunk_bytes = 3;
    auto s = tenon::summarize_csv(in, options, "s.csv");
    REQUIRE(s.size() == 3);
    CHECK(s[0].name == "v");
    CHECK(s[0].present == 3);
    CHECK(s[0].missing == 1);
    CHECK(s[0].numbers.mean == doctest::Approx(3.0));  // (1+2+6)/3
    CHECK(s[0].numbers.population_variance() == doctest::Approx(14.0 / 3.0));  // (4+1+9)/3
    CHECK(s[0].numbers.minimum == 1.0);
    CHECK(s[0].numbers.maximum == 6.0);
    CHECK(s[0].inferred_kind() == tenon::column_kind::numeric);
    CHECK(s[1].inferred_kind() == tenon::column_kind::categorical);
    CHECK(s[1].category_counts.at("a") == 2);
    CHECK(s[1].category_counts.size() == 3);
    CHECK(s[2].inferred_kind() == tenon::column_kind::datetime);
    CHECK(s[2].times.maximum - s[2].times.minimum == 2 * 86400.0);

    std::istringstream many("c\na\nb\nc\n");
    auto limited = tenon::summarize_csv(many, {}, "m.csv", 2);
    CHECK(limited[0].categories_truncated);
    CHECK(limited[0].category_counts.size() == 2);
}

TEST_CASE("Welford on a stream offset by 1e9 matches a two-pass long double reference") {
    // Reference: two passes (mean first, then squared deviations) in long
    // double, the classic stable method (Chan, Golub & LeVeque 1983, sec. 2).
    tenon::random_engine rng(7);
    const std::size_t n = 100000;
    std::vector<double> x(n);
    for (auto& v : x) v = 1e9 + rng.uniform(-0.5, 0.5);
    long double sum = 0;
    for (double v : x) sum += v;
    const long double mean = sum / n;
    long double ss = 0;
    for (double v : x) ss += (v - mean) * (v - mean);
    const double reference_variance = static_cast<double>(ss / n);

    tenon::running_moments whole;
    for (double v : x) whole.add(v);
    CHECK(std::abs(whole.mean - static_cast<double>(mean)) < 1e-5);  // 1e-14 relative
    CHECK(whole.population_variance() == doctest::Approx(reference_variance).epsilon(1e-6));

    // The naive single-pass formula sum(x^2)/n - mean^2 in double loses the
    // variance (about 1/12) entirely at this offset: the contrast shows the
    // test can fail.
    double s1 = 0, s2 = 0;
    for (double v : x) {
        s1 += v;
        s2 += v * v;
    }
    const double naive = s2 / n - (s1 / n) * (s1 / n);
    CHECK(std::abs(naive - reference_variance) > 1e-3);

    // Merging partial results (Chan et al.) gives the same moments.
    tenon::running_moments a, b, c;
    for (std::size_t i = 0; i < n; ++i) (i < 123 ? a : i < 70000 ? b : c).add(x[i]);
    a.merge(b);
    a.merge(c);
    a.merge(tenon::running_moments{});
    CHECK(a.count == n);
    CHECK(std::abs(a.mean - static_cast<double>(mean)) < 1e-5);
    CHECK(a.population_variance() == doctest::Approx(reference_variance).epsilon(1e-6));
    CHECK(a.minimum == whole.minimum);
    CHECK(a.maximum == whole.maximum);
}

TEST_CASE("exact quantiles by Hyndman & Fan definition 7") {
    // Worked example: values 1..5, h = 4 q; q = 0.25 -> 2, q = 0.5 -> 3,
    // q = 0.1 -> 1 + 0.4 * (2 - 1) = 1.4.
    std::vector<double> v{5, 3, 1, 4, 2};
    CHECK(tenon::exact_quantile(v, 0.25) == doctest::Approx(2.0));
    CHECK(tenon::exact_quantile(v, 0.5) == doctest::Approx(3.0));
    CHECK(tenon::exact_quantile(v, 0.1) == doctest::Approx(1.4));
    CHECK(tenon::exact_quantile(v, 1.0) == doctest::Approx(5.0));
    std::vector<double> empty;
    std::string message;
    CHECK(error_code_of([&] { tenon::exact_quantile(empty, 0.5); }, &message) == "prep.rows.empty");
    CHECK(message == "[prep.rows.empty] exact_quantile: no values");

    auto t = read_text("v,c\n1,a\n2,a\nNA,b\n10,b\n4,a\n");
    auto q = tenon::column_quartiles(t.at("v"), tenon::all_rows(t.row_count()));
    CHECK(q.median == doctest::Approx(3.0));  // 1 2 4 10 -> h = 1.5 -> 3
    CHECK(q.interquartile_range == doctest::Approx(5.5 - 1.75));  // h=2.25 -> 4+0.25*6; h=0.75 -> 1.75
    auto counts = tenon::category_counts(t.at("c"), {0, 1, 2});
    CHECK(counts[0] == 2);
    CHECK(counts[1] == 1);
    CHECK(error_code_of([&] { tenon::column_moments(t.at("v"), {9}); }, &message) == "prep.rows.out_of_range");
    CHECK(message == "[prep.rows.out_of_range] column 'v': row 9 is not below the row count 5");
    CHECK(error_code_of([&] { tenon::column_moments(t.at("c"), {0}); }, &message) == "prep.column.kind");
    CHECK(message == "[prep.column.kind] column_moments: column 'c' is categorical");
}
