// Tests of prep/plan.hpp: measuring on training rows only, applying
// unchanged, raw rows, regression targets, and the byte format.
#include <doctest/doctest.h>

#include <cmath>
#include <sstream>
#include <string>
#include <string_view>
#include <type_traits>
#include <vector>

#include <tenon/prep/csv.hpp>
#include <tenon/prep/plan.hpp>
#include <tenon/prep/split.hpp>

#include "prep_test_support.hpp"

using prep_test::error_code_of;

namespace {

// A pump test bench: flow and pressure readings, the pump model, the
// machine it ran on, when, and the verdict (one verdict missing).
const char* const bench_csv = "flow,pressure,model,machine,when,verdict\n"
                              "10,1.0,A,m1,2024-01-01,ok\n"
                              "12,1.2,B,m1,2024-01-02,ok\n"
                              "NA,1.1,A,m2,2024-01-03,fault\n"
                              "14,NA,C,m2,2024-01-04,ok\n"
                              "16,1.6,B,m3,2024-01-05,\n"
                              "40,4.0,A,m3,2024-01-06,fault\n"
                              "42,4.2,D,m4,2024-01-07,ok\n"
                              "44,4.4,B,m4,2024-01-08,fault\n";

tenon::table bench_table() {
    std::istringstream in(bench_csv);
    return tenon::read_csv(in, {}, "bench.csv");
}

tenon::plan bench_plan() {
    tenon::feature_steps numeric;
    numeric.fill = tenon::fill_method::mean;
    numeric.missing_indicator = true;
    tenon::feature_steps pressure;
    pressure.fill = tenon::fill_method::median;
    pressure.scaling = tenon::scaling_method::min_max;
    pressure.indicator_if_missing_in_training = false;
    tenon::feature_steps model;
    model.unseen = tenon::unseen_policy::other_slot;
    tenon::plan p;
    p.set_default_steps(numeric)
        .set_steps("pressure", pressure)
        .set_steps("model", model)
        .set_role("machine", tenon::column_role::group)
        .set_role("when", tenon::column_role::time)
        .set_target("verdict", tenon::target_kind::classification);
    return p;
}

template <class P, class = void>
struct has_apply : std::false_type {};
template <class P>
struct has_apply<P,
                 std::void_t<decltype(std::declval<const P&>().template apply<float>(
                     std::declval<const tenon::table&>(), std::declval<const std::vector<std::size_t>&>()))>> : std::true_type {};

}  // namespace

TEST_CASE("an unmeasured plan cannot be applied: a different type without apply") {
    static_assert(!has_apply<tenon::plan>::value, "a plan must not be applicable before it is measured");
    static_assert(has_apply<tenon::measured_plan>::value, "a measured plan applies");
    static_assert(!std::is_default_constructible_v<tenon::measured_plan>, "a measured plan comes only from plan::measure or from_bytes");
    static_assert(!std::is_convertible_v<tenon::plan, tenon::measured_plan>);
    CHECK(has_apply<tenon::measured_plan>::value);
}

