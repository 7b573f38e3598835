// `tenon train`: its options (one table for parsing and --help), the
// progress display, a holdout run or K-fold cross-validation, and the
// metrics, report and model files.
#include <algorithm>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <exception>
#include <filesystem>
#include <functional>
#include <limits>
#include <optional>
#include <ostream>
#include <string>
#include <utility>
#include <vector>

#include "tool_parts.hpp"

namespace tenon_cli {
namespace detail {
namespace {

tenon::activation parse_activation_option(const std::string& text) {
    // The tool spells names with hyphens, as command-line words usually are.
    const std::pair<const char*, tenon::activation> names[] = {{"relu", tenon::activation::relu},       {"leaky-relu", tenon::activation::leaky_relu},
                                                               {"elu", tenon::activation::elu},         {"tanh", tenon::activation::tanh},
                                                               {"sigmoid", tenon::activation::sigmoid}, {"softplus", tenon::activation::softplus},
                                                               {"gelu", tenon::activation::gelu}};
    for (const auto& n : names)
        if (text == n.first) return n.second;
    fail(cli_codes::option_value, "--activation '" + text + "': not one of relu, leaky-relu, elu, tanh, sigmoid, softplus, gelu");
}

// --time-format [COLUMN=]FORM[,...]: a bare FORM applies to every date/time
// column (an epoch form to the --time-column), COLUMN=FORM to one column.
// --time-format [COLUMN=]FORM[,...]: a bare FORM applies to every date/time
// column (an epoch form to the --time-column), COLUMN=FORM to one column.
void parse_time_formats(const std::string& value, train_request& q) {
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
        if (eq != std::string::npos && column.empty()) fail(cli_codes::option_value, "--time-format '" + item + "': an empty column name");
        if (column.empty()) {
            if (q.time_format != tenon::time_format::detect)
                fail(cli_codes::option_conflict,
                     "--time-format names two forms for every column: " + std::string(tenon::to_string(q.time_format)) + " and " + text);
            q.time_format = form;
        } else if (!q.column_time_formats.emplace(column, form).second) {
            fail(cli_codes::option_conflict, "--time-format names column '" + column + "' twice");
        }
    }
}

// --ignore, --use, --categorical, --numeric: column names separated by commas.
std::vector<std::string> column_list(const char* option, const std::string& value) {
    std::vector<std::string> list = split_list(value);
    for (const auto& c : list)
        if (c.empty()) fail(cli_codes::option_value, option + std::string(" '") + value + "': an empty column name");
    return list;
}

void parse_fractions(const std::string& value, train_request& q) {
    const auto parts = split_list(value);
    if (parts.size() != 3)
        fail(cli_codes::option_value, "--fractions '" + value + "': expected three numbers TRAIN,VAL,TEST, found " + std::to_string(parts.size()));
    const double train = parse_real("--fractions", parts[0]);
    const double validation = parse_real("--fractions", parts[1]);
    const double test = parse_real("--fractions", parts[2]);
    if (!(train > 0 && train < 1) || !(validation >= 0 && validation < 1) || !(test > 0 && test < 1))
        fail(cli_codes::option_value, "--fractions '" + value + "': train and test must lie strictly between 0 and 1, validation in [0, 1)");
    const double sum = train + validation + test;
    if (std::abs(sum - 1.0) > 1e-6)
        fail(cli_codes::option_value, "--fractions '" + value + "': the fractions sum to " + tenon::number_to_text(sum) + ", not 1");
    q.fractions = {train, validation, test};
}

void parse_hidden(const std::string& value, train_request& q) {
    std::vector<std::size_t>& widths = q.model.hidden.emplace();
    for (const auto& part : split_list(value)) {
        if (part.empty()) fail(cli_codes::option_value, "--hidden '" + value + "': an empty width between commas");
        std::size_t width = 0;
        try {
            width = parse_count("--hidden", part, 1);
        } catch (const cli_failure& e) {
            // The whole list is quoted, then the piece and what is wrong with it.
            const std::string m = e.what();
            fail(cli_codes::option_value, "--hidden '" + value + "': width '" + part + "'" + m.substr(m.find("':") + 1));
        }
        if (width > max_hidden_width)
            fail(cli_codes::option_value,
                 "--hidden '" + value + "': width " + part + " is above the limit of " + std::to_string(max_hidden_width) + " units per layer");
        widths.push_back(width);
    }
    if (widths.size() > max_hidden_layers)
        fail(cli_codes::option_value,
             "--hidden '" + value + "': " + std::to_string(widths.size()) + " layers, above the limit of " + std::to_string(max_hidden_layers));
    std::size_t between = 0;  // weights between hidden layers, before the inputs and outputs are known
    for (std::size_t layer = 1; layer < widths.size(); ++layer) between += widths[layer - 1] * widths[layer];
    if (between > max_hidden_weights)
        fail(cli_codes::option_value,
             "--hidden '" + value + "': " + std::to_string(between) + " weights between the hidden layers, above the limit of " +
                 std::to_string(max_hidden_weights));
}

void parse_learning_rate(const std::string& value, train_request& q) {
    q.model.learning_rate = parse_real("--learning-rate", value);
    if (!(q.model.learning_rate > 0)) fail(cli_codes::option_value, "--learning-rate '" + value + "': must be positive");
    // The tool trains in single precision: a rate below the smallest
    // normal float (about 1.2e-38) rounds to 0 or a denormal and learns
    // nothing; one above the largest float becomes infinite.
    const float as_trained = static_cast<float>(q.model.learning_rate);
    if (!(as_trained >= std::numeric_limits<float>::min() && as_trained <= std::numeric_limits<float>::max()))
        fail(cli_codes::option_value,
             "--learning-rate '" + value + "': outside what single precision (the training's) holds, " + "1.2e-38 to 3.4e38");
}

// The options of `tenon train`, in the order --help lists them.
const option_entry<train_request> train_options[] = {
    {"--data", "FILE.csv",
     "CSV file with a header row (required). Column kinds are\n"
     "inferred: numeric, date/time, or categorical. Empty\n"
     "cells, NA, N/A, n/a, na, NaN, nan, null, NULL, none,\n"
     "None, -, --, #N/A, missing and ? read as missing. A\n"
     "column whose cells are numbers (or dates/times)\n"
     "except for a few (under 10%) is taken for a numeric\n"
     "(date/time) column with typos: the first bad cell is\n"
     "reported. A column at least half numbers or dates\n"
     "that stays categorical is named in a warning. The\n"
     "delimiter and the decimal mark are told from the\n"
     "first rows (see --delimiter).",
     [](train_request& q, const std::string& v) { q.data_path = file_name("--data", v); }, "Data\n"},
    {"--target", "COLUMN",
     "the column the model learns (required). Rows whose target\n"
     "is missing are left out and counted as dropped.",
     [](train_request& q, const std::string& v) { q.target = v; }},
    {"--task", "auto|classify|regress",
     "default auto: classify when the target column is not\n"
     "numeric, or holds 2 to 20 distinct whole numbers (class\n"
     "codes such as 0/1) with at least 5 rows per value on\n"
     "average, saying so in one line; regress otherwise.\n"
     "regress turns the whole-number rule off.",
     [](train_request& q, const std::string& v) {
         const std::pair<const char*, task_choice> names[] = {
             {"auto", task_choice::automatic}, {"classify", task_choice::classify}, {"regress", task_choice::regress}};
         q.task = parse_choice("--task", v, names);
     }},
    {"--ignore", "COL,COL", "columns that are not features (default: none).",
     [](train_request& q, const std::string& v) { q.ignored = column_list("--ignore", v); }},
    {"--use", "COL,COL",
     "keep columns that look like identifiers as features.\n"
     "By default a column is left out, with one line naming\n"
     "it and the reason, when nearly every value is distinct\n"
     "(categorical, 95% of 20 or more rows), when its name\n"
     "reads as an identifier (id, serial, uuid, guid, sn as\n"
     "a word) and it holds more than 20 values, or when it\n"
     "is a whole-number counter rising (or falling) on every\n"
     "row: an identifier does not carry over to new rows.\n"
     "A categorical column with more categories than 10% of\n"
     "the rows gets a warning (too few rows per category).",
     [](train_request& q, const std::string& v) { q.used = column_list("--use", v); }},
    {"--categorical", "COL,COL", "read these columns as categories (a die coded 7 or 9).",
     [](train_request& q, const std::string& v) { q.categorical = column_list("--categorical", v); }},
    {"--numeric", "COL,COL",
     "read these columns as numbers; the first cell that is\n"
     "not one is reported.",
     [](train_request& q, const std::string& v) { q.numeric = column_list("--numeric", v); }},
    {"--delimiter", "D",
     "the field delimiter: , ; tab or |. Default: told from\n"
     "the header and the first 200 rows; refused when two\n"
     "fit.",
     [](train_request& q, const std::string& v) {
         const std::pair<const char*, char> names[] = {{",", ','}, {";", ';'}, {"tab", '\t'}, {"|", '|'}};
         q.delimiter = parse_choice("--delimiter", v == "\t" ? std::string("tab") : v, names);
     }},
    {"--decimal-comma", nullptr,
     "read 59,8 as 59.8 (not with --delimiter ,). Default:\n"
     "on when the delimiter is not a comma and cells such\n"
     "as 59,8 appear. Thousands separators are never read:\n"
     "a file with 1.234,5, with both 59,8 and 3.5, or whose\n"
     "only commas could group thousands (1,234) is refused\n"
     "unless the decimal mark is named.",
     [](train_request& q, const std::string&) { q.decimal_comma = true; }},
    {"--split", "auto|random|stratified|chronological|grouped",
     "default auto: stratified (each class keeps its share\n"
     "in every subset) for classification, random for\n"
     "regression. chronological puts the latest rows in\n"
     "test (needs --time-column); grouped keeps each group\n"
     "in one subset (needs --group-column).",
     [](train_request& q, const std::string& v) {
         const std::pair<const char*, split_choice> names[] = {{"auto", split_choice::automatic},
                                                               {"random", split_choice::random},
                                                               {"stratified", split_choice::stratified},
                                                               {"chronological", split_choice::chronological},
                                                               {"grouped", split_choice::grouped}};
         q.split = parse_choice("--split", v, names);
     },
     "\n"
     "Splitting\n"},
    {"--time-column", "COL", "time column for --split chronological; not a feature.",
     [](train_request& q, const std::string& v) { q.time_column = v; }},
    {"--time-format", "[COL=]FORM[,...]",
     "how time stamps are written: YYYY-MM-DD (ISO 8601,\n"
     "with T or a space, Z or an offset), YYYY/MM/DD,\n"
     "DD.MM.YYYY, DD/MM/YYYY, MM/DD/YYYY, each with an\n"
     "optional HH:MM[:SS[.fff]], or epoch-seconds,\n"
     "epoch-milliseconds. Default: detected per column;\n"
     "slash dates that read both day-first and\n"
     "month-first are refused until this option says\n"
     "which. A bare FORM applies to every date column (an\n"
     "epoch form to the --time-column); COL=FORM to one.\n"
     "The model keeps each column's form and reads new\n"
     "rows the same way.",
     [](train_request& q, const std::string& v) { parse_time_formats(v, q); }},
    {"--time-cycles", nullptr,
     "add hour of day, day of week and day of year as\n"
     "sine/cosine pairs for every date/time feature, and\n"
     "for the --time-column (which gives no other feature).",
     [](train_request& q, const std::string&) { q.time_cycles = true; }},
    {"--group-column", "COL",
     "group column (a machine, a batch) for --split grouped;\n"
     "not a feature.",
     [](train_request& q, const std::string& v) { q.group_column = v; }},
    {"--fractions", "TRAIN,VAL,TEST",
     "default 0.7,0.15,0.15; must sum to 1. Validation rows\n"
     "drive early stopping (VAL may be 0: then no early\n"
     "stopping).",
     [](train_request& q, const std::string& v) { parse_fractions(v, q); }},
    {"--folds", "K",
     "K-fold cross-validation (K >= 2) instead of one\n"
     "holdout: reports the mean and standard deviation of\n"
     "each test metric over the folds. Default: off.",
     [](train_request& q, const std::string& v) { q.folds = parse_count("--folds", v, 2); }},
    {"--hidden", "64,32",
     "hidden layer widths (default: 64,32 under 8192\n"
     "training rows, 128,64 under 32768, else 256,128);\n"
     "at most 65536 units a layer, 64 layers and\n"
     "100000000 weights (inputs x first width, between\n"
     "hidden layers, and last width x outputs).",
     [](train_request& q, const std::string& v) { parse_hidden(v, q); },
     "\n"
     "Preparation (measured on the training rows only)\n"
     "  Numeric and date/time columns: missing cells filled with the median, z-score\n"
     "  scaling. Categorical columns: missing cells filled with the most frequent\n"
     "  category, one-hot encoding, categories unseen in training encode as all\n"
     "  zeros. A 0/1 missing-indicator feature is added for every column with missing\n"
     "  cells among the training rows. Regression targets are z-scored for training;\n"
     "  every reported number is in the target's original units.\n"
     "\n"
     "Model and training\n"},
    {"--activation", "relu|leaky-relu|elu|tanh|sigmoid|softplus|gelu", "hidden activation (default relu).",
     [](train_request& q, const std::string& v) { q.model.hidden_activation = parse_activation_option(v); }},
    {"--loss", "l1|l2|huber|cross-entropy",
     "default cross-entropy for classification, l2 for\n"
     "regression.",
     [](train_request& q, const std::string& v) {
         const std::pair<const char*, tenon::loss_kind> names[] = {{"l1", tenon::loss_kind::l1},
                                                                   {"l2", tenon::loss_kind::l2},
                                                                   {"huber", tenon::loss_kind::huber},
                                                                   {"cross-entropy", tenon::loss_kind::cross_entropy}};
         q.model.loss = parse_choice("--loss", v, names);
         q.model.loss_given = true;
     }},
    {"--optimizer", "gd|momentum|nesterov|adam|adamw|rmsprop|adagrad", "update rule (default adam).",
     [](train_request& q, const std::string& v) {
         const std::pair<const char*, tenon::update_kind> names[] = {
             {"gd", tenon::update_kind::gradient_descent}, {"momentum", tenon::update_kind::momentum}, {"nesterov", tenon::update_kind::nesterov},
             {"adam", tenon::update_kind::adam},           {"adamw", tenon::update_kind::adamw},       {"rmsprop", tenon::update_kind::rmsprop},
             {"adagrad", tenon::update_kind::adagrad}};
         q.model.update = parse_choice("--optimizer", v, names);
     }},
    {"--learning-rate", "X",
     "default 0.001; must be representable in single\n"
     "precision (1.2e-38 to 3.4e38).",
     [](train_request& q, const std::string& v) { parse_learning_rate(v, q); }},
    {"--epochs", "N",
     "most epochs to run (default 1000; early stopping\n"
     "normally ends the run long before).",
     [](train_request& q, const std::string& v) { q.model.epochs = parse_count("--epochs", v, 1); }},
    {"--batch", "N",
     "mini-batch rows (default 32); under mpirun -np P the\n"
     "rows of each process, so P x N rows per step.",
     [](train_request& q, const std::string& v) { q.model.batch_size = parse_count("--batch", v, 1); }},
    {"--keep-order", nullptr,
     "take the training rows in the file's order in every\n"
     "epoch instead of shuffling them (for rows whose order\n"
     "matters, or to compare runs batch by batch).",
     [](train_request& q, const std::string&) { q.model.shuffle = false; }},
    {"--patience", "N",
     "stop after N epochs without a lower validation loss\n"
     "and keep the best epoch's weights (default 15; 0 = run\n"
     "all epochs). The run also waits at least 600 steps\n"
     "after the best epoch (1200 under 100 validation\n"
     "rows) and 1500 steps in all, so a small table is not\n"
     "stopped after a few dozen updates.",
     [](train_request& q, const std::string& v) { q.model.patience = parse_count("--patience", v, 0); }},
    {"--ensemble", "K",
     "average K networks trained from their own seeds\n"
     "(default: 5 under 100000 training rows, else 1);\n"
     "with --threads they train side by side.",
     [](train_request& q, const std::string& v) {
         q.model.ensemble = parse_count("--ensemble", v, 1);
         if (q.model.ensemble > 100) fail(cli_codes::option_value, "--ensemble '" + v + "': at most 100 networks");
     }},
    {"--search", "SECONDS",
     "search hidden widths and depths, learning rates and\n"
     "weight decays by 3-fold cross-validation on the\n"
     "training rows (walk-forward with --split\n"
     "chronological, whole groups with --split grouped)\n"
     "for at most SECONDS of wall-clock time, then train\n"
     "with the best as usual (default: off).\n"
     "Not with --hidden, --learning-rate or --folds.",
     [](train_request& q, const std::string& v) {
         q.search_seconds = parse_real("--search", v);
         if (!(q.search_seconds > 0)) fail(cli_codes::option_value, "--search '" + v + "': must be a positive number of seconds");
     }},
    {"--refit", "auto|on|off",
     "after early stopping has chosen each network's step\n"
     "count on the validation rows, train it again from its\n"
     "own start on the training plus validation rows for\n"
     "that many steps (the baseline too). Default auto: on\n"
     "under 5000 training plus validation rows. The\n"
     "validation scores and the calibration are of the\n"
     "model before the refit; the test rows are never used.",
     [](train_request& q, const std::string& v) {
         const std::pair<const char*, int> names[] = {{"auto", -1}, {"on", 1}, {"off", 0}};
         const int choice = parse_choice("--refit", v, names);
         q.model.refit = choice < 0 ? std::optional<bool>() : std::optional<bool>(choice == 1);
     }},
    {"--class-weights", "none|balanced",
     "classification: weigh each class in the loss (default\n"
     "none); balanced gives class c the weight n / (k n_c)\n"
     "(n training rows, k classes, n_c rows of c), so a rare\n"
     "class counts as much as a common one in total.",
     [](train_request& q, const std::string& v) {
         const std::pair<const char*, tenon::class_weighting> names[] = {{"none", tenon::class_weighting::none},
                                                                         {"balanced", tenon::class_weighting::balanced}};
         q.model.class_weights = parse_choice("--class-weights", v, names);
     }},
    {"--target-scaling", "z-score|median-iqr",
     "regression: how the target is scaled for training\n"
     "(default z-score: mean and standard deviation of the\n"
     "training rows); median-iqr centers on the median and\n"
     "divides by the interquartile range, which a few huge\n"
     "values do not move. Scores are in the target's units\n"
     "either way.",
     [](train_request& q, const std::string& v) {
         const std::pair<const char*, tenon::scaling_method> names[] = {{"z-score", tenon::scaling_method::z_score},
                                                                        {"median-iqr", tenon::scaling_method::median_iqr}};
         q.target_scaling = parse_choice("--target-scaling", v, names);
     }},
    {"--seed", "N",
     "seeds the split, the initial weights and the batch\n"
     "order (default 1). The same seed and data give the\n"
     "same metrics on every run (and under mpirun with the\n"
     "same process count).",
     [](train_request& q, const std::string& v) { q.model.seed = parse_seed("--seed", v); }},
    {"--threads", "N",
     "threads for training (N >= 1, default 1), each large\n"
     "matrix product and the update split across them; the\n"
     "results are the same bits for every N. Built with the\n"
     "BLAS backend, each band of a product is a BLAS call\n"
     "on one thread (the BLAS is set to one thread); the\n"
     "bits then stay the same only where the BLAS computes\n"
     "a band as it computes the whole product.",
     [](train_request& q, const std::string& v) { q.model.threads = parse_count("--threads", v, 1); }},
    {"--coverage", "P",
     "nominal coverage of the calibration (default 0.9,\n"
     "from 0.5 to below 1): regression gets a band\n"
     "(split-conformal, on the validation rows) that\n"
     "holds the true value for about P of new rows like\n"
     "the training rows; classification gets probabilities\n"
     "rescaled by one temperature fitted on the validation\n"
     "rows and a set of likely classes holding the true\n"
     "class for about P of such rows. Needs validation\n"
     "rows (a validation fraction above 0); not with\n"
     "--folds.",
     [](train_request& q, const std::string& v) {
         q.coverage = parse_real("--coverage", v);
         if (!(q.coverage >= 0.5 && q.coverage < 1.0))
             fail(cli_codes::option_value, "--coverage '" + v + "': must be at least 0.5 and below 1 (e.g. 0.9)");
     }},
    {"--metrics", "OUT.json",
     "write the metrics as JSON: task, rows (training,\n"
     "validation, test, dropped), epochs_run, stop_reason,\n"
     "training_seconds (the training loop with validation;\n"
     "reading and preparing data excluded), validation and\n"
     "test scores (accuracy, macro_f1, log_loss; or rmse,\n"
     "mae, r2; with calibration also interval_coverage and\n"
     "interval_mean_width, or set_coverage, set_mean_size,\n"
     "ece_uncalibrated and ece), the calibration and\n"
     "per_epoch records (epoch, training_loss,\n"
     "validation_loss, learning_rate); see the README.",
     [](train_request& q, const std::string& v) { q.metrics_path = file_name("--metrics", v); },
     "\n"
     "Output\n"},
    {"--report", "OUT.svg",
     "write an SVG report: loss per epoch; for\n"
     "classification, the test confusion matrix; with a\n"
     "calibration, the test rows' true values against the\n"
     "predictions with their bands (regression) or a\n"
     "reliability diagram before and after temperature\n"
     "scaling (classification).",
     [](train_request& q, const std::string& v) { q.report_path = file_name("--report", v); }},
    {"--model", "OUT.tnm",
     "save the trained model (network, weights, the\n"
     "measured preparation, the validation and test scores,\n"
     "ranges of the training rows and a sample of them) for\n"
     "tenon infer and tenon inspect. Not with --folds.",
     [](train_request& q, const std::string& v) { q.model_path = file_name("--model", v); }},
    {"--quiet", nullptr, "print nothing but errors.", [](train_request& q, const std::string&) { q.quiet = true; }},
};

}  // namespace
}  // namespace detail

