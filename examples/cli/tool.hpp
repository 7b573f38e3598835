// The `tenon` command-line tool (train, infer, inspect, retrain, drift) is
// the static library tenon_tool: one source file per subcommand plus shared
// parts (options.cpp, data.cpp, output_files.cpp, json_output.cpp, text.cpp,
// cli.cpp). This header, declarations only, is what main.cpp and the tests
// include: they link the library and run the tool in process (run_cli with
// their own streams), so a test compiles without the tool's code. Each
// subcommand's options are one table (tool_parts.hpp) that parses the
// command line and writes its --help.
#pragma once

#include <cstddef>
#include <cstdint>
#include <functional>
#include <map>
#include <optional>
#include <ostream>
#include <stdexcept>
#include <string>
#include <utility>
#include <vector>

#include <tenon/prep/plan.hpp>
#include <tenon/prep/split.hpp>
#include <tenon/prep/table.hpp>
#include <tenon/train/calibration.hpp>
#include <tenon/train/workflow.hpp>

namespace tenon_cli {

// Exit status: 0 success; 2 bad command line or bad input data (the message
// on stderr names the option, file, line, column or value); 3 an output file
// could not be written; 1 anything unexpected; 4 `tenon retrain` kept the
// incumbent (nothing written); 5 `tenon drift` flagged a column. On any
// failure no --metrics, --report, --model, --out, --rollback or --json file is
// created or changed (output_files.hpp says how).
inline constexpr int exit_success = 0;
inline constexpr int exit_unexpected = 1;
inline constexpr int exit_bad_input = 2;
inline constexpr int exit_output_failed = 3;
/// tenon retrain: the candidate was not promoted; nothing was written.
inline constexpr int exit_kept_incumbent = 4;
/// tenon drift: at least one input column drifted.
inline constexpr int exit_drift_flagged = 5;

/// What the tool knows about where it runs.
struct cli_environment {
    /// Standard output is a terminal: progress is redrawn in place.
    bool terminal = false;
    /// Seconds from an arbitrary origin, for the elapsed and remaining times
    /// shown while training; the steady clock when empty.
    std::function<double()> clock;
    /// Set by main.cpp when the tool runs under mpirun (built with
    /// tenon::mpi): `tenon train` trains data-parallel as a member of this
    /// team, and only member 0 prints and writes the model, metrics and report.
    /// With one holdout each member keeps its share of the training and
    /// validation rows (rows k, k + P, ... of each, for member k of P) and
    /// the plan is measured over the shares through `exchange`; with --folds
    /// every member holds every row.
    tenon::training_team* team = nullptr;
    tenon::statistics_exchange* exchange = nullptr;
    /// Set by main.cpp under mpirun: ends the whole job after printing
    /// `message` (MPI_Abort), for a failure while the members train, when
    /// the others may be waiting for this one in a collective call. When
    /// empty (in process), such a failure is reported as any other.
    std::function<void(const std::string& message, int status)> end_job;
};

/// Runs the tool with the given arguments (argv[0] is the program name).
/// Returns the exit status; messages go to `out`, errors to `err`, one line each.
int run_cli(int argc, char** argv, std::ostream& out, std::ostream& err, const cli_environment& env);

/// A failure of the tool itself (command line, data checks, output files);
/// library failures arrive as tenon::error. what() reads "[code] message".
class cli_failure : public std::runtime_error {
public:
    cli_failure(std::string code, std::string message, int exit_status = exit_bad_input)
        : std::runtime_error("[" + code + "] " + message), code_(std::move(code)), message_(std::move(message)), exit_status_(exit_status) {}
    const std::string& code() const noexcept { return code_; }
    /// The message without the "[code] " of what().
    const std::string& message() const noexcept { return message_; }
    int exit_status() const noexcept { return exit_status_; }

private:
    std::string code_;
    std::string message_;
    int exit_status_;
};

// The tool's own error codes (the library's are in tenon/core/error_codes.hpp).
namespace cli_codes {
inline constexpr const char* option_unknown = "cli.option.unknown";
inline constexpr const char* option_value = "cli.option.value";
inline constexpr const char* option_missing = "cli.option.missing";
inline constexpr const char* option_conflict = "cli.option.conflict";
inline constexpr const char* command_unknown = "cli.command.unknown";
inline constexpr const char* column_unknown = "cli.column.unknown";
inline constexpr const char* data_empty = "cli.data.empty";
inline constexpr const char* target_single_class = "cli.target.single_class";
inline constexpr const char* output_write = "cli.output.write";
inline constexpr const char* column_missing = "cli.column.missing";
inline constexpr const char* model_unusable = "cli.model.unusable";
}  // namespace cli_codes

/// Throws cli_failure(code, message, exit_status).
[[noreturn]] void fail(const char* code, const std::string& message, int exit_status = exit_bad_input);

// ---------------------------------------------------------------------------
// `tenon train`'s command line and the decisions it takes from the data

enum class task_choice { automatic, classify, regress };
enum class split_choice { automatic, random, stratified, chronological, grouped };

/// Size limits of `tenon train` (refused with exit status 2 and the limit
/// named, before any memory is taken): a wider or deeper network than this
/// is far beyond what the tool's CSV-sized tasks need, and 100 million
/// weights take 400 MB in single precision, 1.6 GB with Adam's state and
/// gradients. max_hidden_weights bounds the weights between hidden layers
/// when --hidden is read, then the whole network's once the data's features
/// are known (wide one-hot inputs times the first width, and the last width
/// times the outputs, count too).
inline constexpr std::size_t max_hidden_width = 65536;
inline constexpr std::size_t max_hidden_layers = 64;
inline constexpr std::size_t max_hidden_weights = 100000000;

/// The library's model and training defaults, which the tool's options
/// start from (no copies of them here): a host calling fit_model with a
/// default model_settings trains what `tenon train` trains.
const tenon::model_settings& library_defaults();
/// The settings `tenon train` starts from: the library's, with seed 1.
tenon::model_settings tool_model_defaults();

struct train_request {
    std::string data_path;
    std::string target;
    task_choice task = task_choice::automatic;
    std::vector<std::string> ignored;
    std::vector<std::string> used;  // --use: identifier-like columns kept as features
    std::vector<std::string> categorical;  // --categorical: read as categories
    std::vector<std::string> numeric;  // --numeric: read as numbers
    char delimiter = 0;  // --delimiter; 0: told from the file
    bool decimal_comma = false;  // --decimal-comma; otherwise told from the file
    split_choice split = split_choice::automatic;
    std::string time_column;
    std::string group_column;
    /// --time-format: the form of every date/time column (detect: per column),
    /// and forms named per column (the only way to read epoch numbers as times).
    tenon::time_format time_format = tenon::time_format::detect;
    std::map<std::string, tenon::time_format> column_time_formats;
    /// --time-cycles: hour of day, day of week and day of year as sine/cosine pairs.
    bool time_cycles = false;
    tenon::split_fractions fractions{0.7, 0.15, 0.15};
    std::size_t folds = 0;  // 0 = single holdout
    /// The model's settings, written straight by the options that name them
    /// (--hidden, --activation, --loss, --optimizer, --learning-rate,
    /// --epochs, --batch, --keep-order, --patience, --ensemble, --refit,
    /// --class-weights, --seed, --threads): the library's defaults, but seed 1.
    /// The seed also draws the split.
    tenon::model_settings model = tool_model_defaults();
    double search_seconds = 0.0;  // --search: budget of the settings search (train/search.hpp); 0: no search
    tenon::scaling_method target_scaling = tenon::scaling_method::z_score;  // --target-scaling (regression targets)
    double coverage = tenon::default_coverage;  // --coverage: nominal coverage of bands and class sets
    std::string metrics_path;
    std::string report_path;
    std::string model_path;
    bool quiet = false;
    bool help = false;
};

/// Reads the arguments after `train`. Throws cli_failure on a bad command line.
train_request parse_train_request(const std::vector<std::string>& args);

/// Reads the CSV file. Its delimiter and decimal mark are given or told from
/// its first rows. --categorical and --numeric force kinds; a regression
/// target, and any column whose cells are numbers but for a few, are read as
/// numeric so that the library names the first cell that is not a number
/// (file, line, column, value); so is a column of dates/times but for a few.
/// Lines for the user go to `notes`; a column at least half numbers or dates
/// that stays categorical gets a warning on `warnings`.
tenon::table load_table(const train_request& q, std::vector<std::string>* notes = nullptr, std::ostream* warnings = nullptr);

/// The decisions taken from the command line and the data.
struct training_setup {
    bool classify = false;
    split_choice split = split_choice::random;
    tenon::plan preparation;
    std::size_t target_missing = 0;
    /// One line each for the user: what was read or decided from the data.
    std::vector<std::string> notes;
};

training_setup make_setup(const tenon::table& t, const train_request& q);

/// The holdout the tool trains, validates and tests on.
tenon::holdout_split make_holdout(const tenon::table& t, const train_request& q, const training_setup& s);
/// --search's folds of `rows` under --split chronological (walk-forward) or
/// grouped (whole groups); empty for the other splits.
std::vector<tenon::fold> search_folds(const tenon::table& t, const train_request& q, const training_setup& s, const std::vector<std::size_t>& rows);

// ---------------------------------------------------------------------------
// Help texts (`tenon COMMAND --help` prints them)

std::string general_help();
std::string train_help();
std::string infer_help();
std::string inspect_help();
std::string retrain_help();
std::string drift_help();

// ---------------------------------------------------------------------------
// A small JSON writer (RFC 8259: strings escaped per section 7; numbers must
// be finite per section 6, so NaN and infinities are written as null).

class json_writer {
public:
    json_writer& open_object(const char* key = nullptr);
    json_writer& open_array(const char* key = nullptr);
    json_writer& close_object();
    json_writer& close_array();
    json_writer& text(const char* key, const std::string& value);
    json_writer& number(const char* key, double value);
    json_writer& count(const char* key, std::uint64_t value);
    json_writer& boolean(const char* key, bool value);
    json_writer& null(const char* key);
    const std::string& str() const noexcept { return out_; }
    std::string finish();

