// What the tool's source files share (not for the tests: they include
// tool.hpp): the option tables, number and text helpers, data loading, the
// subcommands' entry points.
#pragma once

#include <cstddef>
#include <cstdint>
#include <exception>
#include <ostream>
#include <string>
#include <utility>
#include <vector>

#include <tenon/tenon.hpp>

#include "output_files.hpp"
#include "tool.hpp"

namespace tenon_cli {

using files::pending_output;

// The subcommands (dispatched by run_cli, cli.cpp).
int run_train(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env);
int run_infer(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env);
int run_inspect(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env);
int run_retrain(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env);
int run_drift(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env);

namespace detail {

// ---------------------------------------------------------------------------
// Option tables (options.cpp). One table per subcommand lists its options in
// the order --help shows them; the same entries parse the command line.

/// One option: its spelling, the name of its value (nullptr: a flag, which
/// takes no value), its help text (lines separated by '\n', without the
/// indentation --help adds), how a value is stored into the request, and
/// text --help prints before it (a section heading, a paragraph), if any.
template <class Request>
struct option_entry {
    const char* spelling;
    const char* value_name;
    const char* help;
    void (*store)(Request& q, const std::string& value);
    const char* before = nullptr;
};

/// An option as given on the command line, and its row in the table.
struct given_option {
    std::string name, value;
    std::size_t row = 0;
};

/// The spelling of each row and whether it is a flag.
struct option_shape {
    const char* spelling;
    bool flag;
};

/// Reads --name VALUE, --name=VALUE and value-less flags for `tenon command`
/// (whole command line first: an unknown, repeated or value-less option is
/// refused before any value is read); --help / -h sets `help`.
std::vector<given_option> read_options(const std::string& command, const std::vector<std::string>& args, const std::vector<option_shape>& known,
                                       bool& help);

/// One option's lines of --help: "  --name VALUE" with the help text in the
/// column after it (or on the next lines when the name is too wide), after
/// `before`.
std::string option_help(const char* before, const char* spelling, const char* value_name, const char* help);

/// Parses `args` into `q` by `table`; returns the options given, in order.
template <class Request, std::size_t N>
std::vector<std::string> parse_options(const std::string& command, const std::vector<std::string>& args, const option_entry<Request> (&table)[N],
                                       Request& q) {
    std::vector<option_shape> known;
    for (const auto& e : table) known.push_back({e.spelling, e.value_name == nullptr});
    std::vector<std::string> seen;
    for (const auto& o : read_options(command, args, known, q.help)) {
        table[o.row].store(q, o.value);
        seen.push_back(o.name);
    }
    return seen;
}

/// The options' part of --help, from the same table.
template <class Request, std::size_t N>
std::string options_help(const option_entry<Request> (&table)[N]) {
    std::string s;
    for (const auto& e : table) s += option_help(e.before, e.spelling, e.value_name, e.help);
    return s;
}

bool was_given(const std::vector<std::string>& seen, const char* option);

std::string join(const std::vector<std::string>& parts, const char* separator);
std::size_t parse_count(const std::string& option, const std::string& text, std::size_t minimum);
std::uint64_t parse_seed(const std::string& option, const std::string& text);
double parse_real(const std::string& option, const std::string& text);
/// A value with a non-empty file name.
std::string file_name(const std::string& option, const std::string& value);

template <class Choice, std::size_t N>
Choice parse_choice(const std::string& option, const std::string& text, const std::pair<const char*, Choice> (&names)[N]) {
    std::vector<std::string> listed;
    for (const auto& n : names) {
        if (text == n.first) return n.second;
        listed.emplace_back(n.first);
    }
    fail(cli_codes::option_value, option + " '" + text + "': not one of " + join(listed, ", "));
}

/// The "Files" paragraph of every subcommand's help that writes files;
/// `extra` (wrapped lines, the last ending in ';') adds what one subcommand
/// promises beyond the others.
std::string files_help(const std::string& extra = "");

// ---------------------------------------------------------------------------
// Text (text.cpp)

std::string duration_text(double seconds);
double steady_seconds();
/// A message on one line: control characters written as escapes.
std::string one_line(const std::string& s);
/// A library error's text without its code: "[code] message" -> "message",
/// for a message the tool extends (the code goes on, as the error's code).
std::string without_code(const std::string& what);
/// The one line the tool prints for a failure of `command`, and its exit status.
std::string failure_text(const std::string& command, const std::exception_ptr& failure, int& status);

// ---------------------------------------------------------------------------
// Data (data.cpp)

/// "a, b, c", or the first 12 and the count.
std::string column_listing(const std::vector<std::string>& names);
/// The trimmed header names of a CSV file read with `options`' delimiter.
std::vector<std::string> header_names(const std::string& path, const tenon::csv_options& options);
/// The delimiter and decimal mark of a data file: as given on the command
/// line, the rest told from its first rows (tenon::detect_csv_dialect).
tenon::csv_options data_dialect(const std::string& path, char delimiter, bool decimal_comma);
/// Refuses a network of more than max_hidden_weights weights, counted from
/// the features the plan measures on `rows`.
void check_network_size(const tenon::table& t, const train_request& q, const training_setup& s, const std::vector<std::size_t>& rows);
/// The columns a model needs that the data lacks, as "'a', 'b'" (empty: none).
std::string absent_columns(const tenon::table& t, const std::vector<std::string>& needed);
/// Reads new rows in the data file's dialect, with the missing spellings and
/// the time-stamp forms the model keeps.
tenon::table read_new_rows(const std::string& path, const tenon::measured_plan* plan);

// ---------------------------------------------------------------------------
// JSON pieces shared by train and inspect (train.cpp)

/// The calibration as stored in the model file.
void write_calibration(json_writer& j, const char* key, const tenon::model_calibration& c);

/// Each row's time in column `name` (NaN where missing), in the column's units.
std::vector<double> column_times(const tenon::table& t, const std::string& name);

}  // namespace detail

/// The cell texts the tool reads as missing: the library's defaults.
std::vector<std::string> missing_tokens();
/// Cross-validation only: every feature column with a missing cell anywhere
/// in the table gets a missing indicator, so every fold's plan has the same layout.
void indicators_for_every_fold(const tenon::table& t, tenon::plan& preparation);
/// --time-cycles: the cyclic hour, weekday and yearday values of date/time columns.
void choose_time_cycles(const tenon::table& t, tenon::plan& preparation);
/// Folds for --folds K.
std::vector<tenon::fold> make_folds(const tenon::table& t, const train_request& q, const training_setup& s);
/// The library's model settings from the command line.
tenon::model_settings make_settings(const train_request& q);

}  // namespace tenon_cli