TEST_CASE("measuring: roles, feature layout, dropped target rows counted") {
    auto t = bench_table();
    const std::vector<std::size_t> train{0, 1, 2, 3, 4};
    auto m = bench_plan().measure(t, train);
    CHECK(m.dropped_training_rows() == 1);  // row 4 has no verdict
    CHECK(m.input_columns() == std::vector<std::string>{"flow", "pressure", "model"});
    CHECK(m.feature_names() == std::vector<std::string>{"flow", "flow#missing", "pressure", "model=A", "model=B", "model=C", "model=<other>"});
    CHECK(m.class_names() == std::vector<std::string>{"fault", "ok"});
    CHECK(m.group_column() == "machine");
    CHECK(m.time_column() == "when");
    // flow on training rows 0,1,3 (row 2 missing, row 4 dropped): 10 12 14.
    CHECK(m.feature_fill("flow").number == doctest::Approx(12.0));
    CHECK(m.feature_scaling("flow").center == doctest::Approx(12.0));
    CHECK(m.feature_scaling("flow").spread == doctest::Approx(std::sqrt(8.0 / 3.0)));
    // pressure on rows 0,1,2: 1.0 1.2 1.1; median 1.1; min-max over [1.0, 1.2].
    CHECK(m.feature_fill("pressure").number == doctest::Approx(1.1));
    CHECK(m.feature_scaling("pressure").spread == doctest::Approx(0.2));

    auto out = m.apply<double>(t, tenon::all_rows(t.row_count()));
    CHECK(out.dropped_missing_target == 1);
    CHECK(out.rows == std::vector<std::size_t>{0, 1, 2, 3, 5, 6, 7});
    REQUIRE(out.features.shape()[1] == 7);
    // Row 2: flow missing -> mean 12 -> z 0, indicator 1; model A.
    CHECK(out.features(2, 0) == doctest::Approx(0.0));
    CHECK(out.features(2, 1) == 1.0);
    CHECK(out.features(2, 3) == 1.0);
    // Row 3: pressure missing -> median 1.1 -> min-max 0.5.
    CHECK(out.features(3, 2) == doctest::Approx(0.5));
    // Table row 6 (index 5 of the output): model D unseen -> the other slot.
    CHECK(out.features(5, 6) == 1.0);
    CHECK(out.features(5, 3) + out.features(5, 4) + out.features(5, 5) == 0.0);
    // Targets: one-hot and indices agree.
    CHECK(out.classes[2] == 0);  // fault
    CHECK(out.targets(2, 0) == 1.0);
    CHECK(out.targets(0, 1) == 1.0);
}

TEST_CASE("the training path measures on training rows only, and that changes the scaling") {
    auto t = bench_table();
    const std::vector<std::size_t> train{0, 1, 2, 3};
    const auto everything = tenon::all_rows(t.row_count());
    auto on_train = bench_plan().measure(t, train);
    auto on_all = bench_plan().measure(t, everything);
    CHECK(on_train.feature_scaling("flow").center != doctest::Approx(on_all.feature_scaling("flow").center));
    CHECK(on_train.feature_scaling("flow").spread != doctest::Approx(on_all.feature_scaling("flow").spread));
    // The training rows prepared by the training-measured plan have z-scores
    // of mean 0 over the present training cells (10, 12, 14); with the
    // all-rows plan they would not.
    auto prepared = on_train.apply<double>(t, train);
    const double mean_present = (prepared.features(0, 0) + prepared.features(1, 0) + prepared.features(3, 0)) / 3.0;
    CHECK(mean_present == doctest::Approx(0.0));
    auto leaked = on_all.apply<double>(t, train);
    const double mean_leaked = (leaked.features(0, 0) + leaked.features(1, 0) + leaked.features(3, 0)) / 3.0;
    CHECK(std::abs(mean_leaked) > 0.1);
    // Applying to validation rows uses the training statistics unchanged.
    auto validation = on_train.apply<double>(t, {5});
    CHECK(validation.features(0, 0) == doctest::Approx((40.0 - 12.0) / std::sqrt(8.0 / 3.0)));
}

TEST_CASE_TEMPLATE("raw rows prepare exactly like table rows", T, float, double) {
    auto t = bench_table();
    auto m = bench_plan().measure(t, {0, 1, 2, 3, 4});
    tenon::matrix<T> from_table;
    m.apply_features(t, {2, 6}, from_table);
    std::vector<T> row(m.feature_count());
    const std::string_view cells[] = {"NA", " 1.1 ", "A"};
    m.apply_cells(cells, 3, row.data());
    for (std::size_t j = 0; j < row.size(); ++j) CHECK(row[j] == doctest::Approx(from_table(0, j)));
    m.apply_named<T>({{"model", "D"}, {"flow", "42"}, {"extra", "x"}, {"pressure", "4.2"}}, row.data());
    for (std::size_t j = 0; j < row.size(); ++j) CHECK(row[j] == doctest::Approx(from_table(1, j)));
}