train_request parse_train_request(const std::vector<std::string>& args) {
    train_request q;
    const std::vector<std::string> seen = detail::parse_options("train", args, detail::train_options, q);
    if (q.help) return q;
    if (q.data_path.empty()) fail(cli_codes::option_missing, "tenon train needs --data FILE.csv");
    if (q.target.empty()) fail(cli_codes::option_missing, "tenon train needs --target COLUMN");
    if (q.split == split_choice::chronological && q.time_column.empty())
        fail(cli_codes::option_missing, "--split chronological needs --time-column COLUMN");
    if (q.time_format == tenon::time_format::epoch_seconds || q.time_format == tenon::time_format::epoch_milliseconds) {
        // Epoch numbers look like any other numbers: they are times only in a named column.
        if (q.time_column.empty())
            fail(cli_codes::option_missing,
                 std::string("--time-format ") + tenon::to_string(q.time_format) +
                     " needs --time-column COLUMN, or name the column: --time-format COLUMN=" + tenon::to_string(q.time_format));
        q.column_time_formats.emplace(q.time_column, q.time_format);
        q.time_format = tenon::time_format::detect;
    }
    if (q.split == split_choice::grouped && q.group_column.empty()) fail(cli_codes::option_missing, "--split grouped needs --group-column COLUMN");
    if (!q.metrics_path.empty() && !q.report_path.empty() &&
        std::filesystem::path(q.metrics_path).lexically_normal() == std::filesystem::path(q.report_path).lexically_normal())
        fail(cli_codes::option_conflict, "--metrics and --report name the same file '" + q.metrics_path + "'");
    {
        const std::pair<const char*, const std::string*> outputs[] = {
            {"--metrics", &q.metrics_path}, {"--report", &q.report_path}, {"--model", &q.model_path}};
        for (std::size_t a = 0; a < 3; ++a)
            for (std::size_t b = a + 1; b < 3; ++b)
                if (a + b > 1 && !outputs[a].second->empty() && !outputs[b].second->empty() &&
                    std::filesystem::path(*outputs[a].second).lexically_normal() == std::filesystem::path(*outputs[b].second).lexically_normal())
                    fail(cli_codes::option_conflict,
                         std::string(outputs[a].first) + " and " + outputs[b].first + " name the same file '" + *outputs[a].second + "'");
    }
    if (!q.model_path.empty() && std::filesystem::path(q.model_path).lexically_normal() == std::filesystem::path(q.data_path).lexically_normal())
        fail(cli_codes::option_conflict, "--model and --data name the same file '" + q.model_path + "'");
    if (q.search_seconds > 0) {
        for (const char* chosen : {"--hidden", "--learning-rate"})
            if (std::find(seen.begin(), seen.end(), chosen) != seen.end())
                fail(cli_codes::option_conflict,
                     std::string("--search chooses the hidden layers and the learning rate; it cannot be combined with ") + chosen);
        if (q.folds > 0)
            fail(cli_codes::option_conflict,
                 "--search chooses the settings of one holdout run; it cannot be combined with --folds " + std::to_string(q.folds));
    }
    if (q.folds > 0 && !q.model_path.empty())
        fail(cli_codes::option_conflict,
             "--model saves the model of one holdout run; cross-validation (--folds " + std::to_string(q.folds) +
                 ") trains one model per fold and saves none");
    if (q.folds > 0 && !q.report_path.empty())
        fail(cli_codes::option_conflict, "--report draws one holdout run; it cannot be combined with --folds " + std::to_string(q.folds));
    if (q.folds > 0 && std::find(seen.begin(), seen.end(), "--coverage") != seen.end())
        fail(cli_codes::option_conflict,
             "--coverage calibrates the model of one holdout run on its validation rows; it cannot be combined with --folds " +
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

std::string train_help() {
    return "tenon train: train a multilayer perceptron on a CSV file and score it on held-out rows\n"
           "\n"
           "Usage: tenon train --data FILE.csv --target COLUMN [options]\n"
           "\n" +
        detail::options_help(detail::train_options) +
        "  On a terminal the progress line is redrawn in place; otherwise one line is\n"
        "  printed per epoch. A summary table follows training.\n"
        "\n" +
        detail::files_help() + R"(
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

// ---------------------------------------------------------------------------
// Progress

namespace {

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
    std::string prefix() const { return folds_ > 0 ? "fold " + std::to_string(fold_) + " of " + std::to_string(folds_) + " | " : std::string(); }

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
            line += classify_ ? " | validation accuracy " + detail::fixed(validation_metric_, 4)
                              : " | validation RMSE " + detail::fixed(validation_metric_, 4);
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

}  // namespace

// ---------------------------------------------------------------------------
// Training

namespace detail {

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
std::vector<std::size_t> member_share(const std::vector<std::size_t>& rows, const tenon::training_team& team) {
    std::vector<std::size_t> mine;
    mine.reserve(rows.size() / team.member_count() + 1);
    for (std::size_t i = team.member_index(); i < rows.size(); i += team.member_count()) mine.push_back(rows[i]);
    return mine;
}

void write_scores(json_writer& j, const char* key, const tenon::evaluation& e, const tenon::calibration_scores* c = nullptr) {
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
void write_calibration(json_writer& j, const char* key, const tenon::model_calibration& c) {
    j.open_object(key);
    if (c.interval) {
        const tenon::interval_calibration& i = *c.interval;
        j.open_object("band");
        j.text("method", i.has_spread ? "split-conformal, normalized by the spread" : "split-conformal");
        j.number("coverage", i.coverage).count("rows", i.rows);
        if (std::isfinite(i.half_width))
            j.number("half_width", i.half_width);
        else
            j.null("half_width");
        j.close_object();
    }
    if (c.classes) {
        const tenon::class_calibration& k = *c.classes;
        j.open_object("classes");
        j.text("method", "temperature scaling, conformal class sets (score 1 - p)");
        j.number("coverage", k.coverage).count("rows", k.rows).number("temperature", k.temperature);
        if (std::isfinite(k.set_threshold))
            j.number("set_threshold", k.set_threshold);
        else
            j.null("set_threshold");
        j.close_object();
    }
    j.close_object();
}

// A line saying what the calibration promises, or why there is none.
std::string calibration_note(const tenon::model_calibration* c, double coverage, bool classify) {
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

std::string table_row(const std::string& name, const std::vector<std::string>& cells) {
    char buffer[32];
    std::snprintf(buffer, sizeof buffer, "  %-12s", name.c_str());
    std::string line = buffer;
    for (const auto& c : cells) {
        std::snprintf(buffer, sizeof buffer, "%14s", c.c_str());
        line += buffer;
    }
    return line + "\n";
}

std::string split_name(split_choice s) {
    switch (s) {
    case split_choice::random: return "random";
    case split_choice::stratified: return "stratified";
    case split_choice::chronological: return "chronological";
    case split_choice::grouped: return "grouped";
    case split_choice::automatic: break;
    }
    return "auto";
}

void header_fields(json_writer& j, const train_request& q, const training_setup& s) {
    j.text("tool", std::string("tenon ") + tenon::version_string() + " train");
    j.text("data", q.data_path);
    j.text("target", q.target);
    j.text("task", s.classify ? "classification" : "regression");
    j.text("split", split_name(s.split));
    j.count("seed", q.model.seed);
}

// The scores and the command line's choices that make_model_file cannot know.
void add_scores_to_metadata(tenon::training_metadata& meta, const train_request& q, const training_setup& s, const tenon::evaluation* validation,
                            const tenon::evaluation& test) {
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
    meta.settings.emplace_back("fractions",
                               tenon::number_to_text(q.fractions.train) + "," + tenon::number_to_text(q.fractions.validation) + "," +
                                   tenon::number_to_text(q.fractions.test));
}

// The calibration's test scores, kept with the model for inspect.
void add_calibration_to_metadata(tenon::training_metadata& meta, const tenon::calibration_scores& c) {
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

// The persistence baseline of a series (chronological split, regression):
// each row's target predicted by the target of the row just before it in
// time, the last reading an operator would repeat. Rows without a target,
// or whose predecessor has none, are not scored. Empty when no row can be.
std::optional<tenon::evaluation> last_reading_scores(const tenon::table& t, const train_request& q, const std::vector<std::size_t>& rows) {
    const std::vector<double> times = column_times(t, q.time_column);
    const tenon::column& target = t.at(q.target);
    std::vector<std::size_t> order;
    order.reserve(times.size());
    for (std::size_t r = 0; r < times.size(); ++r)
        if (!std::isnan(times[r])) order.push_back(r);
    std::stable_sort(order.begin(), order.end(), [&](std::size_t a, std::size_t b) { return times[a] < times[b]; });
    std::vector<std::size_t> before(times.size(), t.row_count());  // the row just before in time, or none
    for (std::size_t k = 1; k < order.size(); ++k) before[order[k]] = order[k - 1];
    std::vector<double> truth, repeated;
    for (std::size_t r : rows) {
        const std::size_t p = before[r];
        if (p == t.row_count() || target.is_missing(r) || target.is_missing(p)) continue;
        truth.push_back(target.number(r));
        repeated.push_back(target.number(p));
    }
    if (truth.empty()) return std::nullopt;
    const tenon::regression_scores r = tenon::score_values(truth, repeated);
    tenon::evaluation e;
    e.rows = truth.size();
    e.rmse = r.rmse;
    e.mae = r.mae;
    e.r2 = r.r2;
    return e;
}

// "64,32"
std::string widths_text(const std::vector<std::size_t>& hidden) {
    std::string text;
    for (std::size_t k = 0; k < hidden.size(); ++k) text += (k ? "," : "") + std::to_string(hidden[k]);
    return text;
}

// The one line --search prints: what it tried and what it chose.
std::string search_summary(const tenon::settings_search_result& r) {
    const tenon::search_candidate& c = r.candidates[r.chosen_index];
    const std::string tried = "search: " + std::to_string(r.candidates.size()) + (r.candidates.size() == 1 ? " candidate" : " candidates") + " in " +
        duration_text(r.seconds);
    const std::string settings = "hidden " + widths_text(c.hidden) + ", learning rate " + tenon::number_to_text(c.learning_rate) + ", weight decay " +
        tenon::number_to_text(c.weight_decay);
    if (c.folds_completed == r.folds && !c.cut_short) {
        std::string line = tried + ", chose " + settings + "; mean fold loss " + fixed(c.mean_fold_loss, 4);
        if (r.lowest_index != r.chosen_index)
            line += " (the lowest, " + fixed(r.candidates[r.lowest_index].mean_fold_loss, 4) + ", is within the folds' noise of it)";
        return line;
    }
    return tried + ", none completed its " + std::to_string(r.folds) + " folds within the budget; kept " + settings;
}

void write_search_settings(json_writer& j, const tenon::search_candidate& c) {
    j.open_array("hidden");
    for (auto w : c.hidden) j.count(nullptr, w);
    j.close_array();
    j.number("learning_rate", c.learning_rate).number("weight_decay", c.weight_decay).number("mean_fold_loss", c.mean_fold_loss);
}

// The "search" object of the metrics.
void write_search(json_writer& j, const tenon::settings_search_result& r) {
    j.open_object("search");
    j.number("seconds", r.seconds).number("budget_seconds", r.budget_seconds).count("folds", r.folds);
    j.count("candidates_tried", r.candidates.size()).count("candidates_listed", r.candidates_listed);
    j.count("lowest", r.lowest_index).count("chosen_index", r.chosen_index);
    j.open_object("chosen");
    write_search_settings(j, r.candidates[r.chosen_index]);
    j.close_object();
    j.open_array("candidates");
    for (const auto& c : r.candidates) {
        j.open_object();
        write_search_settings(j, c);
        j.open_array("fold_losses");
        for (double l : c.fold_losses) j.number(nullptr, l);
        j.close_array();
        j.count("folds_completed", c.folds_completed).boolean("cut_short", c.cut_short).number("seconds", c.seconds);
        j.close_object();
    }
    j.close_array();
    j.close_object();
}

// Holdout run.
int train_holdout(const tenon::table& t, const train_request& q, training_setup& s, std::ostream& out, const cli_environment& env,
                  pending_output& metrics_file, pending_output& report_file, pending_output& model_probe) {
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
    // --search: settings chosen by k-fold cross-validation on the training
    // rows alone, with folds that keep the split's rule (time, groups).
    std::optional<tenon::settings_search_result> search;
    if (q.search_seconds > 0) {
        tenon::model_settings start = make_settings(q);
        start.clock = env.clock;
        const std::vector<tenon::fold> folds = search_folds(t, q, s, split.train);
        search = folds.empty() ? tenon::search_settings<float>(t, s.preparation, split.train, start, q.search_seconds)
                               : tenon::search_settings<float>(t, s.preparation, folds, start, q.search_seconds);
        if (!q.quiet) out << search_summary(*search) << "\n";
    }
    progress_printer progress(out, env.terminal, q.quiet, q.model.epochs, env.clock);
    progress.start(0, 0, s.classify, metric_scale);
    tenon::model_settings settings = make_settings(q);
    if (search) {
        settings.hidden = search->chosen.hidden;
        settings.learning_rate = search->chosen.learning_rate;
        settings.weight_decay = search->chosen.weight_decay;
    }
    settings.team = env.team;
    // The tool refits itself (below), after calibrating on the validation
    // rows with the model that did not train on them.
    const tenon::model_settings refit_settings = settings;
    settings.refit = false;
    if (env.team && q.model.refit.value_or(false))
        fail(cli_codes::option_conflict, "--refit on: a model trained by several processes (mpirun) is not refit; give --refit off or auto");
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
    // Calibrated on the validation rows before any refit (the model has not
    // trained on them), scored on the test rows (never trained on).
    std::optional<tenon::model_calibration> calibration;
    tenon::calibration_scores calibrated;
    if (has_validation) calibration = tenon::calibrate_model(model, t, split.validation, q.coverage);
    // The plain baseline on the same rows (fit_model fits it; in a team it has none).
    const bool has_baseline = model.baseline.features > 0;
    tenon::evaluation baseline_validation, baseline_test;
    if (has_baseline && has_validation) baseline_validation = tenon::evaluate_baseline(model, t, split.validation);
    // The refit on training plus validation rows (--refit), after everything
    // that reads the validation rows; the test rows are scored after it.
    const bool cut = model.outcome.reason == tenon::stop_reason::time_budget || model.outcome.reason == tenon::stop_reason::cancelled;
    if (!env.team && has_validation && !cut && tenon::refit_wanted(refit_settings, model.train_rows + model.validation_rows))
        tenon::refit_model(model, t, split.train, split.validation, refit_settings);
    const tenon::evaluation test = tenon::evaluate_model(model, t, split.test);
    if (calibration) calibrated = tenon::score_calibration(model, *calibration, t, split.test);
    if (has_baseline) baseline_test = tenon::evaluate_baseline(model, t, split.test);
    const std::size_t dropped = model.dropped_rows + test.dropped_rows;
    const tenon::training_outcome& o = model.outcome;
    const char* baseline_kind = s.classify ? "logistic regression" : "ridge least squares";
    // A series: the last reading repeated, on the same rows.
    std::optional<tenon::evaluation> last_validation, last_test;
    if (!s.classify && s.split == split_choice::chronological) {
        if (has_validation) last_validation = last_reading_scores(t, q, split.validation);
        last_test = last_reading_scores(t, q, split.test);
    }

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
        if (has_validation)
            write_scores(j, "validation", validation);
        else
            j.null("validation");
        write_scores(j, "test", test, calibration ? &calibrated : nullptr);
        if (has_baseline) {
            j.open_object("baseline").text("kind", baseline_kind);
            if (has_validation)
                write_scores(j, "validation", baseline_validation);
            else
                j.null("validation");
            write_scores(j, "test", baseline_test);
            j.close_object();
        } else {
            j.null("baseline");
        }
        if (last_test) {
            j.open_object("last_reading");
            if (last_validation)
                write_scores(j, "validation", *last_validation);
            else
                j.null("validation");
            write_scores(j, "test", *last_test);
            j.close_object();
        } else {
            j.null("last_reading");
        }
        j.text("shipped", model.kept_baseline ? "baseline" : "network");
        if (search)
            write_search(j, *search);
        else
            j.null("search");
        if (model.refit_rows > 0) {
            j.open_object("refit").count("rows", model.refit_rows).open_array("steps");
            for (const auto steps : model.refit_steps) j.count(nullptr, steps);
            j.close_array().close_object();
        } else {
            j.null("refit");
        }
        if (s.classify)
            j.text("class_weights", tenon::to_string(q.model.class_weights));
        else
            j.text("target_scaling", tenon::to_string(q.target_scaling));
        if (calibration)
            write_calibration(j, "calibration", *calibration);
        else
            j.null("calibration");
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
        if (search) {
            file.metadata->settings.emplace_back("search_seconds", tenon::number_to_text(q.search_seconds));
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
                         fixed(baseline_test.rmse, 4) + " test") +
                "\n";
            if (model.kept_baseline) summary += "the network did not beat the baseline on validation; the model is the baseline\n";
        }
        if (last_test) {
            summary += "last reading repeated: RMSE " + (last_validation ? fixed(last_validation->rmse, 4) + " validation, " : std::string()) +
                fixed(last_test->rmse, 4) + " test\n";
            if (last_validation && has_validation && last_validation->rmse < validation.rmse)
                summary += "the model did not beat repeating the last reading on validation: add the recent readings as inputs\n";
        }
        summary += "\n" + std::to_string(o.history.size()) + " epochs in " + duration_text(o.seconds) + "; " + o.message +
            (o.best_epoch > 0 && o.reason != tenon::stop_reason::no_improvement ? "; kept epoch " + std::to_string(o.best_epoch) : std::string()) +
            "\n";
        summary += calibration_note(calibration ? &*calibration : nullptr, q.coverage, s.classify);
        if (model.refit_rows > 0) {
            std::string steps;
            for (std::size_t k = 0; k < model.refit_steps.size(); ++k) steps += (k ? ", " : "") + std::to_string(model.refit_steps[k]);
            summary += "refit on " + std::to_string(model.refit_rows) + " training + validation rows (" + steps +
                " steps, each network's best on validation); the validation scores and the calibration are of the model before the refit\n";
        }
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
int train_folds(const tenon::table& t, const train_request& q, training_setup& s, std::ostream& out, const cli_environment& env,
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

    progress_printer progress(out, env.terminal, q.quiet, q.model.epochs, env.clock);
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

int run_train(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env) {
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
        if (env.team && q.search_seconds > 0)
            fail(cli_codes::option_conflict,
                 "--search searches in one process; it cannot run under mpirun (search first, then train with its choice)");
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

}  // namespace tenon_cli
