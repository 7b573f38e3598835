// The `tenon` command-line tool: trains a perceptron on a CSV file and
// reports how well it does on rows it never saw (`tenon train`), saves the
// model (--model), predicts with it on new rows (`tenon infer`), describes
// it (`tenon inspect`), retrains it on new rows behind a promotion gate
// (`tenon retrain`) and compares recent rows with its training rows
// (`tenon drift`).
//
// Built on tenon's public headers only, the way a host application would use
// them. The logic lives here, in a header, so the tests can run the tool in
// process (run_cli with their own streams); main.cpp only forwards argv.
//
// Subcommands are entries of one table (see `subcommands()`); each has a name,
// a one-line summary for `tenon --help` and a handler. Later subcommands plug
// in there without touching the dispatch.
//
// Exit status: 0 success; 2 bad command line or bad input data (the message
// on stderr names the option, file, line, column or value); 3 an output file
// could not be written; 1 anything unexpected; 4 `tenon retrain` kept the
// incumbent (nothing written); 5 `tenon drift` flagged a column. On any
// failure no --metrics, --report, --model, --out, --rollback or --json file is
// created or changed: each is checked (by file identity against the inputs
// and the other outputs) before training, written to its own temporary file
// beside the destination, synced, and renamed into place only when every
// output is written (cli_files.hpp says what holds for symlinks, FIFOs,
// devices, standard output and signals).
#pragma once

#include <algorithm>
#include <charconv>
#include <chrono>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <exception>
#include <filesystem>
#include <fstream>
#include <functional>
#include <iterator>
#include <limits>
#include <map>
#include <new>
#include <ostream>
#include <sstream>
#include <stdexcept>
#include <string>
#include <string_view>
#include <system_error>
#include <utility>
#include <vector>

#include <tenon/tenon.hpp>

namespace tenon_cli {

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

/// A failure of the tool itself (command line, data checks, output files);
/// library failures arrive as tenon::error. what() reads "[code] message".
class cli_failure : public std::runtime_error {
public:
    cli_failure(std::string code, const std::string& message, int exit_status = exit_bad_input)
        : std::runtime_error("[" + code + "] " + message), code_(std::move(code)), exit_status_(exit_status) {}
    const std::string& code() const noexcept { return code_; }
    int exit_status() const noexcept { return exit_status_; }

private:
    std::string code_;
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

[[noreturn]] inline void fail(const char* code, const std::string& message, int exit_status = exit_bad_input) {
    throw cli_failure(code, message, exit_status);
}

// ---------------------------------------------------------------------------
// Options of `tenon train`

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
inline const tenon::model_settings& library_defaults() {
    static const tenon::model_settings defaults;
    return defaults;
}

struct train_request {
    std::string data_path;
    std::string target;
    task_choice task = task_choice::automatic;
    std::vector<std::string> ignored;
    std::vector<std::string> used;         // --use: identifier-like columns kept as features
    std::vector<std::string> categorical;  // --categorical: read as categories
    std::vector<std::string> numeric;      // --numeric: read as numbers
    char delimiter = 0;                    // --delimiter; 0: told from the file
    bool decimal_comma = false;            // --decimal-comma; otherwise told from the file
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
    std::vector<std::size_t> hidden = library_defaults().hidden;
    tenon::activation hidden_activation = library_defaults().hidden_activation;
    bool loss_given = false;
    tenon::loss_kind loss = library_defaults().loss;
    tenon::update_kind update = library_defaults().update;
    double learning_rate = library_defaults().learning_rate;
    std::size_t epochs = library_defaults().epochs;
    std::size_t batch = library_defaults().batch_size;
    std::size_t patience = library_defaults().patience;
    std::size_t ensemble = library_defaults().ensemble;  // 0: by the row count
    std::uint64_t seed = 1;  // one seed for the split, the weights and the batch order
    std::size_t threads = 1;
    bool keep_order = false;  // --keep-order: no shuffling
    double coverage = tenon::default_coverage;  // --coverage: nominal coverage of bands and class sets
    std::string metrics_path;
    std::string report_path;
    std::string model_path;
    bool quiet = false;
    bool help = false;
};

namespace detail {

inline std::string join(const std::vector<std::string>& parts, const char* separator) {
    std::string s;
    for (std::size_t k = 0; k < parts.size(); ++k) {
        if (k) s += separator;
        s += parts[k];
    }
    return s;
}

inline std::vector<std::string> split_list(const std::string& text) {
    std::vector<std::string> parts;
    std::string current;
    for (char c : text) {
        if (c == ',') {
            parts.push_back(current);
            current.clear();
        } else {
            current += c;
        }
    }
    parts.push_back(current);
    return parts;
}

inline std::size_t parse_count(const std::string& option, const std::string& text, std::size_t minimum) {
    std::uint64_t value = 0;
    const char* first = text.data();
    const char* last = text.data() + text.size();
    const auto r = std::from_chars(first, last, value);
    if (!text.empty() && r.ec == std::errc::result_out_of_range && r.ptr == last)
        fail(cli_codes::option_value, option + " '" + text + "': too large (more than 18446744073709551615)");
    if (text.empty() || r.ec != std::errc() || r.ptr != last)
        fail(cli_codes::option_value, option + " '" + text + "': not a whole number");
    if (value < minimum)
        fail(cli_codes::option_value, option + " '" + text + "': must be at least " + std::to_string(minimum));
    if (value > std::numeric_limits<std::size_t>::max()) fail(cli_codes::option_value, option + " '" + text + "': too large");
    return static_cast<std::size_t>(value);
}

inline std::uint64_t parse_seed(const std::string& text) {
    std::uint64_t value = 0;
    const char* last = text.data() + text.size();
    const auto r = std::from_chars(text.data(), last, value);
    if (text.empty() || r.ec != std::errc() || r.ptr != last)
        fail(cli_codes::option_value, "--seed '" + text + "': not a whole number between 0 and 18446744073709551615");
    return value;
}

inline double parse_real(const std::string& option, const std::string& text) {
    double value = 0;
    if (!tenon::parse_number(text, value) || text.empty())
        fail(cli_codes::option_value, option + " '" + text + "': not a finite number");
    return value;
}

inline tenon::activation parse_activation_option(const std::string& text) {
    // The tool spells names with hyphens, as command-line words usually are.
    const std::pair<const char*, tenon::activation> names[] = {
        {"relu", tenon::activation::relu},       {"leaky-relu", tenon::activation::leaky_relu},
        {"elu", tenon::activation::elu},         {"tanh", tenon::activation::tanh},
        {"sigmoid", tenon::activation::sigmoid}, {"softplus", tenon::activation::softplus},
        {"gelu", tenon::activation::gelu}};
    for (const auto& n : names)
        if (text == n.first) return n.second;
    fail(cli_codes::option_value,
         "--activation '" + text + "': not one of relu, leaky-relu, elu, tanh, sigmoid, softplus, gelu");
}

template <class Choice, std::size_t N>
Choice parse_choice(const std::string& option, const std::string& text, const std::pair<const char*, Choice> (&names)[N]) {
    std::vector<std::string> listed;
    for (const auto& n : names) {
        if (text == n.first) return n.second;
        listed.emplace_back(n.first);
    }
    fail(cli_codes::option_value, option + " '" + text + "': not one of " + join(listed, ", "));
}

}  // namespace detail

namespace detail {
// --time-format [COLUMN=]FORM[,...]: a bare FORM applies to every date/time
// column (an epoch form to the --time-column), COLUMN=FORM to one column.
inline void parse_time_formats(const std::string& value, train_request& q) {
    const auto forms = [] {
        std::string names;
        for (std::uint8_t k = 1; k <= static_cast<std::uint8_t>(tenon::time_format::epoch_milliseconds); ++k)
            names += std::string(k > 1 ? ", " : "") + tenon::to_string(static_cast<tenon::time_format>(k));
        return names;
    };
    for (const auto& item : split_list(value)) {
        const auto eq = item.find('=');
        const std::string column = eq == std::string::npos ? std::string() : item.substr(0, eq);
        const std::string text = eq == std::string::npos ? item : item.substr(eq + 1);
        tenon::time_format form = tenon::time_format::detect;
        if (!tenon::time_format_from_text(text, form) || form == tenon::time_format::detect)
            fail(cli_codes::option_value, "--time-format '" + item + "': '" + text + "' is not a time format (one of " + forms() + ")");
        if (eq != std::string::npos && column.empty())
            fail(cli_codes::option_value, "--time-format '" + item + "': an empty column name");
        if (column.empty()) {
            if (q.time_format != tenon::time_format::detect)
                fail(cli_codes::option_conflict, "--time-format names two forms for every column: " + std::string(tenon::to_string(q.time_format)) +
                                                     " and " + text);
            q.time_format = form;
        } else if (!q.column_time_formats.emplace(column, form).second) {
            fail(cli_codes::option_conflict, "--time-format names column '" + column + "' twice");
        }
    }
}
}  // namespace detail

/// Reads the arguments after `train`. Throws cli_failure on a bad command line.
inline train_request parse_train_request(const std::vector<std::string>& args) {
    train_request q;
    std::vector<std::string> seen;
    bool data_given = false, target_given = false;
    for (std::size_t k = 0; k < args.size(); ++k) {
        std::string name = args[k];
        std::string value;
        bool inline_value = false;
        if (name == "--help" || name == "-h") {
            q.help = true;
            continue;
        }
        if (name.rfind("--", 0) != 0)
            fail(cli_codes::option_unknown, "unexpected argument '" + name + "' for 'tenon train' (options start with --; see tenon train --help)");
        const auto eq = name.find('=');
        if (eq != std::string::npos) {
            value = name.substr(eq + 1);
            name = name.substr(0, eq);
            inline_value = true;
        }
        static const char* const known[] = {"--data", "--target", "--task", "--ignore", "--use", "--categorical", "--numeric",
                                            "--delimiter", "--decimal-comma", "--split", "--time-column", "--group-column",
                                            "--fractions", "--folds", "--hidden", "--activation", "--loss", "--optimizer",
                                            "--learning-rate", "--epochs", "--batch", "--patience", "--seed", "--threads",
                                            "--ensemble", "--metrics", "--report", "--model", "--quiet", "--keep-order", "--time-format",
                                            "--time-cycles", "--coverage"};
        bool is_known = false;
        for (const char* n : known) is_known = is_known || name == n;
        if (!is_known) fail(cli_codes::option_unknown, "unknown option '" + name + "' for 'tenon train' (see tenon train --help)");
        if (std::find(seen.begin(), seen.end(), name) != seen.end())
            fail(cli_codes::option_conflict, name + " is given more than once");
        seen.push_back(name);
        if (name == "--quiet") {
            if (inline_value) fail(cli_codes::option_value, "--quiet takes no value");
            q.quiet = true;
            continue;
        }
        if (name == "--keep-order") {
            if (inline_value) fail(cli_codes::option_value, "--keep-order takes no value");
            q.keep_order = true;
            continue;
        }
        if (name == "--time-cycles") {
            if (inline_value) fail(cli_codes::option_value, "--time-cycles takes no value");
            q.time_cycles = true;
            continue;
        }
        if (name == "--decimal-comma") {
            if (inline_value) fail(cli_codes::option_value, "--decimal-comma takes no value");
            q.decimal_comma = true;
            continue;
        }
        if (!inline_value) {
            if (k + 1 >= args.size()) fail(cli_codes::option_missing, name + " needs a value");
            value = args[++k];
        }
        if (name == "--data") {
            if (value.empty()) fail(cli_codes::option_value, "--data needs a file name, got an empty one");
            q.data_path = value;
            data_given = true;
        } else if (name == "--target") {
            q.target = value;
            target_given = true;
        } else if (name == "--task") {
            const std::pair<const char*, task_choice> names[] = {
                {"auto", task_choice::automatic}, {"classify", task_choice::classify}, {"regress", task_choice::regress}};
            q.task = detail::parse_choice("--task", value, names);
        } else if (name == "--ignore" || name == "--use" || name == "--categorical" || name == "--numeric") {
            auto& list = name == "--ignore" ? q.ignored : name == "--use" ? q.used : name == "--categorical" ? q.categorical : q.numeric;
            list = detail::split_list(value);
            for (const auto& c : list)
                if (c.empty()) fail(cli_codes::option_value, name + " '" + value + "': an empty column name");
        } else if (name == "--delimiter") {
            const std::pair<const char*, char> names[] = {{",", ','}, {";", ';'}, {"tab", '\t'}, {"|", '|'}};
            q.delimiter = detail::parse_choice("--delimiter", value == "\t" ? std::string("tab") : value, names);
        } else if (name == "--split") {
            const std::pair<const char*, split_choice> names[] = {{"auto", split_choice::automatic},
                                                                   {"random", split_choice::random},
                                                                   {"stratified", split_choice::stratified},
                                                                   {"chronological", split_choice::chronological},
                                                                   {"grouped", split_choice::grouped}};
            q.split = detail::parse_choice("--split", value, names);
        } else if (name == "--time-column") {
            q.time_column = value;
        } else if (name == "--time-format") {
            detail::parse_time_formats(value, q);
        } else if (name == "--group-column") {
            q.group_column = value;
        } else if (name == "--fractions") {
            const auto parts = detail::split_list(value);
            if (parts.size() != 3)
                fail(cli_codes::option_value, "--fractions '" + value + "': expected three numbers TRAIN,VAL,TEST, found " +
                                                  std::to_string(parts.size()));
            const double train = detail::parse_real("--fractions", parts[0]);
            const double validation = detail::parse_real("--fractions", parts[1]);
            const double test = detail::parse_real("--fractions", parts[2]);
            if (!(train > 0 && train < 1) || !(validation >= 0 && validation < 1) || !(test > 0 && test < 1))
                fail(cli_codes::option_value, "--fractions '" + value +
                                                  "': train and test must lie strictly between 0 and 1, validation in [0, 1)");
            const double sum = train + validation + test;
            if (std::abs(sum - 1.0) > 1e-6)
                fail(cli_codes::option_value, "--fractions '" + value + "': the fractions sum to " + tenon::number_to_text(sum) + ", not 1");
            q.fractions = {train, validation, test};
        } else if (name == "--folds") {
            q.folds = detail::parse_count("--folds", value, 2);
        } else if (name == "--hidden") {
            q.hidden.clear();
            for (const auto& part : detail::split_list(value)) {
                if (part.empty()) fail(cli_codes::option_value, "--hidden '" + value + "': an empty width between commas");
                std::size_t width = 0;
                try {
                    width = detail::parse_count("--hidden", part, 1);
                } catch (const cli_failure& e) {
                    // The whole list is quoted, then the piece and what is wrong with it.
                    const std::string m = e.what();
                    fail(cli_codes::option_value, "--hidden '" + value + "': width '" + part + "'" + m.substr(m.find("':") + 1));
                }
                if (width > max_hidden_width)
                    fail(cli_codes::option_value, "--hidden '" + value + "': width " + part + " is above the limit of " + std::to_string(max_hidden_width) +
                                                      " units per layer");
                q.hidden.push_back(width);
            }
            if (q.hidden.size() > max_hidden_layers)
                fail(cli_codes::option_value, "--hidden '" + value + "': " + std::to_string(q.hidden.size()) + " layers, above the limit of " +
                                                  std::to_string(max_hidden_layers));
            std::size_t between = 0;  // weights between hidden layers, before the inputs and outputs are known
            for (std::size_t layer = 1; layer < q.hidden.size(); ++layer) between += q.hidden[layer - 1] * q.hidden[layer];
            if (between > max_hidden_weights)
                fail(cli_codes::option_value, "--hidden '" + value + "': " + std::to_string(between) + " weights between the hidden layers, above the limit of " +
                                                  std::to_string(max_hidden_weights));
        } else if (name == "--activation") {
            q.hidden_activation = detail::parse_activation_option(value);
        } else if (name == "--loss") {
            const std::pair<const char*, tenon::loss_kind> names[] = {{"l1", tenon::loss_kind::l1},
                                                                       {"l2", tenon::loss_kind::l2},
                                                                       {"huber", tenon::loss_kind::huber},
                                                                       {"cross-entropy", tenon::loss_kind::cross_entropy}};
            q.loss = detail::parse_choice("--loss", value, names);
            q.loss_given = true;
        } else if (name == "--optimizer") {
            const std::pair<const char*, tenon::update_kind> names[] = {
                {"gd", tenon::update_kind::gradient_descent}, {"momentum", tenon::update_kind::momentum},
                {"nesterov", tenon::update_kind::nesterov},   {"adam", tenon::update_kind::adam},
                {"adamw", tenon::update_kind::adamw},         {"rmsprop", tenon::update_kind::rmsprop},
                {"adagrad", tenon::update_kind::adagrad}};
            q.update = detail::parse_choice("--optimizer", value, names);
        } else if (name == "--learning-rate") {
            q.learning_rate = detail::parse_real("--learning-rate", value);
            if (!(q.learning_rate > 0)) fail(cli_codes::option_value, "--learning-rate '" + value + "': must be positive");
            // The tool trains in single precision: a rate below the smallest
            // normal float (about 1.2e-38) rounds to 0 or a denormal and learns
            // nothing; one above the largest float becomes infinite.
            const float as_trained = static_cast<float>(q.learning_rate);
            if (!(as_trained >= std::numeric_limits<float>::min() && as_trained <= std::numeric_limits<float>::max()))
                fail(cli_codes::option_value, "--learning-rate '" + value + "': outside what single precision (the training's) holds, " +
                                                  "1.2e-38 to 3.4e38");
        } else if (name == "--epochs") {
            q.epochs = detail::parse_count("--epochs", value, 1);
        } else if (name == "--batch") {
            q.batch = detail::parse_count("--batch", value, 1);
        } else if (name == "--patience") {
            q.patience = detail::parse_count("--patience", value, 0);
        } else if (name == "--ensemble") {
            q.ensemble = detail::parse_count("--ensemble", value, 1);
            if (q.ensemble > 100) fail(cli_codes::option_value, "--ensemble '" + value + "': at most 100 networks");
        } else if (name == "--seed") {
            q.seed = detail::parse_seed(value);
        } else if (name == "--threads") {
            q.threads = detail::parse_count("--threads", value, 1);
        } else if (name == "--coverage") {
            q.coverage = detail::parse_real("--coverage", value);
            if (!(q.coverage >= 0.5 && q.coverage < 1.0))
                fail(cli_codes::option_value, "--coverage '" + value + "': must be at least 0.5 and below 1 (e.g. 0.9)");
        } else if (name == "--metrics") {
            if (value.empty()) fail(cli_codes::option_value, "--metrics needs a file name, got an empty one");
            q.metrics_path = value;
        } else if (name == "--report") {
            if (value.empty()) fail(cli_codes::option_value, "--report needs a file name, got an empty one");
            q.report_path = value;
        } else if (name == "--model") {
            if (value.empty()) fail(cli_codes::option_value, "--model needs a file name, got an empty one");
            q.model_path = value;
        }
    }
    if (q.help) return q;
    if (!data_given) fail(cli_codes::option_missing, "tenon train needs --data FILE.csv");
    if (!target_given || q.target.empty()) fail(cli_codes::option_missing, "tenon train needs --target COLUMN");
    if (q.split == split_choice::chronological && q.time_column.empty())
        fail(cli_codes::option_missing, "--split chronological needs --time-column COLUMN");
    if (q.time_format == tenon::time_format::epoch_seconds || q.time_format == tenon::time_format::epoch_milliseconds) {
        // Epoch numbers look like any other numbers: they are times only in a named column.
        if (q.time_column.empty())
            fail(cli_codes::option_missing, std::string("--time-format ") + tenon::to_string(q.time_format) +
                                                " needs --time-column COLUMN, or name the column: --time-format COLUMN=" +
                                                tenon::to_string(q.time_format));
        q.column_time_formats.emplace(q.time_column, q.time_format);
        q.time_format = tenon::time_format::detect;
    }
    if (q.split == split_choice::grouped && q.group_column.empty())
        fail(cli_codes::option_missing, "--split grouped needs --group-column COLUMN");
    if (!q.metrics_path.empty() && !q.report_path.empty() &&
        std::filesystem::path(q.metrics_path).lexically_normal() == std::filesystem::path(q.report_path).lexically_normal())
        fail(cli_codes::option_conflict, "--metrics and --report name the same file '" + q.metrics_path + "'");
    {
        const std::pair<const char*, const std::string*> outputs[] = {{"--metrics", &q.metrics_path}, {"--report", &q.report_path}, {"--model", &q.model_path}};
        for (std::size_t a = 0; a < 3; ++a)
            for (std::size_t b = a + 1; b < 3; ++b)
                if (a + b > 1 && !outputs[a].second->empty() && !outputs[b].second->empty() &&
                    std::filesystem::path(*outputs[a].second).lexically_normal() == std::filesystem::path(*outputs[b].second).lexically_normal())
                    fail(cli_codes::option_conflict, std::string(outputs[a].first) + " and " + outputs[b].first + " name the same file '" + *outputs[a].second + "'");
    }
    if (!q.model_path.empty() && std::filesystem::path(q.model_path).lexically_normal() == std::filesystem::path(q.data_path).lexically_normal())
        fail(cli_codes::option_conflict, "--model and --data name the same file '" + q.model_path + "'");
    if (q.folds > 0 && !q.model_path.empty())
        fail(cli_codes::option_conflict, "--model saves the model of one holdout run; cross-validation (--folds " + std::to_string(q.folds) +
                                             ") trains one model per fold and saves none");
    if (q.folds > 0 && !q.report_path.empty())
        fail(cli_codes::option_conflict, "--report draws one holdout run; it cannot be combined with --folds " + std::to_string(q.folds));
    if (q.folds > 0 && std::find(seen.begin(), seen.end(), "--coverage") != seen.end())
        fail(cli_codes::option_conflict, "--coverage calibrates the model of one holdout run on its validation rows; it cannot be combined with --folds " +
                                             std::to_string(q.folds));
    for (const auto& c : q.ignored) {
        if (c == q.target) fail(cli_codes::option_conflict, "--ignore names the target column '" + c + "'");
        if (std::find(q.used.begin(), q.used.end(), c) != q.used.end())
            fail(cli_codes::option_conflict, "--ignore and --use both name the column '" + c + "'");
    }
    for (const auto& c : q.categorical) {
        if (std::find(q.numeric.begin(), q.numeric.end(), c) != q.numeric.end())
            fail(cli_codes::option_conflict, "--categorical and --numeric both name the column '" + c + "'");
        if (c == q.target && q.task == task_choice::regress)
            fail(cli_codes::option_conflict, "--categorical names the target '" + c + "', which --task regress needs as numbers");
    }
    if (q.decimal_comma && q.delimiter == ',')
        fail(cli_codes::option_conflict, "--decimal-comma cannot go with --delimiter ',': a comma cannot separate both fields and decimals");
    return q;
}

// ---------------------------------------------------------------------------
// Help

inline std::string general_help();

// The "Files" paragraph of every subcommand's help that writes files;
// `extra` (wrapped lines, the last ending in ';') adds what one subcommand
// promises beyond the others.
inline std::string files_help(const std::string& extra = "") {
    std::string text = R"(Files
  Every output is checked before training: compared with the inputs and the
  other outputs by identity (symlinks, hard links and other paths to the same
  file are caught), its directory must exist and accept a new file. Outputs
  are written to temporary files and renamed into place together at the end;
  a replaced file keeps its permission bits; an output that is a symlink has
  its target replaced and the link kept. '-' and /dev/stdout write to
  standard output;)";
    if (!extra.empty()) text += " " + extra + "\n ";
    return text + R"( a FIFO or device is written directly, never replaced.
  SIGINT, SIGTERM and SIGHUP remove the temporary files and end the run by
  that signal.
)";
}