TEST_CASE("regression targets are scaled and restored to their original units") {
    std::istringstream in("load,power\n1,100\n2,200\n3,300\n4,NA\n5,500\n");
    auto t = tenon::read_csv(in, {}, "press.csv");
    tenon::plan p;
    p.set_target("power", tenon::target_kind::regression, tenon::scaling_method::z_score);
    auto m = p.measure(t, {0, 1, 2, 3});
    CHECK(m.dropped_training_rows() == 1);
    CHECK(m.target_scaling().center == doctest::Approx(200.0));
    auto out = m.apply<float>(t, tenon::all_rows(5));
    CHECK(out.targets.shape()[1] == 1);
    CHECK(out.targets(1, 0) == doctest::Approx(0.0));
    CHECK(m.restore_target(static_cast<double>(out.targets(3, 0))) == doctest::Approx(500.0));
    tenon::matrix<float> predictions = out.targets;
    m.restore_targets(predictions);
    CHECK(predictions(0, 0) == doctest::Approx(100.0f));
    CHECK(predictions(3, 0) == doctest::Approx(500.0f));
    std::string message;
    auto classifier = bench_plan().measure(bench_table(), {0, 1});
    CHECK(error_code_of([&] { classifier.restore_target(1.0); }, &message) == "prep.column.kind");
    CHECK(message == "[prep.column.kind] restore_target: the plan has no regression target");
}

TEST_CASE("a value beyond the model's number type once scaled is named by line, column and value, not as an infinite feature") {
    // The squares of +-1e300 overflow double (max about 1.8e308, IEEE 754
    // binary64), so the measured spread is not finite and is taken as 1
    // (scaling.hpp); 1e300 then stays 1e300, beyond single precision
    // (max about 3.4e38, binary32) but inside double.
    std::istringstream in("load,power\n1e300,1\n-1e300,2\n0,3\n");
    const auto t = tenon::read_csv(in, {}, "press.csv");
    tenon::plan p;
    p.set_target("power", tenon::target_kind::regression, tenon::scaling_method::z_score);
    const auto m = p.measure(t, tenon::all_rows(3));
    std::string message;
    CHECK(error_code_of([&] { (void)m.apply<float>(t, tenon::all_rows(3)); }, &message) == "prep.value.overflow");
    CHECK(message.rfind("[prep.value.overflow] press.csv line 2, column 'load': the value 1e+300 scales to ", 0) == 0);
    CHECK(message.find("beyond the single precision range (about 3.4e38)") != std::string::npos);
    const auto in_double = m.apply<double>(t, tenon::all_rows(3));
    CHECK(std::isfinite(in_double.features(0, 0)));
    // A raw row meets the same check.
    std::vector<float> row(m.feature_count());
    const std::string_view cells[] = {"1e300"};
    CHECK(error_code_of([&] { m.apply_cells(cells, 1, row.data()); }, &message) == "prep.value.overflow");
    CHECK(message.rfind("[prep.value.overflow] raw row, column 'load': the value 1e+300", 0) == 0);
    // And a target: power's spread overflows the same way.
    std::istringstream target_in("load,power\n1,1e300\n2,-1e300\n3,0\n");
    const auto targets = tenon::read_csv(target_in, {}, "press.csv");
    const auto mt = p.measure(targets, tenon::all_rows(3));
    CHECK(error_code_of([&] { (void)mt.apply<float>(targets, tenon::all_rows(3)); }, &message) == "prep.value.overflow");
    CHECK(message.rfind("[prep.value.overflow] press.csv line 2, column 'power' (the target): the value 1e+300", 0) == 0);
}

