// `tenon retrain`: continued training of a saved model on new rows behind
// a promotion gate; in place with a rollback file, or to a new file.
#include <algorithm>
#include <charconv>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <fstream>
#include <string>
#include <string_view>
#include <utility>
#include <vector>

#include "tool_parts.hpp"

namespace tenon_cli {

struct retrain_request {
    std::string model_path;
    std::string data_path;
    std::string out_path;
    std::string rollback_path;  // empty: "<model>.previous" when --out replaces --model
    std::string json_path;  // empty: none; "-": standard output
    /// The retraining's settings, written straight by the options that name
    /// them (--metric, --margin, --budget, --epochs, --seed, --training-seed,
    /// --threads, --holdout-share, --min-holdout, --holdout): the library's defaults,
    /// but seed 1, as tenon train.
    tenon::retraining_options options = [] {
        tenon::retraining_options o;
        o.seed = 1;
        return o;
    }();
    bool quiet = false;
    bool help = false;
};

namespace detail {
namespace {

// The options of `tenon retrain`, in the order --help lists them.
const option_entry<retrain_request> retrain_options[] = {
    {"--model", "MODEL.tnm", "the incumbent, saved by tenon train --model (required).",
     [](retrain_request& q, const std::string& v) { q.model_path = file_name("--model", v); }},
    {"--data", "NEW.csv",
     "newly collected rows with a header (required): every\n"
     "column the model reads and its target, in any order.\n"
     "Rows the model's frozen preparation cannot encode (a\n"
     "missing target, a class the model has no output for,\n"
     "a missing cell without a fill, text in a numeric\n"
     "column) are left out and counted. The delimiter and\n"
     "decimal commas are told from the file as tenon train\n"
     "tells them.",
     [](retrain_request& q, const std::string& v) { q.data_path = file_name("--data", v); }},
    {"--out", "NEW_MODEL.tnm",
     "where the candidate is written, only if it is\n"
     "promoted (required). It may be the --model file: the\n"
     "incumbent's exact bytes are then kept at the\n"
     "--rollback path first.",
     [](retrain_request& q, const std::string& v) { q.out_path = file_name("--out", v); }},
    {"--margin", "X",
     "how much better the candidate must score on the\n"
     "holdout, in the metric's units (default 0: any\n"
     "strict improvement). An equally good candidate is\n"
     "never promoted.",
     [](retrain_request& q, const std::string& v) {
         q.options.margin = parse_real("--margin", v);
         if (!(q.options.margin >= 0)) fail(cli_codes::option_value, "--margin '" + v + "': must be zero or more, in the gate metric's units");
     }},
    {"--budget", "SECONDS",
     "wall-clock limit for the whole retraining (default 0:\n"
     "none); training stops when it is spent and the gate\n"
     "still decides.",
     [](retrain_request& q, const std::string& v) {
         q.options.time_budget_seconds = parse_real("--budget", v);
         if (!(q.options.time_budget_seconds >= 0)) fail(cli_codes::option_value, "--budget '" + v + "': must be zero (no limit) or more seconds");
     }},
    {"--metric", "auto|accuracy|log-loss|rmse",
     "the gate's metric (default auto: accuracy for\n"
     "classification, RMSE in the target's units for\n"
     "regression).",
     [](retrain_request& q, const std::string& v) {
         const std::pair<const char*, tenon::gate_metric> names[] = {{"auto", tenon::gate_metric::automatic},
                                                                     {"accuracy", tenon::gate_metric::accuracy},
                                                                     {"log-loss", tenon::gate_metric::log_loss},
                                                                     {"rmse", tenon::gate_metric::rmse}};
         q.options.metric = parse_choice("--metric", v, names);
     }},
    {"--epochs", "N",
     "most epochs of continued training (default 30); early\n"
     "stopping on 15% of the training rows, patience 5.\n"
     "Batch size, learning rate and update rule are the\n"
     "model's stored ones (else 32, 0.001, adam).",
     [](retrain_request& q, const std::string& v) { q.options.epochs = parse_count("--epochs", v, 1); }},
    {"--seed", "N",
     "seeds the holdout, the validation rows, the batch\n"
     "order and the replay sample (default 1).",
     [](retrain_request& q, const std::string& v) { q.options.seed = parse_seed("--seed", v); }},
    {"--training-seed", "N",
     "seeds the batch order alone (default: --seed); the\n"
     "holdout, validation and replay rows stay those of\n"
     "--seed, so two runs compare their candidates on one\n"
     "holdout.",
     [](retrain_request& q, const std::string& v) { q.options.training_seed = parse_seed("--training-seed", v); }},
    {"--threads", "N",
     "threads for training (N >= 1, default 1). A seed\n"
     "ensemble's networks are all continued, each from its\n"
     "own weights; with N > 1 they train side by side, one\n"
     "network a thread. The results are the same bits for\n"
     "every N.",
     [](retrain_request& q, const std::string& v) { q.options.threads = parse_count("--threads", v, 1); }},
    {"--holdout-share", "X",
     "share of the usable new rows held out for the gate,\n"
     "never trained on (default 0.2).",
     [](retrain_request& q, const std::string& v) {
         q.options.holdout_share = parse_real("--holdout-share", v);
         if (!(q.options.holdout_share > 0 && q.options.holdout_share < 1))
             fail(cli_codes::option_value, "--holdout-share '" + v + "': must lie strictly between 0 and 1");
     }},
    {"--min-holdout", "N",
     "the holdout's minimum rows (default 30); the new data\n"
     "needs at least N + 1 usable rows.",
     [](retrain_request& q, const std::string& v) { q.options.min_holdout_rows = parse_count("--min-holdout", v, 1); }},
    {"--holdout", "random|latest",
     "the holdout rows: a seeded random choice, or the last\n"
     "rows of NEW.csv for rows in time order (default\n"
     "random).",
     [](retrain_request& q, const std::string& v) {
         const std::pair<const char*, tenon::holdout_selection> names[] = {{"random", tenon::holdout_selection::random},
                                                                           {"latest", tenon::holdout_selection::latest}};
         q.options.holdout = parse_choice("--holdout", v, names);
     }},
    {"--rollback", "PATH",
     "with --out equal to --model: where the replaced model\n"
     "is kept (default MODEL.tnm.previous). Not allowed\n"
     "otherwise.",
     [](retrain_request& q, const std::string& v) { q.rollback_path = file_name("--rollback", v); }},
    {"--json", "OUT.json",
     "write the retraining report as JSON (decision, reason,\n"
     "gate metric, margin, both scores, improvement, both\n"
     "models' coverage on the holdout, row counts,\n"
     "networks, epochs, stop reason, seconds, the file\n"
     "written); '-' prints it instead of the text summary.\n"
     "Written whatever the decision.",
     [](retrain_request& q, const std::string& v) { q.json_path = file_name("--json", v); }},
    {"--quiet", nullptr, "print nothing but errors.", [](retrain_request& q, const std::string&) { q.quiet = true; }},
};

}  // namespace
}  // namespace detail

/// Reads the arguments after `retrain`. Throws cli_failure on a bad command line.
retrain_request parse_retrain_request(const std::vector<std::string>& args) {
    retrain_request q;
    detail::parse_options("retrain", args, detail::retrain_options, q);
    if (q.help) return q;
    if (q.model_path.empty()) fail(cli_codes::option_missing, "tenon retrain needs --model MODEL.tnm");
    if (q.data_path.empty()) fail(cli_codes::option_missing, "tenon retrain needs --data NEW.csv");
    if (q.out_path.empty()) fail(cli_codes::option_missing, "tenon retrain needs --out NEW_MODEL.tnm (it may be the --model file)");
    if (files::same_file(q.out_path, q.data_path)) fail(cli_codes::option_conflict, "--out and --data name the same file '" + q.out_path + "'");
    const bool in_place = files::same_file(q.out_path, q.model_path);
    if (!q.rollback_path.empty()) {
        if (!in_place)
            fail(cli_codes::option_conflict, "--rollback names where the replaced model is kept; it applies only when --out is the --model file");
        if (files::same_file(q.rollback_path, q.model_path))
            fail(cli_codes::option_conflict, "--rollback and --model name the same file '" + q.rollback_path + "'");
        if (files::same_file(q.rollback_path, q.data_path))
            fail(cli_codes::option_conflict, "--rollback and --data name the same file '" + q.rollback_path + "'");
    }
    if (!q.json_path.empty() && q.json_path != "-") {
        const std::pair<const char*, const std::string*> others[] = {
            {"--model", &q.model_path}, {"--data", &q.data_path}, {"--out", &q.out_path}, {"--rollback", &q.rollback_path}};
        for (const auto& other : others)
            if (!other.second->empty() && files::same_file(q.json_path, *other.second))
                fail(cli_codes::option_conflict, std::string("--json and ") + other.first + " name the same file '" + q.json_path + "'");
        if (in_place && q.rollback_path.empty() && files::same_file(q.json_path, tenon::default_rollback_path(q.model_path)))
            fail(cli_codes::option_conflict, "--json names the rollback file '" + q.json_path + "'");
    }
    return q;
}

std::string retrain_help() {
    return std::string("tenon retrain: continue training a saved model on new rows; replace it only if it gets better\n"
                       "\n"
                       "Usage: tenon retrain --model MODEL.tnm --data NEW.csv --out NEW_MODEL.tnm [options]\n"
                       "\n") +
        detail::options_help(detail::retrain_options) + R"(
The candidate starts from the model's weights and trains on the new rows
(minus the holdout) mixed with the sample of training rows the model file
keeps; incumbent and candidate are then scored on the holdout with the same
metric. The candidate file keeps the preparation, gets the new weights, new
reference ranges (for tenon drift) and the continued sample, and is
recalibrated on its validation rows at the model's nominal coverage; the
summary gives both models' coverage (bands or class sets) on the holdout.

)" + detail::files_help("with --out naming --model by any path the retrain is in\n  place and keeps the replaced model at --rollback;") +
        R"(
Exit status
  0 the candidate was promoted and written to --out; 4 the incumbent was kept
  and nothing was written to --out or --rollback; 2 bad command line, model
  file or data (one line on stderr names the problem); 3 an output file could
  not be written; 1 an unexpected failure. On failure no --out, --rollback or
  --json file is created or changed.
)";
}