inline std::string train_help() {
    return R"(tenon train: train a multilayer perceptron on a CSV file and score it on held-out rows

Usage: tenon train --data FILE.csv --target COLUMN [options]

Data
  --data FILE.csv        CSV file with a header row (required). Column kinds are
                         inferred: numeric, date/time, or categorical. Empty
                         cells, NA, N/A, n/a, na, NaN, nan, null, NULL, none,
                         None, -, --, #N/A, missing and ? read as missing. A
                         column whose cells are numbers (or dates/times)
                         except for a few (under 10%) is taken for a numeric
                         (date/time) column with typos: the first bad cell is
                         reported. A column at least half numbers or dates
                         that stays categorical is named in a warning. The
                         delimiter and the decimal mark are told from the
                         first rows (see --delimiter).
  --target COLUMN        the column the model learns (required). Rows whose target
                         is missing are left out and counted as dropped.
  --task auto|classify|regress
                         default auto: classify when the target column is not
                         numeric, or holds 2 to 20 distinct whole numbers (class
                         codes such as 0/1) with at least 5 rows per value on
                         average, saying so in one line; regress otherwise.
                         regress turns the whole-number rule off.
  --ignore COL,COL       columns that are not features (default: none).
  --use COL,COL          keep columns that look like identifiers as features.
                         By default a column is left out, with one line naming
                         it and the reason, when nearly every value is distinct
                         (categorical, 95% of 20 or more rows), when its name
                         reads as an identifier (id, serial, uuid, guid, sn as
                         a word) and it holds more than 20 values, or when it
                         is a whole-number counter rising (or falling) on every
                         row: an identifier does not carry over to new rows.
                         A categorical column with more categories than 10% of
                         the rows gets a warning (too few rows per category).
  --categorical COL,COL  read these columns as categories (a die coded 7 or 9).
  --numeric COL,COL      read these columns as numbers; the first cell that is
                         not one is reported.
  --delimiter D          the field delimiter: , ; tab or |. Default: told from
                         the header and the first 200 rows; refused when two
                         fit.
  --decimal-comma        read 59,8 as 59.8 (not with --delimiter ,). Default:
                         on when the delimiter is not a comma and cells such
                         as 59,8 appear. Thousands separators are never read:
                         a file with 1.234,5, with both 59,8 and 3.5, or whose
                         only commas could group thousands (1,234) is refused
                         unless the decimal mark is named.

Splitting
  --split auto|random|stratified|chronological|grouped
                         default auto: stratified (each class keeps its share
                         in every subset) for classification, random for
                         regression. chronological puts the latest rows in
                         test (needs --time-column); grouped keeps each group
                         in one subset (needs --group-column).
  --time-column COL      time column for --split chronological; not a feature.
  --time-format [COL=]FORM[,...]
                         how time stamps are written: YYYY-MM-DD (ISO 8601,
                         with T or a space, Z or an offset), YYYY/MM/DD,
                         DD.MM.YYYY, DD/MM/YYYY, MM/DD/YYYY, each with an
                         optional HH:MM[:SS[.fff]], or epoch-seconds,
                         epoch-milliseconds. Default: detected per column;
                         slash dates that read both day-first and
                         month-first are refused until this option says
                         which. A bare FORM applies to every date column (an
                         epoch form to the --time-column); COL=FORM to one.
                         The model keeps each column's form and reads new
                         rows the same way.
  --time-cycles          add hour of day, day of week and day of year as
                         sine/cosine pairs for every date/time feature, and
                         for the --time-column (which gives no other feature).
  --group-column COL     group column (a machine, a batch) for --split grouped;
                         not a feature.
  --fractions TRAIN,VAL,TEST
                         default 0.7,0.15,0.15; must sum to 1. Validation rows
                         drive early stopping (VAL may be 0: then no early
                         stopping).
  --folds K              K-fold cross-validation (K >= 2) instead of one
                         holdout: reports the mean and standard deviation of
                         each test metric over the folds. Default: off.

Preparation (measured on the training rows only)
  Numeric and date/time columns: missing cells filled with the median, z-score
  scaling. Categorical columns: missing cells filled with the most frequent
  category, one-hot encoding, categories unseen in training encode as all
  zeros. A 0/1 missing-indicator feature is added for every column with missing
  cells among the training rows. Regression targets are z-scored for training;
  every reported number is in the target's original units.

Model and training
  --hidden 64,32         hidden layer widths (default 64,32); at most 65536
                         units a layer, 64 layers and 100000000 weights
                         (inputs x first width, between hidden layers, and
                         last width x outputs).
  --activation relu|leaky-relu|elu|tanh|sigmoid|softplus|gelu
                         hidden activation (default relu).
  --loss l1|l2|huber|cross-entropy
                         default cross-entropy for classification, l2 for
                         regression.
  --optimizer gd|momentum|nesterov|adam|adamw|rmsprop|adagrad
                         update rule (default adam).
  --learning-rate X      default 0.001; must be representable in single
                         precision (1.2e-38 to 3.4e38).
  --epochs N             most epochs to run (default 1000; early stopping
                         normally ends the run long before).
  --batch N              mini-batch rows (default 32); under mpirun -np P the
                         rows of each process, so P x N rows per step.
  --keep-order           take the training rows in the file's order in every
                         epoch instead of shuffling them (for rows whose order
                         matters, or to compare runs batch by batch).
  --patience N           stop after N epochs without a lower validation loss
                         and keep the best epoch's weights (default 15; 0 = run
                         all epochs). The run also waits at least 600 steps
                         after the best epoch (1200 under 100 validation
                         rows) and 1500 steps in all, so a small table is not
                         stopped after a few dozen updates.
  --ensemble K           average K networks trained from their own seeds
                         (default: 5 under 10000 training rows, else 1);
                         with --threads they train side by side.
  --seed N               seeds the split, the initial weights and the batch
                         order (default 1). The same seed and data give the
                         same metrics on every run (and under mpirun with the
                         same process count).
  --threads N            threads for training (N >= 1, default 1), each large
                         matrix product and the update split across them; the
                         results are the same bits for every N. Built with the
                         BLAS backend, each band of a product is a BLAS call
                         on one thread (the BLAS is set to one thread); the
                         bits then stay the same only where the BLAS computes
                         a band as it computes the whole product.
  --coverage P           nominal coverage of the calibration (default 0.9,
                         from 0.5 to below 1): regression gets a band
                         (split-conformal, on the validation rows) that
                         holds the true value for about P of new rows like
                         the training rows; classification gets probabilities
                         rescaled by one temperature fitted on the validation
                         rows and a set of likely classes holding the true
                         class for about P of such rows. Needs validation
                         rows (a validation fraction above 0); not with
                         --folds.

Output
  --metrics OUT.json     write the metrics as JSON: task, rows (training,
                         validation, test, dropped), epochs_run, stop_reason,
                         training_seconds (the training loop with validation;
                         reading and preparing data excluded), validation and
                         test scores (accuracy, macro_f1, log_loss; or rmse,
                         mae, r2; with calibration also interval_coverage and
                         interval_mean_width, or set_coverage, set_mean_size,
                         ece_uncalibrated and ece), the calibration and
                         per_epoch records (epoch, training_loss,
                         validation_loss, learning_rate); see the README.
  --report OUT.svg       write an SVG report: loss per epoch; for
                         classification, the test confusion matrix; with a
                         calibration, the test rows' true values against the
                         predictions with their bands (regression) or a
                         reliability diagram before and after temperature
                         scaling (classification).
  --model OUT.tnm        save the trained model (network, weights, the
                         measured preparation, the validation and test scores,
                         ranges of the training rows and a sample of them) for
                         tenon infer and tenon inspect. Not with --folds.
  --quiet                print nothing but errors.
  On a terminal the progress line is redrawn in place; otherwise one line is
  printed per epoch. A summary table follows training.

)" + files_help() + R"(
Exit status
  0 success; 2 bad command line or bad data (one line on stderr names the
  problem); 3 an output file could not be written; 1 an unexpected failure.
  On failure no --metrics, --report or --model file is created or changed.
  Under mpirun, a failure found before training (options, data, output
  paths) ends every process with a status, the failing ones printing their
  error and the others train.team.member_failed; a failure while the
  processes train ends the whole job (MPI_Abort) after the failing process
  prints its error.
)";
}

inline std::string general_help() {
    return std::string("tenon ") + tenon::version_string() +
           R"(: train neural networks on tabular data from the command line

Usage: tenon COMMAND [options]
       tenon --help | --version

Commands
  train    train a perceptron on a CSV file and score it on held-out rows
  infer    predict with a saved model, one output row per CSV row
  inspect  describe a saved model: inputs, classes, layers, scores, provenance
  retrain  continue training a saved model on new rows; replace it only if it
           scores better on new rows it did not train on
  drift    compare recent rows with the rows a saved model was trained on

Run 'tenon COMMAND --help' for a command's options and their defaults.

A typical session
  tenon train --data history.csv --target verdict --model caps.tnm
  tenon inspect --model caps.tnm
  tenon infer --model caps.tnm --data today.csv --keep id --out verdicts.csv
  tenon drift --model caps.tnm --data this_week.csv
  tenon retrain --model caps.tnm --data this_week.csv --out caps.tnm --margin 0.01

Exit status: 0 success, 2 bad command line or data, 3 output not written,
1 unexpected failure; retrain: 4 the incumbent was kept (nothing written);
drift: 5 at least one column drifted.
)";
}

// ---------------------------------------------------------------------------
// Reading and checking the data