TEST_CASE("plan errors name the column, the row and the value") {
    auto t = bench_table();
    std::string message;
    tenon::plan strict;
    strict.set_default_steps(tenon::strict_feature_steps())
        .set_role("machine", tenon::column_role::ignored)
        .set_role("when", tenon::column_role::ignored)
        .set_target("verdict", tenon::target_kind::classification);
    auto m = strict.measure(t, {0, 1, 2, 3});
    CHECK(error_code_of([&] { m.apply<double>(t, {2}); }, &message) == "prep.value.missing");
    CHECK(message == "[prep.value.missing] bench.csv line 4, column 'flow': the cell is missing and the plan has no fill for it");
    CHECK(error_code_of([&] { m.apply<double>(t, {6}); }, &message) == "prep.category.unseen");
    CHECK(message == "[prep.category.unseen] bench.csv line 8, column 'model': the category 'D' was not seen in the training rows");
    CHECK(error_code_of([&] { m.apply<double>(t, {99}); }, &message) == "prep.rows.out_of_range");
    CHECK(message == "[prep.rows.out_of_range] bench.csv: row 99 is not below the row count 8");

    std::vector<double> row(m.feature_count());
    const std::string_view missing_cells[] = {"?", "1", "A"};
    CHECK(error_code_of([&] { m.apply_cells(missing_cells, 3, row.data()); }, &message) == "prep.value.missing");
    CHECK(message == "[prep.value.missing] raw row, column 'flow': the cell is missing and the plan has no fill for it");
    const std::string_view bad_number[] = {"ten", "1", "A"};
    CHECK(error_code_of([&] { m.apply_cells(bad_number, 3, row.data()); }, &message) == "prep.cell.not_numeric");
    CHECK(message == "[prep.cell.not_numeric] raw row, column 'flow': 'ten' is not a finite number");
    const std::string_view unseen[] = {"1", "1", "Z"};
    CHECK(error_code_of([&] { m.apply_cells(unseen, 3, row.data()); }, &message) == "prep.category.unseen");
    CHECK(message == "[prep.category.unseen] raw row, column 'model': the category 'Z' was not seen in the training rows");
    CHECK(error_code_of([&] { m.apply_cells(unseen, 2, row.data()); }, &message) == "core.shape.mismatch");
    CHECK(message == "[core.shape.mismatch] apply_cells: the plan reads 3 columns, got 2 cells");
    CHECK(error_code_of([&] { m.apply_named<double>({{"flow", "1"}}, row.data()); }, &message) == "prep.column.unknown");
    CHECK(message == "[prep.column.unknown] apply_named: the row has no cell for column 'pressure'");

    // A class never seen in training.
    CHECK(error_code_of([&] { strict.measure(t, {0, 1}).apply<double>(t, {5}); }, &message) == "prep.category.unseen");
    CHECK(message == "[prep.category.unseen] bench.csv line 7: the class 'fault' of target 'verdict' was not seen in the training rows");

    // Date/time features parse raw cells as date/times.
    tenon::plan timed;
    timed.set_role("flow", tenon::column_role::ignored)
        .set_role("pressure", tenon::column_role::ignored)
        .set_role("model", tenon::column_role::ignored)
        .set_role("machine", tenon::column_role::ignored)
        .set_role("verdict", tenon::column_role::ignored);
    auto tm = timed.measure(t, {0, 1, 2});
    const std::string_view not_a_date[] = {"yesterday"};
    CHECK(error_code_of([&] { tm.apply_cells(not_a_date, 1, row.data()); }, &message) == "prep.cell.not_datetime");
    CHECK(message == "[prep.cell.not_datetime] raw row, column 'when': 'yesterday' is not a date/time in the form YYYY-MM-DD");
    const std::string_view a_date[] = {"2024-01-02"};
    tm.apply_cells(a_date, 1, row.data());
    CHECK(row[0] == doctest::Approx(0.0));  // the middle of three consecutive days

    CHECK(error_code_of([&] { tenon::plan().set_role("nope", tenon::column_role::ignored).measure(t, {0}); }, &message) == "prep.column.unknown");
    CHECK(message == "[prep.column.unknown] bench.csv: no column named 'nope'");
    CHECK(error_code_of([&] { bench_plan().measure(t, {4}); }, &message) == "prep.rows.empty");
    CHECK(message == "[prep.rows.empty] bench.csv: no training rows to measure the plan on (1 given, 1 dropped for a missing target)");
    CHECK(error_code_of([&] { bench_plan().measure(t, {100}); }, &message) == "prep.rows.out_of_range");
    CHECK(message == "[prep.rows.out_of_range] bench.csv: training row 100 is not below the row count 8");
    tenon::plan regress_text;
    regress_text.set_target("model", tenon::target_kind::regression);
    CHECK(error_code_of([&] { regress_text.measure(t, {0, 1}); }, &message) == "prep.column.kind");
    CHECK(message == "[prep.column.kind] regression target 'model' is categorical, not numeric");
    CHECK(error_code_of([&] { m.feature_scaling("nope"); }, &message) == "prep.column.unknown");
    CHECK(message == "[prep.column.unknown] measured plan: no feature column named 'nope'");
}