    /// JSON string contents (tenon::detail::json_escape, RFC 8259 section 7).
    /// Bytes that are not well-formed UTF-8 (a model's category read from a
    /// Latin-1 file, say) become U+FFFD, so the output is valid JSON.
    static std::string escape(const std::string& s);

private:
    json_writer& open(const char* key, char bracket);
    json_writer& close(char bracket);
    void newline();
    void member(const char* key);
    void quoted(const std::string& s);

    std::string out_;
    std::vector<bool> first_;
};

// ---------------------------------------------------------------------------
// Text helpers the tests check directly

namespace detail {
/// "a,b,,c" -> {"a", "b", "", "c"}.
std::vector<std::string> split_list(const std::string& text);
/// A number for a table cell or a summary line, at most about a dozen
/// characters wide: fixed-point below a million in magnitude, scientific
/// notation above; "-" when not finite.
std::string fixed(double v, int decimals);
/// `digits` significant digits (printf's %g); "-" when not finite.
std::string significant(double v, int digits = 6);
/// Seconds since 1970 as "YYYY-MM-DD HH:MM:SS UTC".
std::string utc_text(std::int64_t seconds);
}  // namespace detail

namespace files {
/// Installs the handler of SIGINT, SIGTERM and SIGHUP (main.cpp calls it):
/// it removes the run's temporary files and ends the process by the same
/// signal, so the caller sees the usual status (a shell shows 128 + N: 130
/// for SIGINT, 143 for SIGTERM, 129 for SIGHUP). No output file is changed.
void remove_temporaries_on_signals();
/// The process id in `file_name` when it is a temporary file of `name`
/// (".NAME.tenon-PID-HEX.tmp" of this tool and of
/// tenon::write_file_atomically, or "NAME.tmp-PID-N" of earlier versions of
/// the library); else -1.
long temporary_owner(const std::string& file_name, const std::string& name);
}  // namespace files

}  // namespace tenon_cli
