// Reading a data file and the decisions `tenon train` takes from it (task,
// split, preparation, size limits); reading new rows for retrain and drift.
#include <algorithm>
#include <cmath>
#include <cstdint>
#include <fstream>
#include <iterator>
#include <limits>
#include <ostream>
#include <string>
#include <vector>

#include "tool_parts.hpp"

namespace tenon_cli {

// ---------------------------------------------------------------------------
// Reading and checking the data

namespace detail {

// "a, b, c", or the first 12 and the count.
std::string column_listing(const std::vector<std::string>& names) {
    std::string listed;
    const std::size_t shown = std::min<std::size_t>(names.size(), 12);
    for (std::size_t k = 0; k < shown; ++k) listed += (k ? ", " : "") + names[k];
    if (shown < names.size()) listed += ", ... (" + std::to_string(names.size()) + " columns)";
    return listed;
}

const tenon::column& named_column(const tenon::table& t, const std::string& option, const std::string& name) {
    if (!t.contains(name))
        fail(cli_codes::column_unknown,
             t.source() + ": " + option + " names '" + name + "', which is not a column (columns: " + column_listing(t.column_names()) + ")");
    return t.at(name);
}

// Share of the present cells of a categorical column that read as numbers.
double numeric_share(const tenon::column& c, bool decimal_comma) {
    std::vector<char> is_number(c.categories().size());
    for (std::size_t k = 0; k < is_number.size(); ++k) {
        double v = 0;
        is_number[k] = (decimal_comma ? tenon::parse_decimal_comma_number(c.categories()[k], v) : tenon::parse_number(c.categories()[k], v)) ? 1 : 0;
    }
    std::size_t present = 0, numbers = 0;
    for (std::size_t r = 0; r < c.size(); ++r) {
        if (c.is_missing(r)) continue;
        ++present;
        numbers += static_cast<std::size_t>(is_number[c.code(r)]);
    }
    return present ? static_cast<double>(numbers) / static_cast<double>(present) : 0.0;
}

// Share of the present cells of a categorical column that read as dates/times.
double datetime_share(const tenon::column& c) {
    std::vector<char> is_time(c.categories().size());
    for (std::size_t k = 0; k < is_time.size(); ++k) {
        double v = 0;
        is_time[k] = tenon::parse_datetime(c.categories()[k], v) ? 1 : 0;
    }
    std::size_t present = 0, times = 0;
    for (std::size_t r = 0; r < c.size(); ++r) {
        if (c.is_missing(r)) continue;
        ++present;
        times += static_cast<std::size_t>(is_time[c.code(r)]);
    }
    return present ? static_cast<double>(times) / static_cast<double>(present) : 0.0;
}

}  // namespace detail

/// The cell texts the tool reads as missing: the library's defaults (one
/// list, so a host's plan reads the same cells as the tool's). Models store
/// the list in their plan, so `tenon infer` reads the same cells as missing.
std::vector<std::string> missing_tokens() { return tenon::default_missing_tokens(); }

namespace detail {

std::string delimiter_text(char d) { return d == '\t' ? std::string("tab") : std::string("'") + d + "'"; }

// The trimmed header names of a CSV file read with `options`' delimiter.
std::vector<std::string> header_names(const std::string& path, const tenon::csv_options& options) {
    std::ifstream in(path, std::ios::binary);
    if (!in) tenon::raise(tenon::codes::prep_file_open, path + ": cannot open for reading");
    tenon::csv_record_reader reader(in, options.delimiter, path);
    std::vector<std::string> names;
    if (reader.next())
        for (std::size_t k = 0; k < reader.field_count(); ++k) names.emplace_back(tenon::detail::trim_blanks(reader.field(k)));
    return names;
}

/// The delimiter and decimal mark of a data file: as given on the command
/// line, the rest told from its first rows (tenon::detect_csv_dialect).
tenon::csv_options data_dialect(const std::string& path, char delimiter, bool decimal_comma) {
    tenon::csv_options options;
    tenon::csv_detection what;
    if (delimiter) {
        options.delimiter = delimiter;
        what.delimiter = false;
    }
    if (decimal_comma) {
        options.decimal_comma = true;
        what.decimal_comma = false;
    }
    options = tenon::detect_csv_dialect_file(path, options, what);
    if (options.decimal_comma && options.delimiter == ',')
        fail(cli_codes::option_conflict,
             "--decimal-comma: " + path +
                 " is delimited by ','; a comma cannot separate both fields and "
                 "decimals (give --delimiter if the file uses another)");
    return options;
}

}  // namespace detail

/// Reads the CSV file. Its delimiter and decimal mark are given or told from
/// its first rows. --categorical and --numeric force kinds; a regression
/// target, and any column whose cells are numbers but for a few, are read as
/// numeric so that the library names the first cell that is not a number
/// (file, line, column, value); so is a column of dates/times but for a few.
/// Lines for the user go to `notes`; a column at least half numbers or dates
/// that stays categorical gets a warning on `warnings`.
tenon::table load_table(const train_request& q, std::vector<std::string>* notes, std::ostream* warnings) {
    tenon::csv_options options = detail::data_dialect(q.data_path, q.delimiter, q.decimal_comma);
    options.missing_tokens = missing_tokens();
    if (notes && (options.delimiter != ',' || options.decimal_comma))
        notes->push_back("note: " + q.data_path + " is read with " + detail::delimiter_text(options.delimiter) + " between fields and " +
                         (options.decimal_comma ? "decimal commas" : "decimal points") +
                         (q.delimiter || q.decimal_comma ? "" : " (told from its first rows; --delimiter and --decimal-comma name them)"));
    if (!q.categorical.empty() || !q.numeric.empty()) {
        const auto header = detail::header_names(q.data_path, options);
        for (const auto* list : {&q.categorical, &q.numeric})
            for (const auto& name : *list)
                if (std::find(header.begin(), header.end(), name) == header.end())
                    fail(cli_codes::column_unknown,
                         q.data_path + ": " + (list == &q.categorical ? "--categorical" : "--numeric") + " names '" + name +
                             "', which is not a column (columns: " + detail::column_listing(header) + ")");
        for (const auto& name : q.categorical) options.forced_kinds[name] = tenon::column_kind::categorical;
        for (const auto& name : q.numeric) options.forced_kinds[name] = tenon::column_kind::numeric;
    }
    if (q.task == task_choice::regress) options.forced_kinds[q.target] = tenon::column_kind::numeric;
    options.default_time_format = q.time_format;
    options.time_formats = q.column_time_formats;
    tenon::table t = [&] {
        try {
            return tenon::read_csv_file(q.data_path, options);
        } catch (const tenon::error& e) {
            // A forced target that the header lacks: report it as an unknown column.
            if (e.code() == tenon::codes::prep_column_unknown && options.forced_kinds.count(q.target))
                fail(cli_codes::column_unknown, q.data_path + ": --target names '" + q.target + "', which is not a column");
            if (e.code() == tenon::codes::prep_time_ambiguous) {  // say how to settle it
                throw cli_failure(e.code(), detail::without_code(e.what()) + " with --time-format DD/MM/YYYY or MM/DD/YYYY (or COLUMN=FORM)");
            }
            throw;
        }
    }();
    bool reread = false;
    for (std::size_t k = 0; k < t.column_count(); ++k) {
        const tenon::column& c = t[k];
        if (c.kind() != tenon::column_kind::categorical || options.forced_kinds.count(c.name())) continue;
        const double share = detail::numeric_share(c, options.decimal_comma);
        if (share >= 0.9 && share < 1.0) {
            options.forced_kinds[c.name()] = tenon::column_kind::numeric;
            reread = true;
            continue;
        }
        const double times = detail::datetime_share(c);
        if (times >= 0.9 && times < 1.0) {
            options.forced_kinds[c.name()] = tenon::column_kind::datetime;  // raises prep.cell.not_datetime at the first bad cell
            reread = true;
            continue;
        }
        if (warnings && (share >= 0.5 || times >= 0.5)) {
            const bool numbers = share >= times;
            *warnings << "tenon train: warning: column '" << tenon::escape_control_characters(c.name()) << "' is read as categorical ("
                      << c.categories().size() << " categories), although " << std::lround(100.0 * (numbers ? share : times))
                      << "% of its cells read as " << (numbers ? "numbers" : "dates/times") << "\n";
        }
    }
    if (reread) t = tenon::read_csv_file(q.data_path, options);  // raises prep.cell.not_numeric at the first bad cell
    if (t.row_count() == 0) fail(cli_codes::data_empty, q.data_path + ": no data rows below the header");
    return t;
}

namespace detail {

/// The whole-number rule for class codes: a numeric target whose present
/// values are 2 to 20 distinct whole numbers, with at least 5 rows per value
/// on average, holds classes (a 0/1 fault flag, a grade 1-5). Our rule of
/// thumb: a measured quantity rarely takes so few whole values, while 20 is
/// about the most classes a plant log codes by number, and fewer than 5 rows
/// per value looks like a count or a measurement rather than classes.
constexpr std::size_t class_code_limit = 20;
constexpr std::size_t rows_per_class_code = 5;

/// The distinct values (sorted) when `c` meets the rule, else empty.
std::vector<double> whole_number_classes(const tenon::column& c) {
    std::vector<double> values;
    if (c.kind() != tenon::column_kind::numeric) return {};
    std::size_t present = 0;
    for (std::size_t r = 0; r < c.size(); ++r) {
        if (c.is_missing(r)) continue;
        ++present;
        const double v = c.number(r);
        if (v != std::floor(v) || std::abs(v) > 1e15) return {};
        if (std::find(values.begin(), values.end(), v) == values.end()) {
            if (values.size() == class_code_limit) return {};
            values.push_back(v);
        }
    }
    if (values.size() < 2 || present < rows_per_class_code * values.size()) return {};
    std::sort(values.begin(), values.end());
    return values;
}

}  // namespace detail

bool decide_classification(const tenon::table& t, const train_request& q) {
    const tenon::column& target = detail::named_column(t, "--target", q.target);
    if (q.task == task_choice::classify) return true;
    if (q.task == task_choice::regress) return false;
    return target.kind() != tenon::column_kind::numeric || !detail::whole_number_classes(target).empty();
}

training_setup make_setup(const tenon::table& t, const train_request& q) {
    training_setup s;
    const tenon::column& target = detail::named_column(t, "--target", q.target);
    for (const auto& c : q.ignored) detail::named_column(t, "--ignore", c);
    for (const auto& c : q.used) detail::named_column(t, "--use", c);
    if (!q.time_column.empty()) {
        const auto& c = detail::named_column(t, "--time-column", q.time_column);
        if (c.kind() == tenon::column_kind::categorical)
            fail(cli_codes::option_value,
                 q.data_path + ": --time-column '" + q.time_column + "' holds text such as '" +
                     (c.categories().empty() ? std::string() : c.categories().front()) + "', not numbers or dates");
    }
    if (!q.group_column.empty()) detail::named_column(t, "--group-column", q.group_column);
    {
        // Named here in column terms; later it would surface as a layer with 0 inputs.
        std::size_t inputs = 0;
        for (const auto& name : t.column_names())
            if (name != q.target && name != q.group_column && std::find(q.ignored.begin(), q.ignored.end(), name) == q.ignored.end()) ++inputs;
        if (inputs == 0)
            fail(cli_codes::option_conflict,
                 q.data_path + ": no input column is left: the columns are " + detail::column_listing(t.column_names()) + ", of which '" + q.target +
                     "' is the target and the others are ignored or the group column");
    }
    if (q.time_column == q.target || q.group_column == q.target)
        fail(cli_codes::option_conflict, "the target '" + q.target + "' cannot also be the time or group column");
    s.classify = decide_classification(t, q);
    if (q.task == task_choice::automatic && s.classify && target.kind() == tenon::column_kind::numeric) {
        std::vector<std::string> shown;
        for (double v : detail::whole_number_classes(target)) shown.push_back(tenon::number_to_text(v));
        s.notes.push_back("note: classifying '" + q.target + "': it holds " + std::to_string(shown.size()) + " distinct whole numbers (" +
                          detail::join(shown, ", ") + "), read as class codes; --task regress regresses it");
    }
    if (s.classify && target.kind() == tenon::column_kind::datetime)
        fail(cli_codes::option_value, q.data_path + ": the target '" + q.target + "' holds dates; it cannot be classified");
    if (!s.classify && target.kind() != tenon::column_kind::numeric)
        fail(cli_codes::option_value,
             q.data_path + ": the target '" + q.target + "' is " + tenon::to_string(target.kind()) + "; regression needs a numeric target");

    s.target_missing = target.missing_count();
    if (s.target_missing == t.row_count()) fail(cli_codes::data_empty, q.data_path + ": every row's target '" + q.target + "' is missing");
    if (s.classify) {
        const auto codes = tenon::dense_codes(target, /*missing_is_value=*/true);
        std::vector<std::uint32_t> classes;
        std::string first;
        for (std::size_t r = 0; r < t.row_count(); ++r) {
            if (target.is_missing(r)) continue;
            if (classes.empty())
                first = target.kind() == tenon::column_kind::categorical ? target.category(r) : tenon::number_to_text(target.number(r));
            if (std::find(classes.begin(), classes.end(), codes[r]) == classes.end()) classes.push_back(codes[r]);
            if (classes.size() > 1) break;
        }
        if (classes.size() < 2)
            fail(cli_codes::target_single_class,
                 q.data_path + ": the target '" + q.target + "' has a single class ('" + first + "') in all " +
                     std::to_string(t.row_count() - s.target_missing) + " rows with a target; classification needs at least 2");
    }
    if (q.model.loss_given && s.classify != (q.model.loss == tenon::loss_kind::cross_entropy))
        fail(cli_codes::option_conflict,
             std::string("--loss ") + tenon::loss_kind_name(q.model.loss) + " does not fit a " +
                 (s.classify ? "classification target (use cross-entropy)" : "regression target (use l1, l2 or huber)"));

    s.split = q.split;
    if (s.split == split_choice::automatic) s.split = s.classify ? split_choice::stratified : split_choice::random;
    if (s.split == split_choice::stratified && !s.classify)
        fail(cli_codes::option_conflict, "--split stratified needs a classification target; '" + q.target + "' is regressed");

    if (q.model.class_weights != tenon::class_weighting::none && !s.classify)
        fail(cli_codes::option_conflict,
             "--class-weights " + std::string(tenon::to_string(q.model.class_weights)) + " needs a classification target; '" + q.target +
                 "' is regressed");
    if (q.target_scaling != tenon::scaling_method::z_score && s.classify)
        fail(cli_codes::option_conflict,
             "--target-scaling " + std::string(tenon::to_string(q.target_scaling)) + " needs a regression target; '" + q.target + "' is classified");
    s.preparation.set_target(q.target, s.classify ? tenon::target_kind::classification : tenon::target_kind::regression, q.target_scaling);
    s.preparation.set_missing_tokens(missing_tokens());
    for (const auto& c : q.ignored) s.preparation.set_role(c, tenon::column_role::ignored);
    if (!q.time_column.empty()) s.preparation.set_role(q.time_column, tenon::column_role::time);
    if (!q.group_column.empty()) s.preparation.set_role(q.group_column, tenon::column_role::group);

    // Identifier-like columns are left out unless --use keeps them; crowded
    // categorical columns get a warning (tenon::screen_columns' rules).
    std::vector<std::string> decided = q.ignored;
    decided.insert(decided.end(), q.used.begin(), q.used.end());
    for (const auto* name : {&q.target, &q.time_column, &q.group_column})
        if (!name->empty()) decided.push_back(*name);
    for (const auto& f : tenon::screen_columns(t, {}, decided)) {
        if (f.identifier()) {
            s.preparation.set_role(f.column, tenon::column_role::ignored);
            s.notes.push_back("note: leaving out '" + f.column + "' (" + f.explanation() + "); --use " + f.column + " keeps it");
        } else {
            s.notes.push_back("warning: '" + f.column + "' has " + f.explanation() + " (more categories than 10% of the rows); --ignore " + f.column +
                              " leaves it out");
        }
    }
    return s;
}

/// Cross-validation only: every feature column with a missing cell anywhere
/// in the table gets a missing indicator, so every fold's plan has the same
/// layout. Everything else is the library's default steps (feature_steps:
/// median or most frequent fill, z-scores, unseen categories as zeros, an
/// indicator for a column with a missing training cell), which a holdout
/// run uses as they are, so the tool and a host get the same model.
void indicators_for_every_fold(const tenon::table& t, tenon::plan& preparation) {
    for (std::size_t k = 0; k < t.column_count(); ++k) {
        const tenon::column& c = t[k];
        if (preparation.role_of(c.name()) != tenon::column_role::feature || c.missing_count() == 0) continue;
        tenon::feature_steps steps = preparation.steps_of(c.name());
        steps.missing_indicator = true;
        preparation.set_steps(c.name(), steps);
    }
}

/// --time-cycles: date/time features add their cyclic hour, weekday and
/// yearday values to the scaled stamp, and the time column gives those alone
/// (it has no missing cell: the split refuses one). The other steps stay the
/// library's defaults.
void choose_time_cycles(const tenon::table& t, tenon::plan& preparation) {
    for (std::size_t k = 0; k < t.column_count(); ++k) {
        const tenon::column& c = t[k];
        if (c.kind() != tenon::column_kind::datetime) continue;
        const tenon::column_role role = preparation.role_of(c.name());
        if (role != tenon::column_role::feature && role != tenon::column_role::time) continue;
        tenon::feature_steps steps = preparation.steps_of(c.name());
        steps.time = role == tenon::column_role::time ? tenon::time_encoding::cycles : tenon::time_encoding::value_and_cycles;
        preparation.set_steps(c.name(), steps);
    }
}

namespace detail {

std::vector<double> column_times(const tenon::table& t, const std::string& name) {
    const tenon::column& c = t.at(name);
    std::vector<double> times(t.row_count());
    for (std::size_t r = 0; r < times.size(); ++r) times[r] = c.is_missing(r) ? std::numeric_limits<double>::quiet_NaN() : c.number(r);
    return times;
}

// The text of class `code` of dense_codes(c, true): its category, its
// number, or "(missing)".
std::string class_label(const tenon::column& c, std::uint32_t code) {
    const std::vector<std::uint32_t> codes = tenon::dense_codes(c, true);
    for (std::size_t i = 0; i < codes.size(); ++i)
        if (codes[i] == code) {
            if (c.is_missing(i)) return "(missing)";
            return c.kind() == tenon::column_kind::categorical ? c.category(i) : tenon::number_to_text(c.number(i));
        }
    return std::to_string(code);
}

// Runs a stratified split; the library names a class too small for it by
// its code ("class 0 has 1 rows"), the message names its label and column.
template <class Split>
auto naming_classes(const tenon::table& t, const std::string& target_name, Split&& split) -> decltype(split()) {
    try {
        return split();
    } catch (const tenon::error& e) {
        if (e.code() != tenon::codes::prep_split_class_too_small) throw;
        std::string m = without_code(e.what());
        const auto at = m.find("class ");
        std::size_t end = at == std::string::npos ? at : at + 6;
        while (end != std::string::npos && end < m.size() && m[end] >= '0' && m[end] <= '9') ++end;
        if (at == std::string::npos || end == at + 6) throw;
        const auto code = static_cast<std::uint32_t>(std::stoul(m.substr(at + 6, end - at - 6)));
        m.replace(at, end - at, "class '" + class_label(t.at(target_name), code) + "' of the target '" + target_name + "'");
        tenon::raise(tenon::codes::prep_split_class_too_small, t.source() + ": " + m);
    }
}

// Refuses a network of more than max_hidden_weights weights, counted from
// the features the plan measures on `rows` (every row for k-fold, a bound
// on each fold's), before any weight is allocated; names the widest inputs.
void check_network_size(const tenon::table& t, const train_request& q, const training_setup& s, const std::vector<std::size_t>& rows) {
    const tenon::measured_plan p = s.preparation.measure(t, rows);
    const std::size_t inputs = p.feature_count();
    if (inputs == 0)  // named here in column terms; later it would be a layer of 0 inputs
        fail(cli_codes::option_conflict,
             q.data_path + ": no input column is left: the columns are " + column_listing(t.column_names()) + ", of which '" + q.target +
                 "' is the target and the others are ignored, the group column or left out (the notes say "
                 "why; --use NAME keeps a column)");
    const std::size_t outputs = s.classify ? std::max<std::size_t>(p.class_count(), 1) : 1;
    // Widths are at most 2^16 (max_hidden_width), features far below 2^40: no product overflows.
    std::uint64_t weights = 0, width = inputs;
    tenon::model_settings members;
    members.hidden = q.model.hidden;
    members.ensemble = q.model.ensemble;
    const std::vector<std::size_t> widths = tenon::hidden_widths(members, rows.size());
    std::string hidden = widths.empty() ? std::string("none") : std::string();
    for (const std::size_t h : widths) hidden += (hidden.empty() ? "" : ",") + std::to_string(h);
    for (const std::size_t h : widths) {
        weights += width * h;
        width = h;
    }
    weights += width * outputs;
    if (!s.classify) weights += inputs * outputs;  // the linear path beside the hidden layers (regression)
    // Every member of a seed ensemble holds as many.
    weights *= tenon::ensemble_size(members, rows.size());
    if (weights <= max_hidden_weights) return;
    std::vector<std::pair<std::size_t, std::string>> widest;  // features per input column
    std::vector<std::pair<std::size_t, std::string>> by_offset;
    for (const auto& name : p.input_columns()) by_offset.emplace_back(p.feature_offset(name), name);
    std::sort(by_offset.begin(), by_offset.end());
    for (std::size_t k = 0; k < by_offset.size(); ++k)
        widest.emplace_back((k + 1 < by_offset.size() ? by_offset[k + 1].first : inputs) - by_offset[k].first, by_offset[k].second);
    std::sort(widest.begin(), widest.end(), [](const auto& a, const auto& b) { return a.first > b.first; });
    std::string columns;
    for (std::size_t k = 0; k < widest.size() && k < 3; ++k) columns += (k ? ", '" : "'") + widest[k].second + "' " + std::to_string(widest[k].first);
    fail(cli_codes::option_value,
         q.data_path + ": " + std::to_string(inputs) + " input features (the widest: " + columns + "), hidden layers " + hidden + " and " +
             std::to_string(outputs) + " outputs make " + std::to_string(weights) +
             " weights (every network of the ensemble counted), above the limit of " + std::to_string(max_hidden_weights) +
             " (give narrower --hidden widths, --ensemble 1, or --ignore the wide columns)");
}

}  // namespace detail

/// The holdout the tool trains, validates and tests on.
tenon::holdout_split make_holdout(const tenon::table& t, const train_request& q, const training_setup& s) {
    switch (s.split) {
    case split_choice::stratified:
        return detail::naming_classes(t, q.target,
                                      [&] { return tenon::stratified_holdout(tenon::dense_codes(t.at(q.target), true), q.fractions, q.model.seed); });
    case split_choice::chronological: return tenon::chronological_holdout(detail::column_times(t, q.time_column), q.fractions);
    case split_choice::grouped: return tenon::grouped_holdout(tenon::dense_codes(t.at(q.group_column), true), q.fractions, q.model.seed);
    case split_choice::random:
    case split_choice::automatic: break;
    }
    return tenon::random_holdout(t.row_count(), q.fractions, q.model.seed);
}

/// Folds for --folds K. Chronological folds walk forward in time: each fold
/// trains on everything before its test block.
std::vector<tenon::fold> make_folds(const tenon::table& t, const train_request& q, const training_setup& s) {
    switch (s.split) {
    case split_choice::stratified:
        return detail::naming_classes(t, q.target,
                                      [&] { return tenon::stratified_k_folds(tenon::dense_codes(t.at(q.target), true), q.folds, q.model.seed); });
    case split_choice::chronological: {
        const std::size_t horizon = std::max<std::size_t>(1, t.row_count() / (q.folds + 1));
        return tenon::rolling_origin_folds(detail::column_times(t, q.time_column), q.folds, horizon);
    }
    case split_choice::grouped: return tenon::group_k_folds(tenon::dense_codes(t.at(q.group_column), true), q.folds, q.model.seed);
    case split_choice::random:
    case split_choice::automatic: break;
    }
    return tenon::k_folds(t.row_count(), q.folds, q.model.seed);
}

/// Folds of the training rows for --search, when rows must not cross time or
/// groups: walk-forward for --split chronological, whole groups for --split
/// grouped; empty otherwise (the search then draws random or stratified folds).
std::vector<tenon::fold> search_folds(const tenon::table& t, const train_request& q, const training_setup& s, const std::vector<std::size_t>& rows) {
    constexpr std::size_t k = 3;  // as the search's own folds
    std::vector<tenon::fold> by_position;
    try {
        if (s.split == split_choice::chronological) {
            const std::vector<double> all = detail::column_times(t, q.time_column);
            std::vector<double> times;
            for (auto r : rows) times.push_back(all[r]);
            by_position = tenon::rolling_origin_folds(times, k, std::max<std::size_t>(1, rows.size() / (k + 1)));
        } else if (s.split == split_choice::grouped) {
            const std::vector<std::uint32_t> all = tenon::dense_codes(t.at(q.group_column), true);
            std::vector<std::uint32_t> groups;
            for (auto r : rows) groups.push_back(all[r]);
            by_position = tenon::group_k_folds(groups, k, q.model.seed);
        }
    } catch (const tenon::error& e) {
        // The split's own message names the folds, not the option that asked for them.
        const std::string message = detail::without_code(e.what());
        throw cli_failure(e.code(),
                          "--search: its " + std::to_string(k) + " folds of the " + std::to_string(rows.size()) + " training rows (" +
                              (s.split == split_choice::chronological ? "walk-forward, by --time-column '" + q.time_column
                                                                      : "whole groups, by --group-column '" + q.group_column) +
                              "'): " + message + "; train without --search, or with more rows" +
                              (s.split == split_choice::grouped ? " or groups" : ""));
    }
    std::vector<tenon::fold> out(by_position.size());
    for (std::size_t f = 0; f < by_position.size(); ++f) {
        for (auto p : by_position[f].train) out[f].train.push_back(rows[p]);
        for (auto p : by_position[f].test) out[f].test.push_back(rows[p]);
    }
    return out;
}

tenon::model_settings make_settings(const train_request& q) {
    tenon::model_settings m = q.model;
    // With the BLAS backend tenon's threads split the products into bands
    // and each band is a BLAS call, so the BLAS runs on one thread (its own
    // threads would compete with tenon's for the cores; a BLAS without such
    // a call keeps its own setting, e.g. from its environment).
    if (tenon::active_kernel_path() == tenon::kernel_path::blas) tenon::set_blas_threads(1);
    return m;
}

namespace detail {

// The columns a model needs that the data lacks, as "'a', 'b'" (empty: none).
std::string absent_columns(const tenon::table& t, const std::vector<std::string>& needed) {
    std::vector<std::string> absent;
    for (const auto& name : needed)
        if (!t.contains(name)) absent.push_back("'" + name + "'");
    return join(absent, ", ");
}

// Reads new rows in the data file's dialect (told from the file, as in
// tenon train), with the missing spellings and the time-stamp forms the
// model keeps, so that its cells read as they did in training.
tenon::table read_new_rows(const std::string& path, const tenon::measured_plan* plan) {
    tenon::csv_options options = data_dialect(path, 0, false);
    options.missing_tokens = plan ? plan->missing_tokens() : missing_tokens();
    if (plan)
        for (const auto& name : plan->input_columns())
            if (plan->feature_kind(name) == tenon::column_kind::datetime && plan->feature_time_form(name) != tenon::time_format::detect)
                options.time_formats[name] = plan->feature_time_form(name);
    if (!options.time_formats.empty()) {  // only columns the file has: the missing ones are reported by name later
        const std::vector<std::string> names = header_names(path, options);
        for (auto it = options.time_formats.begin(); it != options.time_formats.end();)
            it = std::find(names.begin(), names.end(), it->first) == names.end() ? options.time_formats.erase(it) : std::next(it);
    }
    tenon::table t = tenon::read_csv_file(path, options);
    if (t.row_count() == 0) fail(cli_codes::data_empty, path + ": no data rows below the header");
    return t;
}

}  // namespace detail

}  // namespace tenon_cli
