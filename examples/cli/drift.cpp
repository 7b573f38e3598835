// `tenon drift`: recent rows compared with the summaries of the training
// rows a saved model keeps; the exit status says whether a column drifted.
#include <algorithm>
#include <string>
#include <vector>

#include "tool_parts.hpp"

namespace tenon_cli {

struct drift_request {
    std::string model_path;
    std::string data_path;
    tenon::drift_options options;
    bool json = false;
    bool quiet = false;
    bool help = false;
};

namespace detail {
namespace {

// The options of `tenon drift`, in the order --help lists them.
const option_entry<drift_request> drift_options[] = {
    {"--model", "MODEL.tnm",
     "a model saved by tenon train --model or tenon retrain\n"
     "(required); it keeps summaries of its training rows.",
     [](drift_request& q, const std::string& v) { q.model_path = file_name("--model", v); }},
    {"--data", "RECENT.csv",
     "recent rows with a header (required): every column\n"
     "the model reads, in any order; others are ignored.\n"
     "The delimiter and decimal commas are told from the\n"
     "file as tenon train tells them.",
     [](drift_request& q, const std::string& v) { q.data_path = file_name("--data", v); }},
    {"--psi-threshold", "X",
     "a column whose population stability index exceeds X\n"
     "is flagged as drifted (default 0.25).",
     [](drift_request& q, const std::string& v) {
         q.options.psi_threshold = parse_real("--psi-threshold", v);
         if (!(q.options.psi_threshold > 0)) fail(cli_codes::option_value, "--psi-threshold '" + v + "': must be positive");
     }},
    {"--psi-watch", "X",
     "a column whose PSI exceeds X (and is not drifted) is\n"
     "marked \"watch\" (default 0.1, or the --psi-threshold\n"
     "when that is lower). Never changes the exit status.\n"
     "A column is marked \"watch\" or \"drifted\" by PSI only\n"
     "when its PSI also exceeds the noise floor: the PSI\n"
     "that unchanged data exceed once in 100 windows of\n"
     "this size (column \"PSI noise\"; see the README).",
     [](drift_request& q, const std::string& v) {
         q.options.psi_watch = parse_real("--psi-watch", v);
         if (!(q.options.psi_watch >= 0)) fail(cli_codes::option_value, "--psi-watch '" + v + "': must be zero or more");
     }},
    {"--ks-threshold", "X",
     "a numeric or date/time column whose Kolmogorov-Smirnov\n"
     "distance D exceeds X is flagged (default 0: the\n"
     "two-sample critical value at --ks-significance).",
     [](drift_request& q, const std::string& v) {
         q.options.ks_threshold = parse_real("--ks-threshold", v);
         if (!(q.options.ks_threshold >= 0 && q.options.ks_threshold <= 1))
             fail(cli_codes::option_value, "--ks-threshold '" + v + "': must lie in [0, 1] (0: the critical value at --ks-significance)");
     }},
    {"--ks-significance", "X", "level of that critical value (default 0.01).",
     [](drift_request& q, const std::string& v) {
         q.options.ks_significance = parse_real("--ks-significance", v);
         if (!(q.options.ks_significance > 0 && q.options.ks_significance < 1))
             fail(cli_codes::option_value, "--ks-significance '" + v + "': must lie strictly between 0 and 1");
     }},
    {"--json", nullptr,
     "print the report as JSON (per column: status, psi,\n"
     "psi_flag, ks, ks_limit, ks_flag, counts and bins).",
     [](drift_request& q, const std::string&) { q.json = true; }},
    {"--quiet", nullptr, "print nothing but errors; the exit status tells.", [](drift_request& q, const std::string&) { q.quiet = true; }},
};

}  // namespace
}  // namespace detail

/// Reads the arguments after `drift`. Throws cli_failure on a bad command line.
drift_request parse_drift_request(const std::vector<std::string>& args) {
    drift_request q;
    const std::vector<std::string> seen = detail::parse_options("drift", args, detail::drift_options, q);
    if (q.help) return q;
    const bool watch_given = detail::was_given(seen, "--psi-watch");
    if (q.model_path.empty()) fail(cli_codes::option_missing, "tenon drift needs --model MODEL.tnm");
    if (q.data_path.empty()) fail(cli_codes::option_missing, "tenon drift needs --data RECENT.csv");
    if (q.json && q.quiet) fail(cli_codes::option_conflict, "--json prints the report and --quiet prints nothing: give one of them");
    // The watch level follows a lower threshold unless it is given.
    if (!watch_given) q.options.psi_watch = std::min(q.options.psi_watch, q.options.psi_threshold);
    if (q.options.psi_watch > q.options.psi_threshold)
        fail(cli_codes::option_conflict,
             "--psi-watch " + tenon::number_to_text(q.options.psi_watch) + " is above --psi-threshold " +
                 tenon::number_to_text(q.options.psi_threshold));
    return q;
}

std::string drift_help() {
    return std::string("tenon drift: compare recent rows with the rows a saved model was trained on\n"
                       "\n"
                       "Usage: tenon drift --model MODEL.tnm --data RECENT.csv [options]\n"
                       "\n") +
        detail::options_help(detail::drift_options) + R"(
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

int run_drift(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env) {
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
        fail(cli_codes::model_unusable,
             q.model_path + ": the model holds no summaries of its training rows (section REFS), so drift cannot be measured");
    const tenon::table t = detail::read_new_rows(q.data_path, summary.plan ? &*summary.plan : nullptr);
    std::vector<std::string> needed;
    for (const auto& r : summary.references) needed.push_back(r.column);
    const std::string absent = detail::absent_columns(t, needed);
    if (!absent.empty())
        fail(cli_codes::column_missing,
             q.data_path + ": the model reads " + absent + ", which the data does not have (columns: " + detail::column_listing(t.column_names()) +
                 ")");
    const tenon::drift_report report = tenon::measure_drift(summary.references, t, q.options);
    const int status = report.any_drift() ? exit_drift_flagged : exit_success;
    if (q.json) {
        out << tenon::to_json(report) << "\n";
    } else if (!q.quiet) {
        std::vector<std::string> drifted, watched;
        for (const auto& f : report.features) {
            if (f.drifted())
                drifted.push_back(f.column);
            else if (f.status == tenon::drift_status::watch)
                watched.push_back(f.column);
        }
        std::string s = "drift of " + std::to_string(report.features.size()) + " input columns: " + std::to_string(report.window_rows) + " rows of " +
            q.data_path + " against the " + std::to_string(summary.references.front().present + summary.references.front().missing) +
            " training rows of " + q.model_path + "\n\n";
        s += tenon::drift_table(report) + "\n";
        if (drifted.empty())
            s += "no column drifted";
        else
            s +=
                std::to_string(drifted.size()) + " of " + std::to_string(report.features.size()) + " columns drifted: " + detail::join(drifted, ", ");
        if (!watched.empty()) s += "; to watch: " + detail::join(watched, ", ");
        s += " (exit status " + std::to_string(status) + ")\n";
        out << s;
    }
    return status;
}

}  // namespace tenon_cli