namespace detail {

// "a, b, c", or the first 12 and the count.
inline std::string column_listing(const std::vector<std::string>& names) {
    std::string listed;
    const std::size_t shown = std::min<std::size_t>(names.size(), 12);
    for (std::size_t k = 0; k < shown; ++k) listed += (k ? ", " : "") + names[k];
    if (shown < names.size()) listed += ", ... (" + std::to_string(names.size()) + " columns)";
    return listed;
}

inline const tenon::column& named_column(const tenon::table& t, const std::string& option, const std::string& name) {
    if (!t.contains(name))
        fail(cli_codes::column_unknown, t.source() + ": " + option + " names '" + name + "', which is not a column (columns: " +
                                            column_listing(t.column_names()) + ")");
    return t.at(name);
}

// Share of the present cells of a categorical column that read as numbers.
inline double numeric_share(const tenon::column& c, bool decimal_comma) {
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
inline double datetime_share(const tenon::column& c) {
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
inline std::vector<std::string> missing_tokens() { return tenon::default_missing_tokens(); }

namespace detail {

inline std::string delimiter_text(char d) { return d == '\t' ? std::string("tab") : std::string("'") + d + "'"; }

// The trimmed header names of a CSV file read with `options`' delimiter.
inline std::vector<std::string> header_names(const std::string& path, const tenon::csv_options& options) {
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
inline tenon::csv_options data_dialect(const std::string& path, char delimiter, bool decimal_comma) {
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
        fail(cli_codes::option_conflict, "--decimal-comma: " + path + " is delimited by ','; a comma cannot separate both fields and "
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
inline tenon::table load_table(const train_request& q, std::vector<std::string>* notes = nullptr, std::ostream* warnings = nullptr) {
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
                    fail(cli_codes::column_unknown, q.data_path + ": " + (list == &q.categorical ? "--categorical" : "--numeric") + " names '" +
                                                        name + "', which is not a column (columns: " + detail::column_listing(header) + ")");
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
                const std::string what = e.what(), message = what.substr(what.find("] ") == std::string::npos ? 0 : what.find("] ") + 2);
                throw cli_failure(e.code(), message + " with --time-format DD/MM/YYYY or MM/DD/YYYY (or COLUMN=FORM)");
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

/// The decisions taken from the command line and the data.
struct training_setup {
    bool classify = false;
    split_choice split = split_choice::random;
    tenon::plan preparation;
    std::size_t target_missing = 0;
    /// One line each for the user: what was read or decided from the data.
    std::vector<std::string> notes;
};

namespace detail {

/// The whole-number rule for class codes: a numeric target whose present
/// values are 2 to 20 distinct whole numbers, with at least 5 rows per value
/// on average, holds classes (a 0/1 fault flag, a grade 1-5). Our rule of
/// thumb: a measured quantity rarely takes so few whole values, while 20 is
/// about the most classes a plant log codes by number, and fewer than 5 rows
/// per value looks like a count or a measurement rather than classes.
inline constexpr std::size_t class_code_limit = 20;
inline constexpr std::size_t rows_per_class_code = 5;

/// The distinct values (sorted) when `c` meets the rule, else empty.
inline std::vector<double> whole_number_classes(const tenon::column& c) {
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

inline bool decide_classification(const tenon::table& t, const train_request& q) {
    const tenon::column& target = detail::named_column(t, "--target", q.target);
    if (q.task == task_choice::classify) return true;
    if (q.task == task_choice::regress) return false;
    return target.kind() != tenon::column_kind::numeric || !detail::whole_number_classes(target).empty();
}

inline training_setup make_setup(const tenon::table& t, const train_request& q) {
    training_setup s;
    const tenon::column& target = detail::named_column(t, "--target", q.target);
    for (const auto& c : q.ignored) detail::named_column(t, "--ignore", c);
    for (const auto& c : q.used) detail::named_column(t, "--use", c);
    if (!q.time_column.empty()) {
        const auto& c = detail::named_column(t, "--time-column", q.time_column);
        if (c.kind() == tenon::column_kind::categorical)
            fail(cli_codes::option_value, q.data_path + ": --time-column '" + q.time_column + "' holds text such as '" +
                                              (c.categories().empty() ? std::string() : c.categories().front()) +
                                              "', not numbers or dates");
    }
    if (!q.group_column.empty()) detail::named_column(t, "--group-column", q.group_column);
    {
        // Named here in column terms; later it would surface as a layer with 0 inputs.
        std::size_t inputs = 0;
        for (const auto& name : t.column_names())
            if (name != q.target && name != q.group_column && std::find(q.ignored.begin(), q.ignored.end(), name) == q.ignored.end()) ++inputs;
        if (inputs == 0)
            fail(cli_codes::option_conflict, q.data_path + ": no input column is left: the columns are " + detail::column_listing(t.column_names()) +
                                                 ", of which '" + q.target + "' is the target and the others are ignored or the group column");
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
        fail(cli_codes::option_value, q.data_path + ": the target '" + q.target + "' is " + tenon::to_string(target.kind()) +
                                          "; regression needs a numeric target");

    s.target_missing = target.missing_count();
    if (s.target_missing == t.row_count())
        fail(cli_codes::data_empty, q.data_path + ": every row's target '" + q.target + "' is missing");
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
            fail(cli_codes::target_single_class, q.data_path + ": the target '" + q.target + "' has a single class ('" + first + "') in all " +
                                                     std::to_string(t.row_count() - s.target_missing) +
                                                     " rows with a target; classification needs at least 2");
    }
    if (q.loss_given && s.classify != (q.loss == tenon::loss_kind::cross_entropy))
        fail(cli_codes::option_conflict, std::string("--loss ") + tenon::loss_kind_name(q.loss) + " does not fit a " +
                                             (s.classify ? "classification target (use cross-entropy)" : "regression target (use l1, l2 or huber)"));

    s.split = q.split;
    if (s.split == split_choice::automatic) s.split = s.classify ? split_choice::stratified : split_choice::random;
    if (s.split == split_choice::stratified && !s.classify)
        fail(cli_codes::option_conflict, "--split stratified needs a classification target; '" + q.target + "' is regressed");

    s.preparation.set_target(q.target, s.classify ? tenon::target_kind::classification : tenon::target_kind::regression);
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
            s.notes.push_back("warning: '" + f.column + "' has " + f.explanation() + " (more categories than 10% of the rows); --ignore " +
                              f.column + " leaves it out");
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
inline void indicators_for_every_fold(const tenon::table& t, tenon::plan& preparation) {
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
inline void choose_time_cycles(const tenon::table& t, tenon::plan& preparation) {
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

inline std::vector<double> column_times(const tenon::table& t, const std::string& name) {
    const tenon::column& c = t.at(name);
    std::vector<double> times(t.row_count());
    for (std::size_t r = 0; r < times.size(); ++r)
        times[r] = c.is_missing(r) ? std::numeric_limits<double>::quiet_NaN() : c.number(r);
    return times;
}

// The text of class `code` of dense_codes(c, true): its category, its
// number, or "(missing)".
inline std::string class_label(const tenon::column& c, std::uint32_t code) {
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
        std::string m = e.what();
        m.erase(0, m.find("] ") + 2);
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
inline void check_network_size(const tenon::table& t, const train_request& q, const training_setup& s, const std::vector<std::size_t>& rows) {
    const tenon::measured_plan p = s.preparation.measure(t, rows);
    const std::size_t inputs = p.feature_count();
    if (inputs == 0)  // named here in column terms; later it would be a layer of 0 inputs
        fail(cli_codes::option_conflict, q.data_path + ": no input column is left: the columns are " + column_listing(t.column_names()) + ", of which '" +
                                             q.target + "' is the target and the others are ignored, the group column or left out (the notes say "
                                             "why; --use NAME keeps a column)");
    const std::size_t outputs = s.classify ? std::max<std::size_t>(p.class_count(), 1) : 1;
    // Widths are at most 2^16 (max_hidden_width), features far below 2^40: no product overflows.
    std::uint64_t weights = 0, width = inputs;
    std::string hidden = q.hidden.empty() ? std::string("none") : std::string();
    for (const std::size_t h : q.hidden) hidden += (hidden.empty() ? "" : ",") + std::to_string(h);
    for (const std::size_t h : q.hidden) {
        weights += width * h;
        width = h;
    }
    weights += width * outputs;
    if (!s.classify) weights += inputs * outputs;  // the linear path beside the hidden layers (regression)
    // Every member of a seed ensemble holds as many.
    tenon::model_settings members;
    members.ensemble = q.ensemble;
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
    for (std::size_t k = 0; k < widest.size() && k < 3; ++k)
        columns += (k ? ", '" : "'") + widest[k].second + "' " + std::to_string(widest[k].first);
    fail(cli_codes::option_value, q.data_path + ": " + std::to_string(inputs) + " input features (the widest: " + columns + "), hidden layers " +
                                      hidden + " and " + std::to_string(outputs) + " outputs make " + std::to_string(weights) +
                                      " weights (every network of the ensemble counted), above the limit of " + std::to_string(max_hidden_weights) +
                                      " (give narrower --hidden widths, --ensemble 1, or --ignore the wide columns)");
}

}  // namespace detail

/// The holdout the tool trains, validates and tests on.
inline tenon::holdout_split make_holdout(const tenon::table& t, const train_request& q, const training_setup& s) {
    switch (s.split) {
        case split_choice::stratified:
            return detail::naming_classes(t, q.target, [&] {
                return tenon::stratified_holdout(tenon::dense_codes(t.at(q.target), true), q.fractions, q.seed);
            });
        case split_choice::chronological:
            return tenon::chronological_holdout(detail::column_times(t, q.time_column), q.fractions);
        case split_choice::grouped:
            return tenon::grouped_holdout(tenon::dense_codes(t.at(q.group_column), true), q.fractions, q.seed);
        case split_choice::random:
        case split_choice::automatic: break;
    }
    return tenon::random_holdout(t.row_count(), q.fractions, q.seed);
}

/// Folds for --folds K. Chronological folds walk forward in time: each fold
/// trains on everything before its test block.
inline std::vector<tenon::fold> make_folds(const tenon::table& t, const train_request& q, const training_setup& s) {
    switch (s.split) {
        case split_choice::stratified:
            return detail::naming_classes(t, q.target, [&] { return tenon::stratified_k_folds(tenon::dense_codes(t.at(q.target), true), q.folds, q.seed); });
        case split_choice::chronological: {
            const std::size_t horizon = std::max<std::size_t>(1, t.row_count() / (q.folds + 1));
            return tenon::rolling_origin_folds(detail::column_times(t, q.time_column), q.folds, horizon);
        }
        case split_choice::grouped: return tenon::group_k_folds(tenon::dense_codes(t.at(q.group_column), true), q.folds, q.seed);
        case split_choice::random:
        case split_choice::automatic: break;
    }
    return tenon::k_folds(t.row_count(), q.folds, q.seed);
}

inline tenon::model_settings make_settings(const train_request& q) {
    tenon::model_settings m;
    m.hidden = q.hidden;
    m.hidden_activation = q.hidden_activation;
    m.loss_given = q.loss_given;
    m.loss = q.loss;
    m.update = q.update;
    m.learning_rate = q.learning_rate;
    m.epochs = q.epochs;
    m.batch_size = q.batch;
    m.patience = q.patience;
    m.ensemble = q.ensemble;
    m.seed = q.seed;
    m.threads = q.threads;
    m.shuffle = !q.keep_order;
    // With the BLAS backend tenon's threads split the products into bands
    // and each band is a BLAS call, so the BLAS runs on one thread (its own
    // threads would compete with tenon's for the cores; a BLAS without such
    // a call keeps its own setting, e.g. from its environment).
    if (tenon::active_kernel_path() == tenon::kernel_path::blas) tenon::set_blas_threads(1);
    return m;
}

// ---------------------------------------------------------------------------
// Output files: written beside the destination, renamed into place on success

}  // namespace tenon_cli

#include "cli_files.hpp"  // pending_output, input checks, identities, signals

namespace tenon_cli {

using files::pending_output;

// ---------------------------------------------------------------------------
// A small JSON writer (RFC 8259: strings escaped per section 7; numbers must
// be finite per section 6, so NaN and infinities are written as null).

class json_writer {
public:
    json_writer& open_object(const char* key = nullptr) { return open(key, '{'); }
    json_writer& open_array(const char* key = nullptr) { return open(key, '['); }
    json_writer& close_object() { return close('}'); }
    json_writer& close_array() { return close(']'); }

    json_writer& text(const char* key, const std::string& value) {
        member(key);
        quoted(value);
        return *this;
    }
    json_writer& number(const char* key, double value) {
        member(key);
        if (!std::isfinite(value)) {
            out_ += "null";
            return *this;
        }
        char buffer[64];
        const auto r = std::to_chars(buffer, buffer + sizeof buffer, value);  // shortest text that reads back exactly
        out_.append(buffer, r.ptr);
        return *this;
    }
    json_writer& count(const char* key, std::uint64_t value) {
        member(key);
        out_ += std::to_string(value);
        return *this;
    }
    json_writer& boolean(const char* key, bool value) {
        member(key);
        out_ += value ? "true" : "false";
        return *this;
    }
    json_writer& null(const char* key) {
        member(key);
        out_ += "null";
        return *this;
    }
    const std::string& str() const noexcept { return out_; }
    std::string finish() {
        out_ += '\n';
        return out_;
    }

    /// Length of the well-formed UTF-8 sequence at s[i] (RFC 3629 section 4:
    /// no overlong forms, no surrogates, nothing above U+10FFFF), or 0.
    static std::size_t utf8_length(const std::string& s, std::size_t i) {
        const auto b = [&](std::size_t k) { return i + k < s.size() ? static_cast<unsigned char>(s[i + k]) : 0u; };
        const unsigned c = b(0);
        const auto tail = [&](std::size_t k) { return (b(k) & 0xC0u) == 0x80u; };
        if (c < 0x80) return 1;
        if (c >= 0xC2 && c <= 0xDF) return tail(1) ? 2 : 0;
        if (c >= 0xE0 && c <= 0xEF) {
            const unsigned lo = c == 0xE0 ? 0xA0 : 0x80, hi = c == 0xED ? 0x9F : 0xBF;
            return b(1) >= lo && b(1) <= hi && tail(2) ? 3 : 0;
        }
        if (c >= 0xF0 && c <= 0xF4) {
            const unsigned lo = c == 0xF0 ? 0x90 : 0x80, hi = c == 0xF4 ? 0x8F : 0xBF;
            return b(1) >= lo && b(1) <= hi && tail(2) && tail(3) ? 4 : 0;
        }
        return 0;
    }

    /// JSON string contents (RFC 8259 section 7). Bytes that are not
    /// well-formed UTF-8 (a model's category read from a Latin-1 file, say)
    /// become U+FFFD, the replacement character, so the output is valid JSON.
    static std::string escape(const std::string& s) {
        std::string out;
        for (std::size_t i = 0; i < s.size(); ++i) {
            const char ch = s[i];
            const auto c = static_cast<unsigned char>(ch);
            if (c >= 0x80) {
                const std::size_t n = utf8_length(s, i);
                if (n == 0) {
                    out += "\\ufffd";
                } else {
                    out.append(s, i, n);
                    i += n - 1;
                }
                continue;
            }
            switch (c) {
                case '"': out += "\\\""; break;
                case '\\': out += "\\\\"; break;
                case '\b': out += "\\b"; break;
                case '\f': out += "\\f"; break;
                case '\n': out += "\\n"; break;
                case '\r': out += "\\r"; break;
                case '\t': out += "\\t"; break;
                default:
                    if (c < 0x20) {
                        char u[8];
                        std::snprintf(u, sizeof u, "\\u%04x", static_cast<unsigned>(c));
                        out += u;
                    } else {
                        out += ch;
                    }
            }
        }
        return out;
    }

private:
    json_writer& open(const char* key, char bracket) {
        member(key);
        out_ += bracket;
        first_.push_back(true);
        return *this;
    }
    json_writer& close(char bracket) {
        const bool empty = first_.back();
        first_.pop_back();
        if (!empty) newline();
        out_ += bracket;
        return *this;
    }
    void newline() {
        out_ += '\n';
        out_.append(2 * first_.size(), ' ');
    }
    void member(const char* key) {
        if (!first_.empty()) {
            if (!first_.back()) out_ += ',';
            first_.back() = false;
            newline();
        }
        if (key) {
            quoted(key);
            out_ += ": ";
        }
    }
    void quoted(const std::string& s) {
        out_ += '"';
        out_ += escape(s);
        out_ += '"';
    }

    std::string out_;
    std::vector<bool> first_;
};

// ---------------------------------------------------------------------------
// Progress

namespace detail {

// A number for a table cell or a summary line, at most about a dozen
// characters wide: fixed-point below a million in magnitude, scientific
// notation above (a value near 3.4e38 would otherwise print 39 digits and
// run into the next column).
inline std::string fixed(double v, int decimals) {
    if (!std::isfinite(v)) return "-";
    char buffer[64];
    if (std::fabs(v) >= 1e6) std::snprintf(buffer, sizeof buffer, "%.*e", std::min(decimals, 3), v);
    else std::snprintf(buffer, sizeof buffer, "%.*f", decimals, v);
    return buffer;
}

inline std::string duration_text(double seconds) {
    if (!std::isfinite(seconds) || seconds < 0) return "?";
    if (seconds < 60) return fixed(seconds, 1) + "s";
    const auto whole = static_cast<long long>(seconds + 0.5);
    if (whole < 3600) return std::to_string(whole / 60) + "m" + (whole % 60 < 10 ? "0" : "") + std::to_string(whole % 60) + "s";
    return std::to_string(whole / 3600) + "h" + (whole / 60 % 60 < 10 ? "0" : "") + std::to_string(whole / 60 % 60) + "m";
}

inline double steady_seconds() {
    return std::chrono::duration<double>(std::chrono::steady_clock::now().time_since_epoch()).count();
}

}  // namespace detail

/// Prints training progress. On a terminal one status line is redrawn in
/// place:
///   fold 2 of 5 | epoch  17 of 200 <######:..............> training loss 0.4132 | validation accuracy 0.9120 | 3.2s, <= 41.0s more
/// The gauge counts the epoch budget: '#' done, ':' the running epoch, '.'
/// to come; the remaining time assumes every epoch up to the limit runs
/// (early stopping can only shorten it, hence "<="). Elsewhere (a file, a
/// pipe) it prints one plain line per finished epoch:
///   epoch 17 of 200 | training loss 0.41320 | validation loss 0.39811 | validation accuracy 0.9120 | elapsed 3.2s
class progress_printer {
public:
    progress_printer(std::ostream& out, bool terminal, bool quiet, std::size_t epochs, std::function<double()> clock)
        : out_(out), terminal_(terminal), quiet_(quiet), epochs_(epochs), clock_(std::move(clock)) {
        if (!clock_) clock_ = detail::steady_seconds;
    }

    progress_printer(const progress_printer&) = delete;
    progress_printer& operator=(const progress_printer&) = delete;
    // Ends a status line left open by a failure, so the error starts on its own line.
    ~progress_printer() { finish(); }

    /// Starts a run (one holdout, or one fold of `folds`).
    void start(std::size_t fold, std::size_t folds, bool classify, double metric_scale) {
        fold_ = fold;
        folds_ = folds;
        classify_ = classify;
        metric_scale_ = metric_scale;
        start_ = clock_();
        last_draw_ = -1.0;
        done_epochs_ = 0;
        last_line_ = 0;
        loss_ = validation_metric_ = std::numeric_limits<double>::quiet_NaN();
    }

    void on_batch(const tenon::batch_progress& b) {
        if (quiet_ || !terminal_) return;
        const double now = clock_();
        loss_ = b.loss;
        if (last_draw_ >= 0 && now - last_draw_ < 0.1 && b.batch != b.batches) return;  // at most ten redraws a second
        last_draw_ = now;
        draw(b.epoch - 1, static_cast<double>(b.batch) / static_cast<double>(b.batches), now - start_);
    }

    void on_epoch(const tenon::epoch_summary& e) {
        done_epochs_ = e.epoch;
        loss_ = e.training_loss;
        validation_metric_ = classify_ ? e.validation_metric : e.validation_metric * metric_scale_;
        if (quiet_) return;
        const double elapsed = clock_() - start_;
        if (terminal_) {
            last_draw_ = clock_();
            draw(e.epoch, 0.0, elapsed);
            return;
        }
        // Our own layout: spelled-out fields separated by " | ".
        std::string line = prefix() + "epoch " + std::to_string(e.epoch) + " of " + std::to_string(epochs_) + " | training loss " +
                           detail::fixed(e.training_loss, 5);
        if (std::isfinite(e.validation_loss)) {
            line += " | validation loss " + detail::fixed(e.validation_loss, 5);
            line += classify_ ? " | validation accuracy " + detail::fixed(validation_metric_, 4)
                              : (metric_scale_ > 0 ? " | validation RMSE " + detail::fixed(validation_metric_, 4) : std::string());
        }
        line += " | elapsed " + detail::duration_text(elapsed);
        out_ << line << '\n';
    }

    /// Ends the status line of a run on a terminal.
    void finish() {
        if (quiet_ || !terminal_ || last_line_ == 0) return;
        out_ << '\n';
        out_.flush();
        last_line_ = 0;
    }

private:
    std::string prefix() const {
        return folds_ > 0 ? "fold " + std::to_string(fold_) + " of " + std::to_string(folds_) + " | " : std::string();
    }

    void draw(std::size_t epochs_done, double within_epoch, double elapsed) {
        const std::size_t width = 22;
        const double done = (static_cast<double>(epochs_done) + within_epoch) / static_cast<double>(epochs_);
        const auto full = static_cast<std::size_t>(std::floor(done * static_cast<double>(width)));
        std::string gauge(width, '.');
        for (std::size_t k = 0; k < std::min(full, width); ++k) gauge[k] = '#';
        if (full < width && within_epoch > 0) gauge[full] = ':';
        std::string epoch_text = std::to_string(std::min(epochs_done + (within_epoch > 0 ? 1 : 0), epochs_));
        const std::string limit = std::to_string(epochs_);
        epoch_text.insert(0, limit.size() > epoch_text.size() ? limit.size() - epoch_text.size() : 0, ' ');
        std::string line = prefix() + "epoch " + epoch_text + " of " + limit + " <" + gauge + "> training loss " + detail::fixed(loss_, 4);
        if (std::isfinite(validation_metric_))
            line += classify_ ? " | validation accuracy " + detail::fixed(validation_metric_, 4) : " | validation RMSE " + detail::fixed(validation_metric_, 4);
        const double progress = static_cast<double>(epochs_done) + within_epoch;
        const double remaining = progress > 0 ? elapsed / progress * (static_cast<double>(epochs_) - progress) : NAN;
        line += " | " + detail::duration_text(elapsed) + ", <= " + detail::duration_text(remaining) + " more";
        const std::size_t shown = line.size();
        if (shown < last_line_) line.append(last_line_ - shown, ' ');  // wipe the tail of a longer previous line
        out_ << '\r' << line;
        out_.flush();
        last_line_ = shown;
    }

    std::ostream& out_;
    bool terminal_, quiet_;
    std::size_t epochs_;
    std::function<double()> clock_;
    std::size_t fold_ = 0, folds_ = 0;
    bool classify_ = false;
    double metric_scale_ = 1.0;
    double start_ = 0, last_draw_ = -1;
    std::size_t done_epochs_ = 0, last_line_ = 0;
    double loss_ = NAN, validation_metric_ = NAN;
};

// ---------------------------------------------------------------------------
// `tenon train`

namespace detail {

// A message on one line: control characters (a CR, LF, tab, NUL or other
// byte below 0x20, or DEL, e.g. from a cell's text) are written as escapes
// (\n, \r, \t, \0, \xNN), so the line stays one line and shows what was there.
inline std::string one_line(const std::string& s) { return tenon::escape_control_characters(s); }

// The one line the tool prints for a failure of `command`, and its exit status.
inline std::string failure_text(const std::string& command, const std::exception_ptr& failure, int& status) {
    try {
        std::rethrow_exception(failure);
    } catch (const cli_failure& e) {
        status = e.exit_status();
        return command + ": error: " + one_line(e.what());
    } catch (const tenon::error& e) {
        status = exit_bad_input;
        return command + ": error: " + one_line(e.what());
    } catch (const std::bad_alloc& e) {  // also std::bad_array_new_length
        status = exit_unexpected;
        return command + ": error: out of memory (" + one_line(e.what()) +
               "): the run needs more memory than the system allows it; a smaller network (--hidden) or fewer rows or columns needs less";
    } catch (const std::exception& e) {
        status = exit_unexpected;
        return command + ": unexpected failure: " + one_line(e.what());
    } catch (...) {
        status = exit_unexpected;
        return command + ": unexpected failure";
    }
}

// Under mpirun: runs `train` (the members' collective calls), and ends the
// whole job when it fails on this member, since the other members may be
// waiting for it inside a collective call (cli_environment::end_job).
template <class Training>
auto while_members_train(const cli_environment& env, Training&& train) -> decltype(train()) {
    if (!env.team || !env.end_job) return train();
    try {
        return train();
    } catch (...) {
        int status = exit_unexpected;
        const std::string line = failure_text("tenon train", std::current_exception(), status);
        env.end_job(line, status);
        throw;  // end_job does not return; in case a host's does
    }
}

// This member's share of `rows` under a team: rows[k], rows[k + P], ... for
// member k of P (round robin, as tenon::deal_rows deals them).
inline std::vector<std::size_t> member_share(const std::vector<std::size_t>& rows, const tenon::training_team& team) {
    std::vector<std::size_t> mine;
    mine.reserve(rows.size() / team.member_count() + 1);
    for (std::size_t i = team.member_index(); i < rows.size(); i += team.member_count()) mine.push_back(rows[i]);
    return mine;
}

inline void write_scores(json_writer& j, const char* key, const tenon::evaluation& e, const tenon::calibration_scores* c = nullptr) {
    j.open_object(key);
    j.count("rows", e.rows);
    if (e.classification) {
        j.number("accuracy", e.accuracy).number("macro_f1", e.macro_f1).number("log_loss", e.log_loss);
        if (c) {
            j.number("set_coverage", c->set_coverage).number("set_mean_size", c->set_mean_size);
            j.number("ece_uncalibrated", c->ece_uncalibrated).number("ece", c->ece);
            j.number("log_loss_calibrated", c->log_loss);
        }
    } else {
        j.number("rmse", e.rmse).number("mae", e.mae).number("r2", e.r2);
        if (c) j.number("interval_coverage", c->interval_coverage).number("interval_mean_width", c->interval_mean_width);
    }
    j.close_object();
}

// The calibration as stored in the model file.
inline void write_calibration(json_writer& j, const char* key, const tenon::model_calibration& c) {
    j.open_object(key);
    if (c.interval) {
        const tenon::interval_calibration& i = *c.interval;
        j.open_object("band");
        j.text("method", i.has_spread ? "split-conformal, normalized by the spread" : "split-conformal");
        j.number("coverage", i.coverage).count("rows", i.rows);
        if (std::isfinite(i.half_width)) j.number("half_width", i.half_width);
        else j.null("half_width");
        j.close_object();
    }
    if (c.classes) {
        const tenon::class_calibration& k = *c.classes;
        j.open_object("classes");
        j.text("method", "temperature scaling, conformal class sets (score 1 - p)");
        j.number("coverage", k.coverage).count("rows", k.rows).number("temperature", k.temperature);
        if (std::isfinite(k.set_threshold)) j.number("set_threshold", k.set_threshold);
        else j.null("set_threshold");
        j.close_object();
    }
    j.close_object();
}

// A line saying what the calibration promises, or why there is none.
inline std::string calibration_note(const tenon::model_calibration* c, double coverage, bool classify) {
    if (!c) return "no calibration: there are no validation rows to calibrate on\n";
    const std::string percent = fixed(100.0 * coverage, 1) + "%";
    if (classify)
        return "calibration: temperature " + fixed(c->classes->temperature, 4) + "; class sets meant to hold the true class for " + percent +
               " of new rows" + (std::isfinite(c->classes->set_threshold) ? std::string() : " (too few validation rows: every class is listed)") + "\n";
    char width[32];
    if (c->interval->has_spread && std::isfinite(c->interval->spread_quantile)) {
        char floor[32];
        std::snprintf(width, sizeof width, "%.6g", c->interval->spread_quantile);
        std::snprintf(floor, sizeof floor, "%.3g", c->interval->spread_floor);
        return "calibration: band of +-" + std::string(width) + " x (the networks' spread on the row + " + floor +
               ") meant to hold the true value for " + percent + " of new rows\n";
    }
    std::snprintf(width, sizeof width, "%.6g", c->interval->half_width);
    return "calibration: band of +-" + (std::isfinite(c->interval->half_width) ? std::string(width) : std::string("infinity")) +
           " meant to hold the true value for " + percent + " of new rows" +
           (std::isfinite(c->interval->half_width) ? std::string() : " (too few validation rows for this coverage)") + "\n";
}

inline std::string table_row(const std::string& name, const std::vector<std::string>& cells) {
    char buffer[32];
    std::snprintf(buffer, sizeof buffer, "  %-12s", name.c_str());
    std::string line = buffer;
    for (const auto& c : cells) {
        std::snprintf(buffer, sizeof buffer, "%14s", c.c_str());
        line += buffer;
    }
    return line + "\n";
}

inline std::string split_name(split_choice s) {
    switch (s) {
        case split_choice::random: return "random";
        case split_choice::stratified: return "stratified";
        case split_choice::chronological: return "chronological";
        case split_choice::grouped: return "grouped";
        case split_choice::automatic: break;
    }
    return "auto";
}

inline void header_fields(json_writer& j, const train_request& q, const training_setup& s) {
    j.text("tool", std::string("tenon ") + tenon::version_string() + " train");
    j.text("data", q.data_path);
    j.text("target", q.target);
    j.text("task", s.classify ? "classification" : "regression");
    j.text("split", split_name(s.split));
    j.count("seed", q.seed);
}

// "[code] message" -> "message".
inline std::string strip_code(const std::string& what) {
    if (!what.empty() && what[0] == '[') {
        const auto end = what.find("] ");
        if (end != std::string::npos) return what.substr(end + 2);
    }
    return what;
}

// The scores and the command line's choices that make_model_file cannot know.
inline void add_scores_to_metadata(tenon::training_metadata& meta, const train_request& q, const training_setup& s,
                                   const tenon::evaluation* validation, const tenon::evaluation& test) {
    const auto add = [&meta](const std::string& prefix, const tenon::evaluation& e) {
        meta.metrics.emplace_back(prefix + "_rows", static_cast<double>(e.rows));
        if (e.classification) {
            meta.metrics.emplace_back(prefix + "_accuracy", e.accuracy);
            meta.metrics.emplace_back(prefix + "_macro_f1", e.macro_f1);
            meta.metrics.emplace_back(prefix + "_log_loss", e.log_loss);
        } else {
            meta.metrics.emplace_back(prefix + "_rmse", e.rmse);
            meta.metrics.emplace_back(prefix + "_mae", e.mae);
            meta.metrics.emplace_back(prefix + "_r2", e.r2);
        }
    };
    if (validation) add("validation", *validation);
    add("test", test);
    meta.settings.emplace_back("data", std::filesystem::path(q.data_path).filename().string());
    meta.settings.emplace_back("target", q.target);
    meta.settings.emplace_back("task", s.classify ? "classification" : "regression");
    meta.settings.emplace_back("split", split_name(s.split));
    meta.settings.emplace_back("fractions", tenon::number_to_text(q.fractions.train) + "," + tenon::number_to_text(q.fractions.validation) + "," +
                                                tenon::number_to_text(q.fractions.test));
}

// The calibration's test scores, kept with the model for inspect.
inline void add_calibration_to_metadata(tenon::training_metadata& meta, const tenon::calibration_scores& c) {
    if (c.classification) {
        meta.metrics.emplace_back("test_set_coverage", c.set_coverage);
        meta.metrics.emplace_back("test_set_mean_size", c.set_mean_size);
        meta.metrics.emplace_back("test_ece_uncalibrated", c.ece_uncalibrated);
        meta.metrics.emplace_back("test_ece", c.ece);
    } else {
        meta.metrics.emplace_back("test_interval_coverage", c.interval_coverage);
        meta.metrics.emplace_back("test_interval_mean_width", c.interval_mean_width);
    }
}

// Holdout run.
inline int train_holdout(const tenon::table& t, const train_request& q, training_setup& s, std::ostream& out,
                         const cli_environment& env, pending_output& metrics_file, pending_output& report_file,
                         pending_output& model_probe) {
    const tenon::holdout_split split = make_holdout(t, q, s);
    if (q.time_cycles) choose_time_cycles(t, s.preparation);
    check_network_size(t, q, s, split.train);

    // The validation metric is RMSE in prepared units; the target's z-score
    // spread turns it back into the target's units for display.
    double metric_scale = 1.0;
    if (!s.classify) {
        const tenon::scaling ts = s.preparation.measure(t, split.train).target_scaling();
        metric_scale = std::abs(ts.inverse(1.0) - ts.inverse(0.0));
    }
    progress_printer progress(out, env.terminal, q.quiet, q.epochs, env.clock);
    progress.start(0, 0, s.classify, metric_scale);
    tenon::model_settings settings = make_settings(q);
    settings.team = env.team;
    settings.on_epoch = [&](const tenon::epoch_summary& e) {
        progress.on_epoch(e);
        return true;
    };
    settings.on_batch = [&](const tenon::batch_progress& b) { progress.on_batch(b); };
    // A team's members each prepare and hold only their share of the rows;
    // the plan is measured over all shares (cli_environment::team).
    std::vector<std::size_t> train_rows, validation_rows;
    if (env.team) {
        settings.member_rows = tenon::team_rows::shard_per_member;
        settings.exchange = env.exchange;
        train_rows = member_share(split.train, *env.team);
        validation_rows = member_share(split.validation, *env.team);
    }
    tenon::fitted_model<float> model = while_members_train(env, [&] {
        return tenon::fit_model<float>(t, s.preparation, env.team ? train_rows : split.train, env.team ? validation_rows : split.validation,
                                       settings);
    });
    progress.finish();
    if (env.team && env.team->member_index() != 0) return exit_success;  // member 0 alone scores, writes and prints

    tenon::evaluation validation;
    const bool has_validation = model.validation_rows > 0;
    if (has_validation) validation = tenon::evaluate_model(model, t, split.validation);
    const tenon::evaluation test = tenon::evaluate_model(model, t, split.test);
    // Calibrated on the validation rows, scored on the test rows (neither trained on).
    std::optional<tenon::model_calibration> calibration;
    tenon::calibration_scores calibrated;
    if (has_validation) {
        calibration = tenon::calibrate_model(model, t, split.validation, q.coverage);
        calibrated = tenon::score_calibration(model, *calibration, t, split.test);
    }
    const std::size_t dropped = model.dropped_rows + test.dropped_rows;
    const tenon::training_outcome& o = model.outcome;
    // The plain baseline on the same rows (fit_model fits it; in a team it has none).
    const bool has_baseline = model.baseline.features > 0;
    tenon::evaluation baseline_validation, baseline_test;
    if (has_baseline && has_validation) baseline_validation = tenon::evaluate_baseline(model, t, split.validation);
    if (has_baseline) baseline_test = tenon::evaluate_baseline(model, t, split.test);
    const char* baseline_kind = s.classify ? "logistic regression" : "ridge least squares";

    if (metrics_file.active()) {
        json_writer j;
        j.open_object();
        header_fields(j, q, s);
        j.open_object("rows").count("total", t.row_count()).count("training", model.train_rows).count("validation", model.validation_rows);
        j.count("test", test.rows).count("dropped", dropped).close_object();
        j.count("features", model.plan.feature_count());
        if (s.classify) {
            j.open_array("classes");
            for (const auto& c : model.plan.class_names()) j.text(nullptr, c);
            j.close_array();
        }
        j.count("ensemble", model.member_count());
        j.count("epochs_run", o.history.size());
        j.count("best_epoch", o.best_epoch);
        j.text("stop_reason", tenon::stop_reason_name(o.reason));
        j.number("training_seconds", o.seconds);
        if (has_validation) write_scores(j, "validation", validation);
        else j.null("validation");
        write_scores(j, "test", test, calibration ? &calibrated : nullptr);
        if (has_baseline) {
            j.open_object("baseline").text("kind", baseline_kind);
            if (has_validation) write_scores(j, "validation", baseline_validation);
            else j.null("validation");
            write_scores(j, "test", baseline_test);
            j.close_object();
        } else {
            j.null("baseline");
        }
        j.text("shipped", model.kept_baseline ? "baseline" : "network");
        if (calibration) write_calibration(j, "calibration", *calibration);
        else j.null("calibration");
        j.open_array("per_epoch");
        for (const auto& e : o.history) {
            j.open_object().count("epoch", e.epoch).number("training_loss", e.training_loss).number("validation_loss", e.validation_loss);
            j.number("learning_rate", e.learning_rate).close_object();
        }
        j.close_array();
        j.close_object();
        metrics_file.write(j.finish());
    }
    if (report_file.active()) {
        tenon::report_content r;
        r.title = "tenon train: " + q.target + " from " + std::filesystem::path(q.data_path).filename().string() + " (" +
                  (s.classify ? "classification, test accuracy " + fixed(test.accuracy, 4) : "regression, test RMSE " + fixed(test.rmse, 4)) + ")";
        for (const auto& e : o.history) r.epochs.push_back({e.training_loss, e.validation_loss});
        r.kept_epoch = o.best_epoch;
        if (s.classify) {
            r.confusion = &test.classes.confusion;
            r.class_names = model.plan.class_names();
        }
        if (calibration) {
            r.nominal_coverage = q.coverage;
            r.test_coverage = s.classify ? calibrated.set_coverage : calibrated.interval_coverage;
            r.reliability_raw = calibrated.reliability_uncalibrated;
            r.reliability_calibrated = calibrated.reliability;
            for (std::size_t i = 0; i < calibrated.predicted.size(); ++i)
                r.bands.push_back({calibrated.predicted[i], calibrated.actual[i], calibrated.low[i], calibrated.high[i]});
        }
        report_file.write(tenon::training_report_svg(r));
    }
    if (model_probe.active()) {
        tenon::model_file<float> file = tenon::make_model_file(model, t, split.train, settings);
        add_scores_to_metadata(*file.metadata, q, s, has_validation ? &validation : nullptr, test);
        if (calibration) {
            file.calibration = calibration;
            add_calibration_to_metadata(*file.metadata, calibrated);
        }
        model_probe.write(tenon::model_file_to_bytes(file));
    }
    // Everything is written and synced before the first file is moved into
    // place (files::commit_all); nothing the run did not create is removed.
    files::commit_all({&model_probe, &metrics_file, &report_file});

    if (!q.quiet) {
        std::string summary = "\n" + table_row("scores", {"validation", "test"});
        summary += table_row("rows", {has_validation ? std::to_string(validation.rows) : "-", std::to_string(test.rows)});
        auto both = [&](const char* name, double tenon::evaluation::*field, int decimals) {
            summary += table_row(name, {has_validation ? fixed(validation.*field, decimals) : "-", fixed(test.*field, decimals)});
        };
        if (s.classify) {
            both("accuracy", &tenon::evaluation::accuracy, 4);
            both("macro F1", &tenon::evaluation::macro_f1, 4);
            both("log loss", &tenon::evaluation::log_loss, 4);
        } else {
            both("RMSE", &tenon::evaluation::rmse, 4);
            both("MAE", &tenon::evaluation::mae, 4);
            both("R^2", &tenon::evaluation::r2, 4);
        }
        if (calibration) {
            if (s.classify) {
                summary += table_row("set cover", {"-", fixed(calibrated.set_coverage, 4)});
                summary += table_row("set size", {"-", fixed(calibrated.set_mean_size, 4)});
                summary += table_row("ECE raw", {"-", fixed(calibrated.ece_uncalibrated, 4)});
                summary += table_row("ECE", {"-", fixed(calibrated.ece, 4)});
            } else {
                summary += table_row("band cover", {"-", fixed(calibrated.interval_coverage, 4)});
                summary += table_row("band width", {"-", fixed(calibrated.interval_mean_width, 4)});
            }
        }
        if (has_baseline) {
            summary += "\nbaseline (" + std::string(baseline_kind) + "): " +
                       (s.classify ? "accuracy " + (has_validation ? fixed(baseline_validation.accuracy, 4) + " validation, " : std::string()) +
                                         fixed(baseline_test.accuracy, 4) + " test"
                                   : "RMSE " + (has_validation ? fixed(baseline_validation.rmse, 4) + " validation, " : std::string()) +
                                         fixed(baseline_test.rmse, 4) + " test") + "\n";
            if (model.kept_baseline)
                summary += "the network did not beat the baseline on validation; the model is the baseline\n";
        }
        summary += "\n" + std::to_string(o.history.size()) + " epochs in " + duration_text(o.seconds) + "; " + o.message +
                   (o.best_epoch > 0 && o.reason != tenon::stop_reason::no_improvement ? "; kept epoch " + std::to_string(o.best_epoch) : std::string()) + "\n";
        summary += calibration_note(calibration ? &*calibration : nullptr, q.coverage, s.classify);
        summary += std::to_string(model.train_rows) + " training rows, " + std::to_string(model.plan.feature_count()) + " features" +
                   (model.member_count() > 1 ? ", an ensemble of " + std::to_string(model.member_count()) + " networks (the epochs are the first's)"
                                             : std::string()) +
                   (dropped ? ", " + std::to_string(dropped) + " rows dropped for a missing target" : std::string()) + "\n";
        if (!q.metrics_path.empty()) summary += "metrics written to " + q.metrics_path + "\n";
        if (!q.report_path.empty()) summary += "report written to " + q.report_path + "\n";
        if (!q.model_path.empty()) summary += "model written to " + q.model_path + "\n";
        out << summary;
    }
    return exit_success;
}

// Cross-validation run.
inline int train_folds(const tenon::table& t, const train_request& q, training_setup& s, std::ostream& out, const cli_environment& env,
                       pending_output& metrics_file) {
    const std::vector<tenon::fold> folds = make_folds(t, q, s);
    // Each fold's plan is measured on its own rows; a fixed layout keeps folds alike.
    indicators_for_every_fold(t, s.preparation);
    if (q.time_cycles) choose_time_cycles(t, s.preparation);
    {
        std::vector<std::size_t> every_row(t.row_count());
        for (std::size_t r = 0; r < every_row.size(); ++r) every_row[r] = r;
        check_network_size(t, q, s, every_row);
    }

    progress_printer progress(out, env.terminal, q.quiet, q.epochs, env.clock);
    std::vector<std::size_t> epochs_run;
    double seconds = 0;
    tenon::model_settings settings = make_settings(q);
    settings.team = env.team;
    settings.on_epoch = [&](const tenon::epoch_summary& e) {
        if (e.epoch == 1) {
            if (!epochs_run.empty()) progress.finish();
            epochs_run.push_back(0);
            progress.start(epochs_run.size(), folds.size(), s.classify, 0.0);
        }
        epochs_run.back() = e.epoch;
        seconds += e.seconds;
        progress.on_epoch(e);
        return true;
    };
    settings.on_batch = [&](const tenon::batch_progress& b) { progress.on_batch(b); };
    const bool chronological = s.split == split_choice::chronological;
    const tenon::cross_validation_report report = while_members_train(
        env, [&] { return tenon::cross_validate<float>(t, s.preparation, folds, settings, q.fractions.validation, chronological); });
    progress.finish();

    std::size_t dropped = 0;
    for (const auto& e : report.folds) dropped += e.dropped_rows;
    if (metrics_file.active()) {
        json_writer j;
        j.open_object();
        header_fields(j, q, s);
        j.open_object("rows").count("total", t.row_count()).count("dropped", dropped).close_object();
        j.count("folds", folds.size());
        j.open_array("epochs_run");
        for (auto e : epochs_run) j.count(nullptr, e);
        j.close_array();
        j.number("training_seconds", seconds);
        j.open_object("test");
        for (const auto& m : report.metrics) j.number(m.name.c_str(), m.mean);
        j.close_object();
        j.open_object("test_spread");
        for (const auto& m : report.metrics) j.number(m.name.c_str(), m.standard_deviation);
        j.close_object();
        j.open_array("per_fold");
        for (const auto& e : report.folds) write_scores(j, nullptr, e);
        j.close_array();
        j.close_object();
        metrics_file.write(j.finish());
        metrics_file.commit();
    }
    if (!q.quiet) {
        std::string summary = "\n" + table_row(std::to_string(folds.size()) + " folds", {"mean", "std. dev."});
        for (const auto& m : report.metrics) summary += table_row(m.name, {fixed(m.mean, 4), fixed(m.standard_deviation, 4)});
        summary += "\nepochs per fold:";
        for (auto e : epochs_run) summary += " " + std::to_string(e);
        summary += "; training took " + duration_text(seconds) + "\n";
        if (dropped) summary += std::to_string(dropped) + " rows dropped for a missing target\n";
        if (!q.metrics_path.empty()) summary += "metrics written to " + q.metrics_path + "\n";
        out << summary;
    }
    return exit_success;
}

}  // namespace detail

inline int run_train(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env) {
    (void)err;
    train_request q;
    // Output files are claimed first, so an unwritable path fails before training.
    pending_output metrics_file, report_file, model_probe;
    tenon::table t;
    training_setup s;
    // Under mpirun nothing here is collective, and it may fail on some
    // members only (a file one process cannot read): the members agree on
    // failing before training, so that each ends normally with its status
    // rather than leaving the others waiting in the training's first call.
    std::exception_ptr failure;
    try {
        q = parse_train_request(args);
        if (env.team && env.team->member_index() != 0) {  // data-parallel: member 0 alone reports and writes
            q.quiet = true;
            q.metrics_path.clear();
            q.report_path.clear();
            q.model_path.clear();
        }
        if (!q.help) {
            // Every file is checked, by identity, before anything is read or trained.
            files::file_roster roster;
            roster.input("--data", q.data_path, files::check_input(tenon::codes::prep_file_open, "--data", q.data_path));
            if (!q.metrics_path.empty()) roster.output("--metrics", metrics_file = pending_output("--metrics", q.metrics_path, &out));
            if (!q.report_path.empty()) roster.output("--report", report_file = pending_output("--report", q.report_path, &out));
            if (!q.model_path.empty()) roster.output("--model", model_probe = pending_output("--model", q.model_path, &out));
            roster.check();
            // An output on standard output: the summary would mix with it.
            if (metrics_file.to_standard_output() || report_file.to_standard_output() || model_probe.to_standard_output()) q.quiet = true;
            std::vector<std::string> notes;
            t = load_table(q, &notes, &err);
            s = make_setup(t, q);
            s.notes.insert(s.notes.begin(), notes.begin(), notes.end());
        }
    } catch (...) {
        if (!env.team) throw;
        failure = std::current_exception();
    }
    if (env.team) tenon::throw_if_any_member_failed(*env.team, failure, "tenon train");
    if (q.help) {
        out << train_help();
        return exit_success;
    }
    if (!q.quiet)
        for (const auto& note : s.notes) out << detail::one_line(note) << "\n";  // a column name may hold a line break
    if (q.folds > 0) return detail::train_folds(t, q, s, out, env, metrics_file);
    return detail::train_holdout(t, q, s, out, env, metrics_file, report_file, model_probe);
}

// ---------------------------------------------------------------------------
// Options of `tenon infer` and `tenon inspect`

namespace detail {

struct given_option {
    std::string name, value;
};

// Reads --name VALUE, --name=VALUE and value-less flags for `command`, with
// the same messages as `tenon train`; --help / -h sets `help`.
inline std::vector<given_option> read_options(const std::string& command, const std::vector<std::string>& args,
                                              const std::vector<std::string>& with_value, const std::vector<std::string>& flags,
                                              bool& help) {
    std::vector<given_option> given;
    for (std::size_t k = 0; k < args.size(); ++k) {
        std::string name = args[k], value;
        bool inline_value = false;
        if (name == "--help" || name == "-h") {
            help = true;
            continue;
        }
        if (name.rfind("--", 0) != 0)
            fail(cli_codes::option_unknown, "unexpected argument '" + name + "' for 'tenon " + command + "' (options start with --; see tenon " +
                                                command + " --help)");
        const auto eq = name.find('=');
        if (eq != std::string::npos) {
            value = name.substr(eq + 1);
            name = name.substr(0, eq);
            inline_value = true;
        }
        const bool is_flag = std::find(flags.begin(), flags.end(), name) != flags.end();
        if (!is_flag && std::find(with_value.begin(), with_value.end(), name) == with_value.end())
            fail(cli_codes::option_unknown, "unknown option '" + name + "' for 'tenon " + command + "' (see tenon " + command + " --help)");
        for (const auto& g : given)
            if (g.name == name) fail(cli_codes::option_conflict, name + " is given more than once");
        if (is_flag) {
            if (inline_value) fail(cli_codes::option_value, name + " takes no value");
        } else if (!inline_value) {
            if (k + 1 >= args.size()) fail(cli_codes::option_missing, name + " needs a value");
            value = args[++k];
        }
        given.push_back({name, value});
    }
    return given;
}

// Two paths name the same file when they reach the same device and inode
// (symlinks followed; hard links included); a file that does not exist yet is
// named by its directory's device and inode and its name (files::file_key).
inline files::file_key file_identity(const std::string& path) {
    if (path == "-") return files::resolve_output("", path).key;
    struct stat st {};
    if (::stat(path.c_str(), &st) == 0) return files::key_of(st);
    files::file_key k;
    struct stat d {};
    if (::stat(files::directory_part(path).c_str(), &d) == 0) {
        k.device = static_cast<std::uint64_t>(d.st_dev);
        k.inode = static_cast<std::uint64_t>(d.st_ino);
        k.name = files::name_part(path);
    } else {
        k.name = std::filesystem::path(path).lexically_normal().string();
    }
    return k;
}

inline bool same_file(const std::string& a, const std::string& b) { return file_identity(a).same_as(file_identity(b)); }

}  // namespace detail

struct infer_request {
    std::string model_path;
    std::string data_path;
    std::string out_path;
    std::vector<std::string> keep;
    bool quiet = false;
    bool help = false;
};

/// Reads the arguments after `infer`. Throws cli_failure on a bad command line.
inline infer_request parse_infer_request(const std::vector<std::string>& args) {
    infer_request q;
    for (const auto& o : detail::read_options("infer", args, {"--model", "--data", "--out", "--keep"}, {"--quiet"}, q.help)) {
        if (o.name == "--quiet") {
            q.quiet = true;
            continue;
        }
        if (o.name == "--keep") {
            q.keep = detail::split_list(o.value);
            for (std::size_t k = 0; k < q.keep.size(); ++k) {
                if (q.keep[k].empty()) fail(cli_codes::option_value, "--keep '" + o.value + "': an empty column name");
                for (std::size_t j = 0; j < k; ++j)
                    if (q.keep[j] == q.keep[k]) fail(cli_codes::option_conflict, "--keep names '" + q.keep[k] + "' twice");
            }
            continue;
        }
        if (o.value.empty()) fail(cli_codes::option_value, o.name + " needs a file name, got an empty one");
        (o.name == "--model" ? q.model_path : o.name == "--data" ? q.data_path : q.out_path) = o.value;
    }
    if (q.help) return q;
    if (q.model_path.empty()) fail(cli_codes::option_missing, "tenon infer needs --model MODEL.tnm");
    if (q.data_path.empty()) fail(cli_codes::option_missing, "tenon infer needs --data FILE.csv");
    if (q.out_path.empty()) fail(cli_codes::option_missing, "tenon infer needs --out PREDICTIONS.csv");
    if (detail::same_file(q.out_path, q.data_path)) fail(cli_codes::option_conflict, "--out and --data name the same file '" + q.out_path + "'");
    if (detail::same_file(q.out_path, q.model_path)) fail(cli_codes::option_conflict, "--out and --model name the same file '" + q.out_path + "'");
    return q;
}

struct inspect_request {
    std::string model_path;
    bool json = false;
    bool help = false;
};

inline inspect_request parse_inspect_request(const std::vector<std::string>& args) {
    inspect_request q;
    for (const auto& o : detail::read_options("inspect", args, {"--model"}, {"--json"}, q.help)) {
        if (o.name == "--json") {
            q.json = true;
        } else {
            if (o.value.empty()) fail(cli_codes::option_value, "--model needs a file name, got an empty one");
            q.model_path = o.value;
        }
    }
    if (!q.help && q.model_path.empty()) fail(cli_codes::option_missing, "tenon inspect needs --model MODEL.tnm");
    return q;
}

inline std::string infer_help() {
    return R"(tenon infer: predict with a saved model, one output row per input row

Usage: tenon infer --model MODEL.tnm --data NEW.csv --out PREDICTIONS.csv [options]

  --model MODEL.tnm      a model saved by tenon train --model (required). The
                         file is checked completely (checksums, version,
                         layout) before anything is predicted.
  --data NEW.csv         CSV file with a header row (required). It must hold
                         every column the model reads (tenon inspect lists
                         them), in any order; other columns, the target among
                         them, are ignored. The cells training read as
                         missing (see tenon train --help) read as missing and
                         are filled as in training. The delimiter and decimal
                         commas are told from the file as tenon train tells
                         them.
  --out PREDICTIONS.csv  where to write the predictions (required); '-' or
                         /dev/stdout: standard output.
  --keep COL,COL         columns of NEW.csv copied unchanged to the front of
                         each output row, e.g. an id (default: none).
  --quiet                print nothing but errors.

Output: a CSV file with a header, one row per data row, in the same order
  COL,...          the --keep columns, as read;
  predicted        classification: the most probable class;
                   regression: the predicted target in its original units;
  predicted_low, predicted_high
                   regression with a calibrated model: the band meant to
                   hold the true value for the model's coverage (tenon
                   inspect shows it, e.g. 90%) of rows like the training
                   rows; not promised for a row with out_of_range cells;
  p(CLASS)         classification only: one column per class, in the order
                   tenon inspect lists them; each row sums to 1 (rescaled by
                   the calibration's temperature when the model has one);
  likely_classes   classification with a calibrated model: the classes of
                   the set meant to hold the true class for the model's
                   coverage of such rows, joined by '|' (the most probable
                   class always among them);
  out_of_range     the input cells outside what the training rows held, as
                   COLUMN:below (under the training minimum), COLUMN:above
                   (over the training maximum) or COLUMN:unseen (a category
                   training never saw; it is encoded as all zeros), several
                   joined by ';'; empty when every cell lies inside.
  Numbers are written in the shortest form that reads back to the same value
  in the model's precision (single precision for models of tenon train).

)" + files_help() + R"(
Exit status
  0 success; 2 bad command line, model file or data (one line on stderr names
  the problem; a cell that cannot be predicted fails the whole command and is
  named by file, line, column and value); 3 the output could not be written;
  1 an unexpected failure. On failure no --out file is created or changed.
)";
}

inline std::string inspect_help() {
    return R"(tenon inspect: describe a saved model

Usage: tenon inspect --model MODEL.tnm [--json]

  --model MODEL.tnm      the model file (required). It is checked completely
                         (checksums, version, layout) first.
  --json                 print the description as JSON instead of text.

Prints the file's format version and sections; provenance (creation time in
UTC, library version, seed, epochs, row counts, the training data's
fingerprint); the target and its classes; every input column with its kind,
categories, preparation and the range of the training rows; the network's
layers with their sizes and its parameter count; the validation and test
scores and the training settings; the calibration (band or temperature and
class sets, with their nominal coverage), or that the file carries none.

Exit status
  0 success; 2 bad command line or an unreadable or damaged model file (one
  line on stderr names the problem); 1 an unexpected failure.
)";
}

// ---------------------------------------------------------------------------
// `tenon infer`

namespace detail {

// A CSV field (RFC 4180, section 2: fields with commas, quotes or line
// breaks are quoted, and quotes inside are doubled).
inline void append_csv_field(std::string& line, std::string_view text) {
    if (text.find_first_of(",\"\r\n") == std::string_view::npos) {
        line.append(text.data(), text.size());
        return;
    }
    line += '"';
    for (char c : text) {
        if (c == '"') line += '"';
        line += c;
    }
    line += '"';
}

template <class T>
void append_number(std::string& line, T v) {
    char buffer[64];
    const auto r = std::to_chars(buffer, buffer + sizeof buffer, v);  // shortest text that reads back exactly
    line.append(buffer, r.ptr);
}

inline const char* flag_name(tenon::range_flag f) {
    switch (f) {
        case tenon::range_flag::below: return "below";
        case tenon::range_flag::above: return "above";
        case tenon::range_flag::unseen_category: return "unseen";
        case tenon::range_flag::inside: break;
    }
    return "inside";
}

// Without the blanks (spaces, tabs) around it, as the CSV reader trims names.
inline std::string trimmed(std::string_view s) {
    while (!s.empty() && (s.front() == ' ' || s.front() == '\t')) s.remove_prefix(1);
    while (!s.empty() && (s.back() == ' ' || s.back() == '\t')) s.remove_suffix(1);
    return std::string(s);
}

// The header of a data file: trimmed names, each once.
inline std::vector<std::string> read_data_header(tenon::csv_record_reader& reader) {
    if (!reader.next()) tenon::raise(tenon::codes::prep_csv_no_header, reader.source() + ": no header row (the input is empty)");
    std::vector<std::string> names;
    for (std::size_t k = 0; k < reader.field_count(); ++k) {
        std::string name = trimmed(reader.field(k));
        if (std::find(names.begin(), names.end(), name) != names.end())
            tenon::raise(tenon::codes::prep_csv_duplicate_column, reader.source() + " line " + std::to_string(reader.line()) + " column " +
                                                                      std::to_string(k + 1) + ": the name '" + name + "' is used twice in the header");
        names.push_back(std::move(name));
    }
    return names;
}

inline std::size_t position_of(const std::vector<std::string>& names, const std::string& name) {
    return static_cast<std::size_t>(std::find(names.begin(), names.end(), name) - names.begin());
}

template <class T>
int infer_with(const tenon::model_file<T>& file, const infer_request& q, std::ostream& out, pending_output& result) {
    if (!file.plan) fail(cli_codes::model_unusable, q.model_path + ": the model holds no preparation plan, so it cannot read raw rows");
    constexpr std::size_t batch_rows = 64;
    tenon::predictor<T> model(file, batch_rows);
    const std::size_t inputs = model.input_count();

    // The file's delimiter and decimal mark are told from its first rows, as tenon train does.
    const tenon::csv_options dialect = data_dialect(q.data_path, 0, false);
    std::ifstream in(q.data_path, std::ios::binary);
    if (!in) tenon::raise(tenon::codes::prep_file_open, q.data_path + ": cannot open for reading");
    tenon::csv_record_reader reader(in, dialect.delimiter, q.data_path);
    const std::vector<std::string> header = read_data_header(reader);

    // Where each input column and each kept column is in the data.
    std::vector<std::size_t> input_field(inputs), keep_field;
    std::vector<std::string> absent;
    for (std::size_t k = 0; k < inputs; ++k) {
        input_field[k] = position_of(header, model.input_name(k));
        if (input_field[k] == header.size()) absent.push_back("'" + model.input_name(k) + "'");
    }
    if (!absent.empty())
        fail(cli_codes::column_missing, q.data_path + ": the model reads " + (absent.size() == 1 ? "column " : "columns ") + join(absent, ", ") +
                                            ", which the data does not have (columns: " + column_listing(header) + ")");
    for (const auto& name : q.keep) {
        keep_field.push_back(position_of(header, name));
        if (keep_field.back() == header.size())
            fail(cli_codes::column_unknown, q.data_path + ": --keep names '" + name + "', which is not a column (columns: " + column_listing(header) + ")");
    }

    // A kept column named like an output column would make two columns of
    // one name, which a reader of the CSV cannot tell apart.
    {
        std::vector<std::string> produced{"out_of_range"};
        if (model.is_classification()) {
            produced.push_back("predicted");
            for (const auto& c : model.class_names()) produced.push_back("p(" + c + ")");
            if (model.class_sets()) produced.push_back("likely_classes");
        } else if (model.output_count() == 1) {
            produced.push_back("predicted");
            if (model.interval()) {
                produced.push_back("predicted_low");
                produced.push_back("predicted_high");
            }
        } else {
            for (std::size_t j = 0; j < model.output_count(); ++j) produced.push_back("output_" + std::to_string(j + 1));
        }
        for (const auto& name : q.keep)
            if (std::find(produced.begin(), produced.end(), name) != produced.end())
                fail(cli_codes::option_conflict, "--keep names '" + name + "', which is also a column the predictions write; rename it in " + q.data_path +
                                                     " or leave it out");
    }
    std::ostream& stream = result.stream();
    std::string line;
    for (const auto& name : q.keep) {
        append_csv_field(line, name);
        line += ',';
    }
    const bool classify = model.is_classification();
    const bool sets = classify && model.class_sets().has_value();
    const bool band = !classify && model.output_count() == 1 && model.interval().has_value();
    if (classify) {
        line += "predicted";
        for (const auto& c : model.class_names()) {
            line += ',';
            append_csv_field(line, "p(" + c + ")");
        }
        if (sets) line += ",likely_classes";
    } else if (model.output_count() == 1) {
        line += band ? "predicted,predicted_low,predicted_high" : "predicted";
    } else {
        for (std::size_t j = 0; j < model.output_count(); ++j) line += (j ? ",output_" : "output_") + std::to_string(j + 1);
    }
    line += ",out_of_range\n";
    stream << line;

    // Rows are predicted in batches; the cells are copied because the
    // reader's views end at its next record.
    std::vector<std::string> cells(batch_rows * inputs), kept(batch_rows * q.keep.size());
    std::vector<std::string_view> views(batch_rows * inputs);
    std::vector<std::size_t> lines(batch_rows);
    std::size_t pending = 0, total = 0, flagged_rows = 0;
    const auto flush = [&] {
        if (pending == 0) return;
        for (std::size_t k = 0; k < pending * inputs; ++k) views[k] = cells[k];
        tenon::prediction_view<T> v;
        const tenon::predict_status s = model.try_predict_cells(views.data(), pending, v);
        if (!s.ok()) {
            const std::string cell = s.row < pending && s.column < inputs ? cells[s.row * inputs + s.column] : std::string();
            std::string what;
            switch (s.code) {
                case tenon::input_status::not_numeric:
                    what = "'" + cell + "' is not a finite " + (file.plan->feature_kind(model.input_name(s.column)) == tenon::column_kind::datetime
                                                                    ? "date/time" : "number");
                    break;
                case tenon::input_status::missing_value: what = "the cell is missing and the model has no fill value for the column"; break;
                case tenon::input_status::unseen_category: what = "'" + cell + "' is a category the training rows did not hold"; break;
                case tenon::input_status::non_finite: what = "'" + cell + "' is beyond what the model computes with (its prepared value is not finite)"; break;
                default: tenon::raise(s.code_text(), model.describe(s, pending));
            }
            tenon::raise(s.code_text(), q.data_path + " line " + std::to_string(lines[s.row]) + " column " +
                                            std::to_string(input_field[s.column] + 1) + " ('" + model.input_name(s.column) + "'): " + what);
        }
        for (std::size_t i = 0; i < pending; ++i) {
            line.clear();
            for (std::size_t j = 0; j < q.keep.size(); ++j) {
                append_csv_field(line, kept[i * q.keep.size() + j]);
                line += ',';
            }
            if (classify) {
                append_csv_field(line, model.class_names()[v.best_class(i)]);
                for (std::size_t j = 0; j < v.width; ++j) {
                    line += ',';
                    append_number(line, v.at(i, j));
                }
                if (sets) {
                    std::string likely;
                    for (std::size_t j = 0; j < v.width; ++j)
                        if (v.in_set(i, j)) likely += (likely.empty() ? "" : "|") + model.class_names()[j];
                    line += ',';
                    append_csv_field(line, likely);
                }
            } else {
                for (std::size_t j = 0; j < v.width; ++j) {
                    if (j) line += ',';
                    append_number(line, v.at(i, j));
                }
                if (band) {
                    line += ',';
                    append_number(line, v.low_at(i, 0));
                    line += ',';
                    append_number(line, v.high_at(i, 0));
                }
            }
            line += ',';
            std::string flags;
            for (std::size_t k = 0; k < inputs; ++k) {
                const tenon::range_flag f = v.flag(i, k);
                if (f == tenon::range_flag::inside) continue;
                flags += (flags.empty() ? "" : ";") + model.input_name(k) + ":" + flag_name(f);
            }
            flagged_rows += flags.empty() ? 0 : 1;
            append_csv_field(line, flags);
            line += '\n';
            stream << line;
        }
        total += pending;
        pending = 0;
    };
    while (reader.next()) {
        if (reader.field_count() != header.size())
            tenon::raise(tenon::codes::prep_csv_ragged, q.data_path + " line " + std::to_string(reader.line()) + ": expected " +
                                                            std::to_string(header.size()) + " fields, found " + std::to_string(reader.field_count()));
        for (std::size_t k = 0; k < inputs; ++k) {
            std::string& cell = cells[pending * inputs + k];
            cell.assign(reader.field(input_field[k]));
            // The predictor reads decimal points: a decimal comma becomes one.
            double value = 0;
            if (dialect.decimal_comma && file.plan->feature_kind(model.input_name(k)) == tenon::column_kind::numeric &&
                tenon::parse_decimal_comma_number(cell, value))
                std::replace(cell.begin(), cell.end(), ',', '.');
        }
        for (std::size_t j = 0; j < q.keep.size(); ++j) kept[pending * q.keep.size() + j].assign(reader.field(keep_field[j]));
        lines[pending] = reader.line();
        if (++pending == batch_rows) flush();
    }
    flush();
    result.finish_stream();
    const bool on_standard_output = result.to_standard_output();
    result.commit();
    if (!q.quiet && !on_standard_output)
        out << "predicted " << total << (total == 1 ? " row" : " rows") << " (" << flagged_rows << " with inputs outside the training range) into "
            << q.out_path << "\n";
    return exit_success;
}

}  // namespace detail

inline int run_infer(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env) {
    (void)err;
    (void)env;
    const infer_request q = parse_infer_request(args);
    if (q.help) {
        out << infer_help();
        return exit_success;
    }
    // Every file is checked, by identity, before anything is read.
    files::file_roster roster;
    roster.input("--model", q.model_path, files::check_input(tenon::codes::deploy_file_io, "--model", q.model_path));
    roster.input("--data", q.data_path, files::check_input(tenon::codes::prep_file_open, "--data", q.data_path));
    pending_output result("--out", q.out_path, &out);
    roster.output("--out", result);
    roster.check();
    // The whole file is checked (inspect) before a scalar type is chosen.
    const tenon::model_limits limits;
    const std::vector<std::uint8_t> bytes = tenon::read_file_bounded(q.model_path, limits.max_file_bytes);
    const tenon::model_file_summary summary = tenon::inspect_model_bytes(bytes, limits, q.model_path);
    if (summary.scalar_bytes == 8) return detail::infer_with(tenon::model_file_from_bytes<double>(bytes, limits, q.model_path), q, out, result);
    return detail::infer_with(tenon::model_file_from_bytes<float>(bytes, limits, q.model_path), q, out, result);
}

// ---------------------------------------------------------------------------
// `tenon inspect`

namespace detail {

// Seconds since 1970 as "YYYY-MM-DD HH:MM:SS UTC", by the days-to-civil
// algorithm of Hinnant 2013, "chrono-Compatible Low-Level Date Algorithms",
// civil_from_days (proleptic Gregorian calendar).
inline std::string utc_text(std::int64_t seconds) {
    std::int64_t days = seconds / 86400, rest = seconds % 86400;
    if (rest < 0) {
        rest += 86400;
        days -= 1;
    }
    const std::int64_t z = days + 719468;
    const std::int64_t era = (z >= 0 ? z : z - 146096) / 146097;
    const std::int64_t doe = z - era * 146097;
    const std::int64_t yoe = (doe - doe / 1460 + doe / 36524 - doe / 146096) / 365;
    const std::int64_t doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    const std::int64_t mp = (5 * doy + 2) / 153;
    const std::int64_t day = doy - (153 * mp + 2) / 5 + 1;
    const std::int64_t month = mp < 10 ? mp + 3 : mp - 9;
    const std::int64_t year = yoe + era * 400 + (month <= 2 ? 1 : 0);
    char buffer[64];
    std::snprintf(buffer, sizeof buffer, "%04lld-%02lld-%02lld %02lld:%02lld:%02lld UTC", static_cast<long long>(year),
                  static_cast<long long>(month), static_cast<long long>(day), static_cast<long long>(rest / 3600),
                  static_cast<long long>(rest / 60 % 60), static_cast<long long>(rest % 60));
    return buffer;
}

inline std::string hex64(std::uint64_t v) {
    char buffer[32];
    std::snprintf(buffer, sizeof buffer, "0x%016llx", static_cast<unsigned long long>(v));
    return buffer;
}

inline std::string significant(double v, int digits = 6) {
    if (!std::isfinite(v)) return "-";
    char buffer[64];
    std::snprintf(buffer, sizeof buffer, "%.*g", digits, v);
    return buffer;
}

inline std::string byte_size(std::uint64_t bytes) {
    if (bytes < 10240) return std::to_string(bytes) + " bytes";
    if (bytes < 10u * 1024 * 1024) return fixed(static_cast<double>(bytes) / 1024.0, 1) + " KiB";
    return fixed(static_cast<double>(bytes) / (1024.0 * 1024.0), 1) + " MiB";
}

// A value of a numeric or date/time column, as text.
inline std::string column_value(tenon::column_kind kind, double v) {
    return kind == tenon::column_kind::datetime ? utc_text(static_cast<std::int64_t>(std::floor(v))) : significant(v);
}

inline std::string list_head(const std::vector<std::string>& items, std::size_t shown, const char* noun) {
    std::string s;
    for (std::size_t k = 0; k < std::min(shown, items.size()); ++k) s += (k ? ", " : "") + items[k];
    if (items.size() > shown) s += ", ... (" + std::to_string(items.size()) + " " + noun + ")";
    return s;
}

inline const char* unseen_text(tenon::unseen_policy p) {
    switch (p) {
        case tenon::unseen_policy::fail: return "refused";
        case tenon::unseen_policy::all_zero: return "all zeros";
        case tenon::unseen_policy::other_slot: return "an 'other' slot";
    }
    return "?";
}

inline const tenon::feature_reference* reference_of(const tenon::model_file_summary& m, const std::string& column) {
    for (const auto& r : m.references)
        if (r.column == column) return &r;
    return nullptr;
}

// One line per layer, nested layers indented: "name  kind  details".
inline void describe_layers(const tenon::layer_record& r, std::size_t depth, std::string& out) {
    for (const auto& l : r.children) {
        std::string details;
        if (l.kind == "dense") {
            details = significant(l.number("inputs")) + " -> " + significant(l.number("outputs")) + (l.has("bias") && l.number("bias") == 0 ? ", no bias" : "");
        } else if (l.kind == "activation" && l.has("function")) {
            for (const auto& t : l.texts)
                if (t.first == "function") details = t.second;
            if (l.has("coefficient") && l.number("coefficient") != 0) details += " (coefficient " + significant(l.number("coefficient")) + ")";
        } else {
            for (const auto& t : l.texts) details += (details.empty() ? "" : ", ") + t.first + " " + t.second;
            for (const auto& n : l.numbers) details += (details.empty() ? "" : ", ") + n.first + " " + significant(n.second);
        }
        char buffer[160];
        std::snprintf(buffer, sizeof buffer, "  %*s%-16s %-12s ", static_cast<int>(2 * depth), "", l.name.c_str(), l.kind.c_str());
        out += buffer + details + "\n";
        if (!l.children.empty()) describe_layers(l, depth + 1, out);
    }
}

inline void layers_json(json_writer& j, const tenon::layer_record& r) {
    j.open_array("layers");
    for (const auto& l : r.children) {
        j.open_object();
        j.text("name", l.name).text("kind", l.kind);
        for (const auto& t : l.texts) j.text(t.first.c_str(), t.second);
        for (const auto& n : l.numbers) j.number(n.first.c_str(), n.second);
        if (!l.children.empty()) layers_json(j, l);
        j.close_object();
    }
    j.close_array();
}

inline std::string fill_text(const tenon::fill_value& f, tenon::column_kind kind) {
    switch (f.method) {
        case tenon::fill_method::none: return "refused";
        case tenon::fill_method::mode: return "mode '" + f.text + "'";
        case tenon::fill_method::constant:
            return kind == tenon::column_kind::categorical ? "constant '" + f.text + "'" : "constant " + column_value(kind, f.number);
        default: return std::string(tenon::to_string(f.method)) + " " + column_value(kind, f.number);
    }
}

inline std::string metadata_setting(const tenon::training_metadata& t, const char* key) {
    for (const auto& kv : t.settings)
        if (kv.first == key) return kv.second;
    return std::string();
}

// "tenon train", or "retraining 2 (promoted over the weights before it)".
inline std::string made_by(const tenon::training_metadata& t) {
    if (metadata_setting(t, "origin") != "retraining") return "training";
    const double n = t.metric("retrainings");
    return "retraining" + (std::isfinite(n) ? " " + significant(n) : std::string()) + " (promoted over the weights before it)";
}

inline std::string inspect_text(const tenon::model_file_summary& m, const std::string& path) {
    std::string s = path + "\n";
    std::vector<std::string> ids;
    for (const auto& sec : m.sections) ids.push_back(sec.id);
    s += "  tenon model file, format version " + std::to_string(m.format_version) + ", " + (m.scalar_bytes == 8 ? "double" : "float") +
         " weights, " + byte_size(m.file_bytes) + "; sections " + join(ids, " ") + "\n";
    s += "  replay sample: " + std::to_string(m.replay_rows) + " training rows; resumable: " + (m.resumable ? "yes" : "no") + "\n";

    if (m.metadata) {
        const tenon::training_metadata& t = *m.metadata;
        s += "\nProvenance of the current weights\n";
        s += "  made by      " + made_by(t) + "\n";
        s += "  created      " + utc_text(t.created_unix_seconds) + "\n";
        s += "  library      tenon " + t.library_version + "\n";
        const std::string data = metadata_setting(t, "data");
        s += "  data         " + (data.empty() ? std::string() : data + ", ") + "fingerprint " + hex64(t.data_fingerprint) + "\n";
        if (metadata_setting(t, "origin") == "retraining") {
            s += "  rows         " + std::to_string(t.training_rows) + " training (" + significant(t.metric("new_training_rows")) + " new, " +
                 significant(t.metric("replay_training_rows")) + " from the replay sample), " + std::to_string(t.validation_rows) +
                 " validation, " + significant(t.metric("gate_holdout_rows")) + " new rows held out for the gate, " +
                 std::to_string(t.dropped_rows) + " new rows refused\n";
            s += "  gate         " + metadata_setting(t, "gate_metric") + " " + significant(t.metric("gate_candidate_score")) +
                 " against the replaced weights' " + significant(t.metric("gate_incumbent_score")) + " on the held-out new rows\n";
        } else {
            s += "  rows         " + std::to_string(t.training_rows) + " training, " + std::to_string(t.validation_rows) + " validation, " +
                 std::to_string(t.dropped_rows) + " dropped for a missing target\n";
        }
        s += "  seed         " + std::to_string(t.seed) + "\n";
        s += "  epochs       " + std::to_string(t.epochs_run) + " run of " + std::to_string(t.epochs_planned) + ", best " +
             std::to_string(t.best_epoch) + ", stopped: " + t.stop_reason + "; " + std::to_string(t.steps) + " steps; loss " + t.loss + "\n";
    }

    if (m.plan) {
        const tenon::measured_plan& p = *m.plan;
        s += "\nTarget\n";
        if (!p.has_target()) {
            s += "  none (the network's outputs are given as they are)\n";
        } else if (p.target_type() == tenon::target_kind::classification) {
            s += "  " + p.target_name() + ": classification into " + std::to_string(p.class_count()) + " classes: " +
                 list_head(p.class_names(), 50, "classes") + "\n";
        } else {
            const tenon::scaling& ts = p.target_scaling();
            s += "  " + p.target_name() + ": regression; trained on the " + tenon::to_string(ts.method) + "-scaled target (centre " +
                 significant(ts.center) + ", spread " + significant(ts.spread) + "), predicted in its original units\n";
        }
        s += "\nInputs: " + std::to_string(p.input_columns().size()) + " columns -> " + std::to_string(p.feature_count()) + " features\n";
        for (const auto& name : p.input_columns()) {
            const tenon::column_kind kind = p.feature_kind(name);
            s += "  " + name + " (" + tenon::to_string(kind) + ")\n";
            std::string prep = "missing -> " + fill_text(p.feature_fill(name), kind);
            if (p.feature_has_indicator(name)) prep += ", with a missing indicator";
            if (kind == tenon::column_kind::categorical) {
                const tenon::one_hot_layout& h = p.feature_categories(name);
                s += "    categories   " + list_head(h.categories(), 20, "categories") + "\n";
                prep += "; one-hot, unseen -> " + std::string(unseen_text(h.policy()));
            } else {
                const tenon::scaling& c = p.feature_scaling(name);
                const tenon::time_encoding encoding = kind == tenon::column_kind::datetime ? p.feature_time_encoding(name) : tenon::time_encoding::value;
                if (encoding != tenon::time_encoding::cycles)
                    prep += "; " + std::string(tenon::to_string(c.method)) + " (centre " + significant(c.center) + ", spread " + significant(c.spread) + ")";
                if (kind == tenon::column_kind::datetime) {
                    const tenon::time_format form = p.feature_time_form(name);
                    s += "    time form    " + (form == tenon::time_format::detect ? std::string("any of YYYY-MM-DD, YYYY/MM/DD, DD.MM.YYYY")
                                                                                   : std::string(tenon::to_string(form))) + "\n";
                    if (encoding != tenon::time_encoding::value)
                        prep += std::string(encoding == tenon::time_encoding::cycles ? "; only" : ";") +
                                " hour of day, day of week, day of year as sine/cosine pairs";
                }
            }
            s += "    preparation  " + prep + "\n";
            if (const tenon::feature_reference* r = reference_of(m, name)) {
                std::string seen;
                if (kind == tenon::column_kind::categorical) {
                    std::vector<std::string> counts;
                    for (const auto& c : r->categories) counts.push_back(c.first + " " + std::to_string(c.second));
                    seen = list_head(counts, 20, "categories");
                } else if (r->present > 0) {
                    seen = column_value(kind, r->minimum) + " .. " + column_value(kind, r->maximum);
                    if (r->deciles.size() == 11) seen += ", median " + column_value(kind, r->deciles[5]);
                }
                s += "    training     " + seen + (seen.empty() ? "" : "; ") + std::to_string(r->present) + " present, " +
                     std::to_string(r->missing) + " missing\n";
            }
        }
    }

    s += "\nNetwork: " + std::to_string(m.architecture.children.size()) + " layers, " + std::to_string(m.parameter_values) + " parameter values\n";
    describe_layers(m.architecture, 0, s);

    s += "\nCalibration\n";
    if (!m.calibration) {
        s += "  none: the file carries no calibration (written by tenon train before format version 2, or without validation rows)\n";
    } else {
        if (const auto& i = m.calibration->interval) {
            s += "  band         split-conformal, nominal coverage " + significant(i->coverage) + ", from " + std::to_string(i->rows) +
                 " calibration rows\n";
            s += "  half width   " + (std::isfinite(i->half_width) ? significant(i->half_width) : std::string("infinite (too few rows for the coverage)")) +
                 " in the target's units" + (i->has_spread ? "; normalized: " + significant(i->spread_quantile) + " x (spread + " +
                                                                 significant(i->spread_floor) + ") when a spread is given"
                                                           : std::string()) + "\n";
        }
        if (const auto& k = m.calibration->classes) {
            s += "  classes      temperature " + significant(k->temperature) + " (fitted on the validation log loss), from " +
                 std::to_string(k->rows) + " calibration rows\n";
            s += "  class sets   nominal coverage " + significant(k->coverage) + "; a class joins when 1 - p <= " +
                 (std::isfinite(k->set_threshold) ? significant(k->set_threshold) : std::string("infinity (every class)")) + "\n";
        }
        s += "  The coverage is promised for rows like the training rows; not for rows with cells out of range or under drift.\n";
    }

    if (m.metadata) {
        s += "\nScores and training metrics\n";
        for (const auto& kv : m.metadata->metrics) {
            char buffer[96];
            std::snprintf(buffer, sizeof buffer, "  %-24s ", kv.first.c_str());
            s += buffer + significant(kv.second) + "\n";
        }
        s += "\nSettings\n";
        for (const auto& kv : m.metadata->settings) {
            char buffer[96];
            std::snprintf(buffer, sizeof buffer, "  %-24s ", kv.first.c_str());
            s += buffer + kv.second + "\n";
        }
    }
    if (!m.history.empty()) {
        s += "\nHistory: " + std::to_string(m.history.size()) + " earlier " + (m.history.size() == 1 ? "training" : "trainings") +
             " whose weights were replaced, oldest first\n";
        for (std::size_t k = 0; k < m.history.size(); ++k) {
            const tenon::training_metadata& t = m.history[k];
            const std::string data = metadata_setting(t, "data");
            s += "  " + std::to_string(k + 1) + ". " + utc_text(t.created_unix_seconds) + ", " + made_by(t) + ", data " +
                 (data.empty() ? std::string() : data + ", ") + "fingerprint " + hex64(t.data_fingerprint) + ", " +
                 std::to_string(t.training_rows) + " training rows\n";
            std::vector<std::string> scores;
            for (const auto& kv : t.metrics) scores.push_back(kv.first + " " + significant(kv.second));
            if (!scores.empty()) s += "     " + join(scores, ", ") + "\n";
        }
    }
    return s;
}

inline std::string inspect_json(const tenon::model_file_summary& m, const std::string& path) {
    json_writer j;
    j.open_object();
    j.text("file", path).count("format_version", m.format_version).text("scalar", m.scalar_bytes == 8 ? "double" : "float").count("bytes", m.file_bytes);
    j.open_array("sections");
    for (const auto& sec : m.sections) j.open_object().text("id", sec.id).count("bytes", sec.length).close_object();
    j.close_array();
    j.count("replay_rows", m.replay_rows);
    j.boolean("resumable", m.resumable);
    if (m.metadata) {
        const tenon::training_metadata& t = *m.metadata;
        j.open_object("provenance");
        j.text("created", utc_text(t.created_unix_seconds)).number("created_unix_seconds", static_cast<double>(t.created_unix_seconds));
        j.text("library_version", t.library_version).text("data_fingerprint", hex64(t.data_fingerprint)).count("seed", t.seed);
        j.count("epochs_planned", t.epochs_planned).count("epochs_run", t.epochs_run).count("best_epoch", t.best_epoch).count("steps", t.steps);
        j.count("training_rows", t.training_rows).count("validation_rows", t.validation_rows).count("dropped_rows", t.dropped_rows);
        j.text("stop_reason", t.stop_reason).text("loss", t.loss);
        j.text("origin", metadata_setting(t, "origin").empty() ? "training" : metadata_setting(t, "origin"));
        j.text("data", metadata_setting(t, "data"));
        j.close_object();
    } else {
        j.null("provenance");
    }
    j.open_array("history");
    for (const auto& t : m.history) {
        j.open_object();
        j.text("created", utc_text(t.created_unix_seconds)).text("library_version", t.library_version);
        j.text("origin", metadata_setting(t, "origin").empty() ? "training" : metadata_setting(t, "origin"));
        j.text("data", metadata_setting(t, "data")).text("data_fingerprint", hex64(t.data_fingerprint)).count("seed", t.seed);
        j.count("training_rows", t.training_rows).count("validation_rows", t.validation_rows).count("dropped_rows", t.dropped_rows);
        j.open_object("metrics");
        for (const auto& kv : t.metrics) j.number(kv.first.c_str(), kv.second);
        j.close_object();
        j.open_object("settings");
        for (const auto& kv : t.settings) j.text(kv.first.c_str(), kv.second);
        j.close_object();
        j.close_object();
    }
    j.close_array();
    if (m.plan) {
        const tenon::measured_plan& p = *m.plan;
        j.open_object("target");
        if (p.has_target()) {
            j.text("column", p.target_name());
            j.text("task", p.target_type() == tenon::target_kind::classification ? "classification" : "regression");
            if (p.target_type() == tenon::target_kind::classification) {
                j.open_array("classes");
                for (const auto& c : p.class_names()) j.text(nullptr, c);
                j.close_array();
            }
        }
        j.close_object();
        j.count("features", p.feature_count());
        j.open_array("inputs");
        for (const auto& name : p.input_columns()) {
            const tenon::column_kind kind = p.feature_kind(name);
            j.open_object().text("column", name).text("kind", tenon::to_string(kind));
            j.text("fill", fill_text(p.feature_fill(name), kind));
            j.boolean("missing_indicator", p.feature_has_indicator(name));
            if (kind == tenon::column_kind::categorical) {
                j.open_array("categories");
                for (const auto& c : p.feature_categories(name).categories()) j.text(nullptr, c);
                j.close_array();
                j.text("unseen", unseen_text(p.feature_categories(name).policy()));
            } else {
                const tenon::scaling& c = p.feature_scaling(name);
                j.text("scaling", tenon::to_string(c.method)).number("centre", c.center).number("spread", c.spread);
                if (kind == tenon::column_kind::datetime) {
                    const tenon::time_encoding encoding = p.feature_time_encoding(name);
                    j.text("time_format", tenon::to_string(p.feature_time_form(name)));
                    j.text("time_features", encoding == tenon::time_encoding::value ? "stamp"
                                            : encoding == tenon::time_encoding::cycles ? "cycles" : "stamp and cycles");
                }
            }
            if (const tenon::feature_reference* r = reference_of(m, name)) {
                j.open_object("training").count("present", r->present).count("missing", r->missing);
                if (kind == tenon::column_kind::categorical) {
                    j.open_object("counts");
                    for (const auto& c : r->categories) j.count(c.first.c_str(), c.second);
                    j.close_object();
                } else if (r->present > 0) {
                    j.number("minimum", r->minimum).number("maximum", r->maximum);
                }
                j.close_object();
            }
            j.close_object();
        }
        j.close_array();
    }
    j.open_object("network").count("parameter_values", m.parameter_values);
    layers_json(j, m.architecture);
    j.close_object();
    if (m.calibration) write_calibration(j, "calibration", *m.calibration);
    else j.null("calibration");
    if (m.metadata) {
        j.open_object("metrics");
        for (const auto& kv : m.metadata->metrics) j.number(kv.first.c_str(), kv.second);
        j.close_object();
        j.open_object("settings");
        for (const auto& kv : m.metadata->settings) j.text(kv.first.c_str(), kv.second);
        j.close_object();
    }
    j.close_object();
    return j.finish();
}

}  // namespace detail

inline int run_inspect(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env) {
    (void)err;
    (void)env;
    const inspect_request q = parse_inspect_request(args);
    if (q.help) {
        out << inspect_help();
        return exit_success;
    }
    files::check_input(tenon::codes::deploy_file_io, "--model", q.model_path);
    const tenon::model_file_summary m = tenon::inspect_model_file(q.model_path);
    out << (q.json ? detail::inspect_json(m, q.model_path) : detail::inspect_text(m, q.model_path));
    return exit_success;
}

// ---------------------------------------------------------------------------
// Options of `tenon retrain` and `tenon drift`

struct retrain_request {
    std::string model_path;
    std::string data_path;
    std::string out_path;
    std::string rollback_path;  // empty: "<model>.previous" when --out replaces --model
    std::string json_path;      // empty: none; "-": standard output
    tenon::gate_metric metric = tenon::gate_metric::automatic;
    double margin = 0.0;
    double budget_seconds = 0.0;  // 0 = no limit
    std::size_t epochs = 30;
    std::uint64_t seed = 1;
    double holdout_share = 0.2;
    std::size_t min_holdout = 30;
    tenon::holdout_selection holdout = tenon::holdout_selection::random;
    bool quiet = false;
    bool help = false;
};

/// Reads the arguments after `retrain`. Throws cli_failure on a bad command line.
inline retrain_request parse_retrain_request(const std::vector<std::string>& args) {
    retrain_request q;
    const std::vector<std::string> with_value{"--model",  "--data",  "--out",           "--margin",      "--budget",  "--metric", "--epochs",
                                              "--seed",   "--json",  "--holdout-share", "--min-holdout", "--holdout", "--rollback"};
    for (const auto& o : detail::read_options("retrain", args, with_value, {"--quiet"}, q.help)) {
        const std::string& v = o.value;
        if (o.name == "--quiet") {
            q.quiet = true;
        } else if (o.name == "--margin") {
            q.margin = detail::parse_real("--margin", v);
            if (!(q.margin >= 0)) fail(cli_codes::option_value, "--margin '" + v + "': must be zero or more, in the gate metric's units");
        } else if (o.name == "--budget") {
            q.budget_seconds = detail::parse_real("--budget", v);
            if (!(q.budget_seconds >= 0)) fail(cli_codes::option_value, "--budget '" + v + "': must be zero (no limit) or more seconds");
        } else if (o.name == "--metric") {
            const std::pair<const char*, tenon::gate_metric> names[] = {{"auto", tenon::gate_metric::automatic},
                                                                        {"accuracy", tenon::gate_metric::accuracy},
                                                                        {"log-loss", tenon::gate_metric::log_loss},
                                                                        {"rmse", tenon::gate_metric::rmse}};
            q.metric = detail::parse_choice("--metric", v, names);
        } else if (o.name == "--epochs") {
            q.epochs = detail::parse_count("--epochs", v, 1);
        } else if (o.name == "--seed") {
            q.seed = detail::parse_seed(v);
        } else if (o.name == "--holdout-share") {
            q.holdout_share = detail::parse_real("--holdout-share", v);
            if (!(q.holdout_share > 0 && q.holdout_share < 1))
                fail(cli_codes::option_value, "--holdout-share '" + v + "': must lie strictly between 0 and 1");
        } else if (o.name == "--min-holdout") {
            q.min_holdout = detail::parse_count("--min-holdout", v, 1);
        } else if (o.name == "--holdout") {
            const std::pair<const char*, tenon::holdout_selection> names[] = {{"random", tenon::holdout_selection::random},
                                                                              {"latest", tenon::holdout_selection::latest}};
            q.holdout = detail::parse_choice("--holdout", v, names);
        } else {
            if (v.empty()) fail(cli_codes::option_value, o.name + " needs a file name, got an empty one");
            (o.name == "--model"      ? q.model_path
             : o.name == "--data"     ? q.data_path
             : o.name == "--out"      ? q.out_path
             : o.name == "--rollback" ? q.rollback_path
                                      : q.json_path) = v;
        }
    }
    if (q.help) return q;
    if (q.model_path.empty()) fail(cli_codes::option_missing, "tenon retrain needs --model MODEL.tnm");
    if (q.data_path.empty()) fail(cli_codes::option_missing, "tenon retrain needs --data NEW.csv");
    if (q.out_path.empty()) fail(cli_codes::option_missing, "tenon retrain needs --out NEW_MODEL.tnm (it may be the --model file)");
    if (detail::same_file(q.out_path, q.data_path)) fail(cli_codes::option_conflict, "--out and --data name the same file '" + q.out_path + "'");
    const bool in_place = detail::same_file(q.out_path, q.model_path);
    if (!q.rollback_path.empty()) {
        if (!in_place)
            fail(cli_codes::option_conflict, "--rollback names where the replaced model is kept; it applies only when --out is the --model file");
        if (detail::same_file(q.rollback_path, q.model_path))
            fail(cli_codes::option_conflict, "--rollback and --model name the same file '" + q.rollback_path + "'");
        if (detail::same_file(q.rollback_path, q.data_path))
            fail(cli_codes::option_conflict, "--rollback and --data name the same file '" + q.rollback_path + "'");
    }
    if (!q.json_path.empty() && q.json_path != "-") {
        const std::pair<const char*, const std::string*> others[] = {
            {"--model", &q.model_path}, {"--data", &q.data_path}, {"--out", &q.out_path}, {"--rollback", &q.rollback_path}};
        for (const auto& other : others)
            if (!other.second->empty() && detail::same_file(q.json_path, *other.second))
                fail(cli_codes::option_conflict, std::string("--json and ") + other.first + " name the same file '" + q.json_path + "'");
        if (in_place && q.rollback_path.empty() && detail::same_file(q.json_path, tenon::default_rollback_path(q.model_path)))
            fail(cli_codes::option_conflict, "--json names the rollback file '" + q.json_path + "'");
    }
    return q;
}

struct drift_request {
    std::string model_path;
    std::string data_path;
    tenon::drift_options options;
    bool json = false;
    bool quiet = false;
    bool help = false;
};

/// Reads the arguments after `drift`. Throws cli_failure on a bad command line.
inline drift_request parse_drift_request(const std::vector<std::string>& args) {
    drift_request q;
    bool watch_given = false;
    const std::vector<std::string> with_value{"--model", "--data", "--psi-threshold", "--psi-watch", "--ks-threshold", "--ks-significance"};
    for (const auto& o : detail::read_options("drift", args, with_value, {"--json", "--quiet"}, q.help)) {
        const std::string& v = o.value;
        if (o.name == "--json") {
            q.json = true;
        } else if (o.name == "--quiet") {
            q.quiet = true;
        } else if (o.name == "--psi-threshold") {
            q.options.psi_threshold = detail::parse_real("--psi-threshold", v);
            if (!(q.options.psi_threshold > 0)) fail(cli_codes::option_value, "--psi-threshold '" + v + "': must be positive");
        } else if (o.name == "--psi-watch") {
            q.options.psi_watch = detail::parse_real("--psi-watch", v);
            if (!(q.options.psi_watch >= 0)) fail(cli_codes::option_value, "--psi-watch '" + v + "': must be zero or more");
            watch_given = true;
        } else if (o.name == "--ks-threshold") {
            q.options.ks_threshold = detail::parse_real("--ks-threshold", v);
            if (!(q.options.ks_threshold >= 0 && q.options.ks_threshold <= 1))
                fail(cli_codes::option_value, "--ks-threshold '" + v + "': must lie in [0, 1] (0: the critical value at --ks-significance)");
        } else if (o.name == "--ks-significance") {
            q.options.ks_significance = detail::parse_real("--ks-significance", v);
            if (!(q.options.ks_significance > 0 && q.options.ks_significance < 1))
                fail(cli_codes::option_value, "--ks-significance '" + v + "': must lie strictly between 0 and 1");
        } else {
            if (v.empty()) fail(cli_codes::option_value, o.name + " needs a file name, got an empty one");
            (o.name == "--model" ? q.model_path : q.data_path) = v;
        }
    }
    if (q.help) return q;
    if (q.model_path.empty()) fail(cli_codes::option_missing, "tenon drift needs --model MODEL.tnm");
    if (q.data_path.empty()) fail(cli_codes::option_missing, "tenon drift needs --data RECENT.csv");
    if (q.json && q.quiet) fail(cli_codes::option_conflict, "--json prints the report and --quiet prints nothing: give one of them");
    // The watch level follows a lower threshold unless it is given.
    if (!watch_given) q.options.psi_watch = std::min(q.options.psi_watch, q.options.psi_threshold);
    if (q.options.psi_watch > q.options.psi_threshold)
        fail(cli_codes::option_conflict, "--psi-watch " + tenon::number_to_text(q.options.psi_watch) + " is above --psi-threshold " +
                                             tenon::number_to_text(q.options.psi_threshold));
    return q;
}

inline std::string retrain_help() {
    return R"(tenon retrain: continue training a saved model on new rows; replace it only if it gets better

Usage: tenon retrain --model MODEL.tnm --data NEW.csv --out NEW_MODEL.tnm [options]

  --model MODEL.tnm      the incumbent, saved by tenon train --model (required).
  --data NEW.csv         newly collected rows with a header (required): every
                         column the model reads and its target, in any order.
                         Rows the model's frozen preparation cannot encode (a
                         missing target, a class the model has no output for,
                         a missing cell without a fill, text in a numeric
                         column) are left out and counted. The delimiter and
                         decimal commas are told from the file as tenon train
                         tells them.
  --out NEW_MODEL.tnm    where the candidate is written, only if it is
                         promoted (required). It may be the --model file: the
                         incumbent's exact bytes are then kept at the
                         --rollback path first.
  --margin X             how much better the candidate must score on the
                         holdout, in the metric's units (default 0: any
                         strict improvement). An equally good candidate is
                         never promoted.
  --budget SECONDS       wall-clock limit for the whole retraining (default 0:
                         none); training stops when it is spent and the gate
                         still decides.
  --metric auto|accuracy|log-loss|rmse
                         the gate's metric (default auto: accuracy for
                         classification, RMSE in the target's units for
                         regression).
  --epochs N             most epochs of continued training (default 30); early
                         stopping on 15% of the training rows, patience 5.
                         Batch size, learning rate and update rule are the
                         model's stored ones (else 32, 0.001, adam).
  --seed N               seeds the holdout, the validation rows, the batch
                         order and the replay sample (default 1).
  --holdout-share X      share of the usable new rows held out for the gate,
                         never trained on (default 0.2).
  --min-holdout N        the holdout's minimum rows (default 30); the new data
                         needs at least N + 1 usable rows.
  --holdout random|latest
                         the holdout rows: a seeded random choice, or the last
                         rows of NEW.csv for rows in time order (default
                         random).
  --rollback PATH        with --out equal to --model: where the replaced model
                         is kept (default MODEL.tnm.previous). Not allowed
                         otherwise.
  --json OUT.json        write the retraining report as JSON (decision, reason,
                         gate metric, margin, both scores, improvement, both
                         models' coverage on the holdout, row counts, epochs,
                         stop reason, seconds, the file written); '-' prints
                         it instead of the text summary.
                         Written whatever the decision.
  --quiet                print nothing but errors.

The candidate starts from the model's weights and trains on the new rows
(minus the holdout) mixed with the sample of training rows the model file
keeps; incumbent and candidate are then scored on the holdout with the same
metric. The candidate file keeps the preparation, gets the new weights, new
reference ranges (for tenon drift) and the continued sample, and is
recalibrated on its validation rows at the model's nominal coverage; the
summary gives both models' coverage (bands or class sets) on the holdout.

)" + files_help("with --out naming --model by any path the retrain is in\n  place and keeps the replaced model at --rollback;") + R"(
Exit status
  0 the candidate was promoted and written to --out; 4 the incumbent was kept
  and nothing was written to --out or --rollback; 2 bad command line, model
  file or data (one line on stderr names the problem); 3 an output file could
  not be written; 1 an unexpected failure. On failure no --out, --rollback or
  --json file is created or changed.
)";
}

inline std::string drift_help() {
    return R"(tenon drift: compare recent rows with the rows a saved model was trained on

Usage: tenon drift --model MODEL.tnm --data RECENT.csv [options]

  --model MODEL.tnm      a model saved by tenon train --model or tenon retrain
                         (required); it keeps summaries of its training rows.
  --data RECENT.csv      recent rows with a header (required): every column
                         the model reads, in any order; others are ignored.
                         The delimiter and decimal commas are told from the
                         file as tenon train tells them.
  --psi-threshold X      a column whose population stability index exceeds X
                         is flagged as drifted (default 0.25).
  --psi-watch X          a column whose PSI exceeds X (and is not drifted) is
                         marked "watch" (default 0.1, or the --psi-threshold
                         when that is lower). Never changes the exit status.
                         A column is marked "watch" or "drifted" by PSI only
                         when its PSI also exceeds the noise floor: the PSI
                         that unchanged data exceed once in 100 windows of
                         this size (column "PSI noise"; see the README).
  --ks-threshold X       a numeric or date/time column whose Kolmogorov-Smirnov
                         distance D exceeds X is flagged (default 0: the
                         two-sample critical value at --ks-significance).
  --ks-significance X    level of that critical value (default 0.01).
  --json                 print the report as JSON (per column: status, psi,
                         psi_flag, ks, ks_limit, ks_flag, counts and bins).
  --quiet                print nothing but errors; the exit status tells.

Prints one line per input column: its kind, PSI, PSI's noise floor, D, the limit of D, its
status (stable, watch, drifted) and notes (values outside the training
range, categories training never saw, unreadable cells, which test flagged
it). PSI compares the shares of the training histogram's bins (plus bins
below and above the training range and for missing cells; one bin per
category) with the recent rows' shares; a numeric column with few distinct
training values has one bin per value. Date/time cells are read in the
form the model keeps for each column.

Exit status
  0 no column drifted; 5 at least one column drifted; 2 bad command line,
  model file or data (one line on stderr names the problem); 1 an unexpected
  failure.
)";
}

// ---------------------------------------------------------------------------
// `tenon retrain` and `tenon drift`

namespace detail {

// The columns a model needs that the data lacks, as "'a', 'b'" (empty: none).
inline std::string absent_columns(const tenon::table& t, const std::vector<std::string>& needed) {
    std::vector<std::string> absent;
    for (const auto& name : needed)
        if (!t.contains(name)) absent.push_back("'" + name + "'");
    return join(absent, ", ");
}

// Reads new rows in the data file's dialect (told from the file, as in
// tenon train), with the missing spellings and the time-stamp forms the
// model keeps, so that its cells read as they did in training.
inline tenon::table read_new_rows(const std::string& path, const tenon::measured_plan* plan) {
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

template <class T>
tenon::retraining_report retrain_with(const tenon::model_file<T>& incumbent, const tenon::table& t, const tenon::retraining_options& options,
                                      std::vector<std::uint8_t>& candidate_bytes) {
    tenon::retraining_result<T> r = tenon::retrain_model(incumbent, t, options);
    if (r.report.promoted) candidate_bytes = tenon::model_file_to_bytes(r.candidate);
    return std::move(r.report);
}

// Milliseconds below a second (a retraining on a few hundred rows takes a few).
inline std::string elapsed_text(double seconds) {
    if (std::isfinite(seconds) && seconds >= 0 && seconds < 1) return fixed(seconds * 1000.0, 0) + " ms";
    return duration_text(seconds);
}

inline std::string retrain_text(const tenon::retraining_report& r, const retrain_request& q, bool in_place) {
    const auto line = [](const char* name, const std::string& value) {
        char buffer[32];
        std::snprintf(buffer, sizeof buffer, "  %-13s", name);
        return buffer + value + "\n";
    };
    std::string s = (r.promoted ? "promoted: " : "kept the incumbent: ") + r.reason + "\n";
    s += line("metric", r.metric + (r.higher_is_better ? " (higher is better)" : " (lower is better)") + " on " +
                            std::to_string(r.holdout_rows) + " holdout rows, margin " + significant(r.margin));
    s += line("incumbent", significant(r.incumbent_score));
    s += line("candidate", significant(r.candidate_score));
    s += line("improvement", significant(r.improvement));
    {
        // Both models' calibration on the same holdout rows.
        const bool sets = r.coverage_measure == "class_set";
        const auto coverage = [&](double c, double width) {
            if (!std::isfinite(c)) return std::string("no calibration");
            return significant(c) + (sets ? ", mean set size " : ", mean band width ") + significant(width);
        };
        s += line("coverage", std::string(sets ? "class sets" : "bands") + " on the holdout, nominal " + significant(r.nominal_coverage) +
                                  ": incumbent " + coverage(r.incumbent_coverage, r.incumbent_width) + "; candidate " +
                                  coverage(r.candidate_coverage, r.candidate_width) +
                                  (std::isfinite(r.candidate_coverage) ? " (recalibrated on its validation rows)" : std::string()));
    }
    std::string rows = std::to_string(r.new_rows) + " new (" + std::to_string(r.new_rows_refused) + " refused";
    const std::pair<const char*, std::size_t> refusals[] = {{"missing target", r.refused_missing_target},
                                                            {"unseen class", r.refused_unseen_class},
                                                            {"unseen category", r.refused_unseen_category},
                                                            {"missing value", r.refused_missing_value},
                                                            {"not a number", r.refused_not_numeric}};
    for (const auto& refusal : refusals)
        if (refusal.second) rows += ", " + std::to_string(refusal.second) + " " + refusal.first;
    rows += "): " + std::to_string(r.holdout_rows) + " holdout, " + std::to_string(r.new_training_rows) + " for training; " +
            std::to_string(r.replay_rows) + " replayed training rows; " + std::to_string(r.training_rows) + " trained on, " +
            std::to_string(r.validation_rows) + " for early stopping";
    s += line("rows", rows);
    s += line("training", std::to_string(r.epochs_run) + " epochs, " + std::to_string(r.steps) + " steps, stopped: " + r.stop_reason +
                              (r.stop_message.empty() ? std::string() : " (" + r.stop_message + ")") + "; " + elapsed_text(r.training_seconds));
    s += line("time", elapsed_text(r.seconds) + " in all, budget " +
                          (r.time_budget_seconds > 0 ? duration_text(r.time_budget_seconds) : std::string("none")));
    if (r.promoted) {
        s += "candidate written to " + q.out_path;
        if (in_place) s += "; the previous model kept at " + r.rollback_path;
        s += "\n";
    } else {
        s += "nothing written; " + q.model_path + " stays in service\n";
    }
    if (!q.json_path.empty() && q.json_path != "-") s += "report written to " + q.json_path + "\n";
    return s;
}

}  // namespace detail

inline int run_retrain(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env) {
    (void)err;
    const retrain_request q = parse_retrain_request(args);
    if (q.help) {
        out << retrain_help();
        return exit_success;
    }
    // Every file is checked, by identity, before anything is read or trained.
    // --out naming --model by any path (a symlink, a hard link, an absolute
    // path) is a retrain in place, which keeps the replaced model as rollback.
    files::file_roster roster;
    roster.input("--model", q.model_path, files::check_input(tenon::codes::deploy_file_io, "--model", q.model_path));
    roster.input("--data", q.data_path, files::check_input(tenon::codes::prep_file_open, "--data", q.data_path));
    const bool in_place = detail::same_file(q.out_path, q.model_path);
    const std::string rollback = !in_place ? std::string() : q.rollback_path.empty() ? tenon::default_rollback_path(q.model_path) : q.rollback_path;
    pending_output json_file, out_file, rollback_file;
    if (!q.json_path.empty()) roster.output("--json", json_file = pending_output("--json", q.json_path, &out));
    roster.output("--out", out_file = pending_output("--out", q.out_path, &out));
    if (in_place) roster.output("--rollback", rollback_file = pending_output("--rollback", rollback, &out));
    roster.check("--out", "--model");
    const bool on_standard_output = json_file.to_standard_output() || out_file.to_standard_output() || rollback_file.to_standard_output();

    // The whole file is checked (inspect) before a scalar type is chosen.
    const tenon::model_limits limits;
    const std::vector<std::uint8_t> bytes = tenon::read_file_bounded(q.model_path, limits.max_file_bytes);
    const tenon::model_file_summary summary = tenon::inspect_model_bytes(bytes, limits, q.model_path);
    if (!summary.plan || !summary.plan->has_target())
        fail(cli_codes::model_unusable, q.model_path + ": the model holds no preparation plan with a target, so it cannot be retrained");
    const tenon::table t = detail::read_new_rows(q.data_path, &*summary.plan);
    std::vector<std::string> needed = summary.plan->input_columns();
    needed.push_back(summary.plan->target_name());
    const std::string absent = detail::absent_columns(t, needed);
    if (!absent.empty())
        fail(cli_codes::column_missing, q.data_path + ": retraining needs " + absent + " (the model's inputs and its target '" +
                                            summary.plan->target_name() + "'), which the data does not have (columns: " +
                                            detail::column_listing(t.column_names()) + ")");

    tenon::retraining_options options;
    options.metric = q.metric;
    options.margin = q.margin;
    options.holdout_share = q.holdout_share;
    options.min_holdout_rows = q.min_holdout;
    options.holdout = q.holdout;
    options.epochs = q.epochs;
    options.seed = q.seed;
    options.time_budget_seconds = q.budget_seconds;
    if (env.clock) options.clock = env.clock;
    std::vector<std::uint8_t> candidate;
    tenon::retraining_report report =
        summary.scalar_bytes == 8 ? detail::retrain_with(tenon::model_file_from_bytes<double>(bytes, limits, q.model_path), t, options, candidate)
                                  : detail::retrain_with(tenon::model_file_from_bytes<float>(bytes, limits, q.model_path), t, options, candidate);
    report.model_path = q.out_path;
    report.rollback_path = rollback;
    report.file_written = report.promoted;
    if (!q.json_path.empty()) json_file.write(tenon::to_json(report) + "\n");
    if (report.promoted) {
        // The incumbent's exact bytes go to the rollback file before the
        // candidate replaces it, so the path never holds a model without its
        // predecessor kept; every file is written and synced first, so a full
        // disk fails before any file (the older rollback among them) changes.
        if (in_place) rollback_file.write(bytes);
        out_file.write(candidate);
        files::commit_all({&rollback_file, &out_file, &json_file});
    } else {
        out_file.discard();
        rollback_file.discard();
        files::commit_all({&json_file});
    }
    if (!q.quiet && !on_standard_output) out << detail::retrain_text(report, q, in_place);
    return report.promoted ? exit_success : exit_kept_incumbent;
}

inline int run_drift(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env) {
    (void)err;
    (void)env;
    const drift_request q = parse_drift_request(args);
    if (q.help) {
        out << drift_help();
        return exit_success;
    }
    files::check_input(tenon::codes::deploy_file_io, "--model", q.model_path);
    files::check_input(tenon::codes::prep_file_open, "--data", q.data_path);
    const tenon::model_file_summary summary = tenon::inspect_model_file(q.model_path);
    if (summary.references.empty())
        fail(cli_codes::model_unusable, q.model_path + ": the model holds no summaries of its training rows (section REFS), so drift cannot be measured");
    const tenon::table t = detail::read_new_rows(q.data_path, summary.plan ? &*summary.plan : nullptr);
    std::vector<std::string> needed;
    for (const auto& r : summary.references) needed.push_back(r.column);
    const std::string absent = detail::absent_columns(t, needed);
    if (!absent.empty())
        fail(cli_codes::column_missing, q.data_path + ": the model reads " + absent + ", which the data does not have (columns: " +
                                            detail::column_listing(t.column_names()) + ")");
    const tenon::drift_report report = tenon::measure_drift(summary.references, t, q.options);
    const int status = report.any_drift() ? exit_drift_flagged : exit_success;
    if (q.json) {
        out << tenon::to_json(report) << "\n";
    } else if (!q.quiet) {
        std::vector<std::string> drifted, watched;
        for (const auto& f : report.features) {
            if (f.drifted()) drifted.push_back(f.column);
            else if (f.status == tenon::drift_status::watch) watched.push_back(f.column);
        }
        std::string s = "drift of " + std::to_string(report.features.size()) + " input columns: " + std::to_string(report.window_rows) +
                        " rows of " + q.data_path + " against the " + std::to_string(summary.references.front().present + summary.references.front().missing) +
                        " training rows of " + q.model_path + "\n\n";
        s += tenon::drift_table(report) + "\n";
        if (drifted.empty()) s += "no column drifted";
        else s += std::to_string(drifted.size()) + " of " + std::to_string(report.features.size()) + " columns drifted: " + detail::join(drifted, ", ");
        if (!watched.empty()) s += "; to watch: " + detail::join(watched, ", ");
        s += " (exit status " + std::to_string(status) + ")\n";
        out << s;
    }
    return status;
}

// ---------------------------------------------------------------------------
// Dispatch

struct subcommand {
    const char* name;
    const char* summary;
    int (*run)(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env);
};

inline const std::vector<subcommand>& subcommands() {
    static const std::vector<subcommand> table{
        {"train", "train a perceptron on a CSV file and score it on held-out rows", &run_train},
        {"infer", "predict with a saved model, one output row per CSV row", &run_infer},
        {"inspect", "describe a saved model: inputs, classes, layers, scores, provenance", &run_inspect},
        {"retrain", "continue training a saved model on new rows; replace it only if it gets better", &run_retrain},
        {"drift", "compare recent rows with the rows a saved model was trained on", &run_drift},
    };
    return table;
}

/// Runs the tool with the given arguments (argv[0] is the program name).
/// Returns the exit status; messages go to `out`, errors to `err`, one line each.
inline int run_cli(int argc, char** argv, std::ostream& out, std::ostream& err, const cli_environment& env) {
    std::vector<std::string> args;
    for (int k = 1; k < argc; ++k) args.emplace_back(argv[k]);
    std::string command = "tenon";
    try {
        if (args.empty()) {
            err << general_help();
            return exit_bad_input;
        }
        if (args[0] == "--help" || args[0] == "-h" || args[0] == "help") {
            if (args[0] == "help" && args.size() > 1) {
                args = {args[1], "--help"};
            } else {
                out << general_help();
                return exit_success;
            }
        }
        if (args[0] == "--version") {
            out << "tenon " << tenon::version_string() << "\n";
            return exit_success;
        }
        for (const auto& c : subcommands()) {
            if (args[0] == c.name) {
                command = std::string("tenon ") + c.name;
                return c.run(std::vector<std::string>(args.begin() + 1, args.end()), out, err, env);
            }
        }
        std::vector<std::string> names;
        for (const auto& c : subcommands()) names.emplace_back(c.name);
        fail(cli_codes::command_unknown, "unknown command '" + args[0] + "' (commands: " + detail::join(names, ", ") + "; see tenon --help)");
    } catch (const std::exception&) {
        out.flush();
        int status = exit_unexpected;
        err << detail::failure_text(command, std::current_exception(), status) << "\n";
        return status;
    }
}

}  // namespace tenon_cli