namespace detail {

template <class T>
tenon::retraining_report retrain_with(const tenon::model_file<T>& incumbent, const tenon::table& t, const tenon::retraining_options& options,
                                      std::vector<std::uint8_t>& candidate_bytes) {
    tenon::retraining_result<T> r = tenon::retrain_model(incumbent, t, options);
    if (r.report.promoted) candidate_bytes = tenon::model_file_to_bytes(r.candidate);
    return std::move(r.report);
}

// Milliseconds below a second (a retraining on a few hundred rows takes a few).
std::string elapsed_text(double seconds) {
    if (std::isfinite(seconds) && seconds >= 0 && seconds < 1) return fixed(seconds * 1000.0, 0) + " ms";
    return duration_text(seconds);
}

std::string retrain_text(const tenon::retraining_report& r, const retrain_request& q, bool in_place) {
    const auto line = [](const char* name, const std::string& value) {
        char buffer[32];
        std::snprintf(buffer, sizeof buffer, "  %-13s", name);
        return buffer + value + "\n";
    };
    std::string s = (r.promoted ? "promoted: " : "kept the incumbent: ") + r.reason + "\n";
    s += line("metric",
              r.metric + (r.higher_is_better ? " (higher is better)" : " (lower is better)") + " on " + std::to_string(r.holdout_rows) +
                  " holdout rows, margin " + significant(r.margin));
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
        s += line("coverage",
                  std::string(sets ? "class sets" : "bands") + " on the holdout, nominal " + significant(r.nominal_coverage) + ": incumbent " +
                      coverage(r.incumbent_coverage, r.incumbent_width) + "; candidate " + coverage(r.candidate_coverage, r.candidate_width) +
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
    s += line("training",
              std::to_string(r.epochs_run) + " epochs, " + std::to_string(r.steps) + " steps, stopped: " + r.stop_reason +
                  (r.stop_message.empty() ? std::string() : " (" + r.stop_message + ")") + "; " + elapsed_text(r.training_seconds) + "; seed " +
                  std::to_string(r.seed) + (r.training_seed != r.seed ? ", training seed " + std::to_string(r.training_seed) : std::string()) +
                  (r.members > 1 ? "; all " + std::to_string(r.members) + " networks of the ensemble continued (epochs and steps: the first's)"
                                 : std::string()));
    s +=
        line("time",
             elapsed_text(r.seconds) + " in all, budget " + (r.time_budget_seconds > 0 ? duration_text(r.time_budget_seconds) : std::string("none")));
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

int run_retrain(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env) {
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
    const bool in_place = files::same_file(q.out_path, q.model_path);
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
        fail(cli_codes::column_missing,
             q.data_path + ": retraining needs " + absent + " (the model's inputs and its target '" + summary.plan->target_name() +
                 "'), which the data does not have (columns: " + detail::column_listing(t.column_names()) + ")");

    tenon::retraining_options options = q.options;
    if (env.clock) options.clock = env.clock;
    std::vector<std::uint8_t> candidate;
    tenon::retraining_report report = summary.scalar_bytes == 8
        ? detail::retrain_with(tenon::model_file_from_bytes<double>(bytes, limits, q.model_path), t, options, candidate)
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

}  // namespace tenon_cli