TEST_CASE("the measured state round-trips through bytes exactly") {
    auto t = bench_table();
    auto m = bench_plan().measure(t, {0, 1, 2, 3, 4});
    const auto bytes = m.to_bytes();
    auto back = tenon::measured_plan::from_bytes(bytes);
    CHECK(back.to_bytes() == bytes);
    CHECK(back.feature_names() == m.feature_names());
    CHECK(back.class_names() == m.class_names());
    CHECK(back.dropped_training_rows() == 1);
    auto a = m.apply<double>(t, tenon::all_rows(8));
    auto b = back.apply<double>(t, tenon::all_rows(8));
    REQUIRE(a.features.size() == b.features.size());
    bool identical = true;
    for (std::size_t k = 0; k < a.features.size(); ++k) identical = identical && a.features.data()[k] == b.features.data()[k];
    CHECK(identical);
    CHECK(a.classes == b.classes);

    // Every proper prefix is rejected with a bytes error, never read past.
    for (std::size_t n = 0; n < bytes.size(); ++n) {
        const auto code = error_code_of([&] { tenon::measured_plan::from_bytes(bytes.data(), n); });
        CHECK_MESSAGE((code == "prep.bytes.truncated" || code == "prep.bytes.oversize"), "prefix " << n << ": " << code);
    }
}

TEST_CASE("plan bytes store fill and scaling methods as codes that the renamed methods keep") {
    // Plan bytes hold each method as a u8 code (docs/model-file-format.md,
    // PLAN); bytes written when code 3 was called "most frequent" and
    // "robust" read as mode and median-IQR.
    CHECK(static_cast<int>(tenon::fill_method::mode) == 3);
    CHECK(static_cast<int>(tenon::scaling_method::median_iqr) == 3);
    tenon::feature_steps quartiles;
    quartiles.scaling = tenon::scaling_method::median_iqr;
    tenon::feature_steps category;
    category.fill = tenon::fill_method::mode;
    category.omit_reference_level = true;
    tenon::plan p;
    p.set_steps("flow", quartiles).set_steps("model", category).set_role("machine", tenon::column_role::ignored);
    p.set_role("when", tenon::column_role::ignored).set_role("pressure", tenon::column_role::ignored);
    p.set_target("verdict", tenon::target_kind::classification);
    auto t = bench_table();
    const auto bytes = p.measure(t, {0, 1, 2, 3, 4, 5, 6, 7}).to_bytes();
    // The "model" feature's fill method and the "flow" feature's scaling
    // method, found by their position after each name in the bytes.
    const std::string text(bytes.begin(), bytes.end());
    const std::size_t model_at = text.find(std::string("\x05\x00\x00\x00", 4) + "model");  // u32 length, then the name
    const std::size_t flow_at = text.find(std::string("\x04\x00\x00\x00", 4) + "flow");
    REQUIRE(model_at != std::string::npos);
    REQUIRE(flow_at != std::string::npos);
    CHECK(bytes[model_at + 9 + 1] == 3);  // after the name: kind, then the fill method
    // After "flow": kind, fill method, fill number (8), empty fill text (4),
    // indicator, then the scaling method.
    CHECK(bytes[flow_at + 8 + 1 + 1 + 8 + 4 + 1] == 3);
    const auto back = tenon::measured_plan::from_bytes(bytes);
    CHECK(back.feature_fill("model").method == tenon::fill_method::mode);
    CHECK(back.feature_fill("model").text == "A");  // the most frequent category among the training rows
    CHECK(back.feature_scaling("flow").method == tenon::scaling_method::median_iqr);
    CHECK(back.feature_categories("model").omit_reference_level());
}

TEST_CASE("corrupted plan bytes: each error code with its message") {
    auto m = bench_plan().measure(bench_table(), {0, 1, 2, 3});
    const auto good = m.to_bytes();
    std::string message;
    CHECK(error_code_of([&] { tenon::measured_plan::from_bytes(good.data(), 5); }, &message) == "prep.bytes.truncated");
    CHECK(message == "[prep.bytes.truncated] measured plan: the bytes end at 5 while reading a 16-bit integer at byte 4");

    auto bad_magic = good;
    bad_magic[0] = 'X';
    CHECK(error_code_of([&] { tenon::measured_plan::from_bytes(bad_magic); }, &message) == "prep.bytes.bad_tag");
    CHECK(message == "[prep.bytes.bad_tag] measured plan: the bytes do not start with the magic 'TNPL'");

    auto bad_version = good;
    bad_version[4] = 9;
    CHECK(error_code_of([&] { tenon::measured_plan::from_bytes(bad_version); }, &message) == "prep.bytes.bad_tag");
    CHECK(message == "[prep.bytes.bad_tag] measured plan: format version 9 is not supported (this build reads versions 1 to 2)");

    // Layout: magic 4, version 2, token count 4, then 7 tokens of 4 + length bytes.
    std::size_t pos = 10;
    for (const auto& token : tenon::default_missing_tokens()) pos += 4 + token.size();
    auto huge_count = good;  // the feature count
    huge_count[pos + 3] = 0x7F;
    CHECK(error_code_of([&] { tenon::measured_plan::from_bytes(huge_count); }, &message) == "prep.bytes.oversize");
    CHECK(message.rfind(
              "[prep.bytes.oversize] measured plan: 2130706435 feature columns declared at byte " + std::to_string(pos) + " cannot fit in the", 0) ==
          0);

    auto bad_tag = good;
    bad_tag[pos + 4] = 0x00;  // the first feature's tag
    CHECK(error_code_of([&] { tenon::measured_plan::from_bytes(bad_tag); }, &message) == "prep.bytes.bad_tag");
    CHECK(message ==
          "[prep.bytes.bad_tag] measured plan: expected the tag of a feature column (241) at byte " + std::to_string(pos + 4) + ", found 0");

    auto bad_kind = good;
    const std::size_t kind_at = pos + 4 + 1 + 4 + std::string("flow").size();
    bad_kind[kind_at] = 7;
    CHECK(error_code_of([&] { tenon::measured_plan::from_bytes(bad_kind); }, &message) == "prep.bytes.bad_tag");
    CHECK(message ==
          "[prep.bytes.bad_tag] measured plan: column kind value 7 at byte " + std::to_string(kind_at) + " is not a known value (at most 2)");

    auto trailing = good;
    trailing.push_back(0);
    CHECK(error_code_of([&] { tenon::measured_plan::from_bytes(trailing); }, &message) == "prep.bytes.bad_tag");
    CHECK(message == "[prep.bytes.bad_tag] measured plan: 1 unexpected bytes after the end at byte " + std::to_string(good.size()));

    auto long_text = good;  // the first missing token's length
    long_text[10] = 0xFF;
    long_text[11] = 0xFF;
    CHECK(error_code_of([&] { tenon::measured_plan::from_bytes(long_text); }, &message) == "prep.bytes.oversize");
    CHECK(message.rfind("[prep.bytes.oversize] measured plan: a text of 65535 bytes declared at byte 10", 0) == 0);
}

TEST_CASE("group and time roles feed the split policies") {
    auto t = bench_table();
    auto groups = tenon::dense_codes(t.at("machine"));
    auto s = tenon::grouped_holdout(groups, {0.5, 0.25, 0.25}, 11);
    CHECK(s.train.size() + s.validation.size() + s.test.size() == 8);
    std::vector<double> times(t.row_count());
    for (std::size_t i = 0; i < times.size(); ++i) times[i] = t.at("when").number(i);
    auto c = tenon::chronological_holdout(times, {0.5, 0.25, 0.25});
    CHECK(c.test == std::vector<std::size_t>{6, 7});
    std::string message;
    // Missing cells are a value of their own by default (as in the tool), or refused naming the file line.
    CHECK(tenon::dense_codes(t.at("verdict"))[4] == 2);
    CHECK(tenon::dense_codes(t.at("verdict"), true)[4] == 2);
    CHECK(error_code_of([&] { tenon::dense_codes(t.at("verdict"), false); }, &message) == "prep.value.missing");
    CHECK(message == "[prep.value.missing] bench.csv line 6, column 'verdict': the cell is missing");
}
