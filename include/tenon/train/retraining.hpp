// tenon: retraining on the device, with a promotion gate.
//
// retrain_model() continues training a deployed model (a model_file) on
// newly collected raw rows mixed with the replay sample the file keeps,
// under the file's frozen preparation plan, and promotes the result only
// when it beats the incumbent by at least `margin` on a holdout of the new
// rows that it neither trained nor calibrated on. retrain_model_file() does
// the same for a file on disk, keeping the previous file's bytes for
// roll_back_model_file(); a failure leaves the incumbent at the path.
// The steps, the gate, calibration and the candidate's file: docs/design/retraining.md.
#pragma once

#include <algorithm>
#include <atomic>
#include <chrono>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <exception>
#include <functional>
#include <limits>
#include <memory>
#include <optional>
#include <string>
#include <utility>
#include <vector>

#include "tenon/core/enum_text.hpp"
#include "tenon/core/compiled_once.hpp"
#include "tenon/format/atomic_file.hpp"
#include "tenon/core/json_text.hpp"
#include "tenon/format/model_file.hpp"
#include "tenon/train/authoring.hpp"
#include "tenon/prep/reference.hpp"
#include "tenon/train/calibration.hpp"
#include "tenon/train/metrics.hpp"
#include "tenon/train/trainer.hpp"
#include "tenon/train/workflow.hpp"

TENON_NAMESPACE_BEGIN

/// The metric of the promotion gate.
enum class gate_metric : std::uint8_t {
    automatic,  // accuracy for classification, rmse for regression
    accuracy,  // classification, higher is better
    log_loss,  // classification, lower is better
    rmse,  // regression in the target's original units, lower is better
};

inline const char* to_string(gate_metric m) noexcept {
    switch (m) {
    case gate_metric::automatic: return "automatic";
    case gate_metric::accuracy: return "accuracy";
    case gate_metric::log_loss: return "log_loss";
    case gate_metric::rmse: return "rmse";
    }
    return "unknown";
}
/// The former spelling of to_string(gate_metric).
inline const char* gate_metric_name(gate_metric v) noexcept { return to_string(v); }

/// Parses automatic, accuracy, log_loss or rmse (deploy.retrain.option otherwise).
inline gate_metric parse_gate_metric(const std::string& name) {
    gate_metric v{};
    if (!enum_from_text(name, v)) raise(codes::deploy_retrain_option, "unknown gate metric '" + name + "' (" + enum_choices<gate_metric>() + ")");
    return v;
}

inline bool higher_is_better(gate_metric m) noexcept { return m == gate_metric::accuracy; }

/// How the holdout is chosen among the usable new rows.
enum class holdout_selection : std::uint8_t {
    random,  // seeded uniform choice
    latest,  // the last rows of the new table (rows in time order)
};

/// The run_controls part (time budget, clock, cancel flag, observers)
/// covers the whole call: the candidate's training gets what is left of
/// the budget.
struct retraining_options : run_controls {
    // --- the promotion gate ---
    gate_metric metric = gate_metric::automatic;
    /// How much better the candidate must score, in the metric's units (>= 0).
    double margin = 0.0;
    /// Share of the usable new rows held out for the gate, in (0, 1).
    double holdout_share = 0.2;
    /// The holdout's minimum size (>= 1); fewer usable new rows than this
    /// plus one raise deploy.retrain.too_few_rows.
    std::size_t min_holdout_rows = 30;
    holdout_selection holdout = holdout_selection::random;

    // --- training ---
    /// Epochs of continued training (0: no training; the candidate is the incumbent).
    std::size_t epochs = 30;
    /// Default: the model's stored setting, else 32 / 1e-3 / adam.
    std::optional<std::size_t> batch_size;
    std::optional<double> learning_rate;
    std::optional<update_kind> update;
    /// Decoupled weight decay (adam, adamw). Default: the model's stored
    /// setting when the rule in use has one, else 0.
    std::optional<double> weight_decay;
    /// Early stopping on a `validation_share` of the training mix, in [0, 1) (0: none).
    std::size_t patience = 5;
    double validation_share = 0.15;
    /// Seeds the holdout, the validation rows, the replay sample and, unless
    /// `training_seed` is given, the batch order.
    std::uint64_t seed = 0;
    /// Seeds the batch order alone (default `seed`): member k of an
    /// ensemble trains with training_seed + k x 0x9E3779B97F4A7C15, as
    /// fit_model seeds its members; the rows chosen stay those of `seed`.
    std::optional<std::uint64_t> training_seed;
    /// Threads for training (the calling thread included): with more than
    /// 1, retrain_model starts a thread_pool of this size for the call; an
    /// ensemble's members then train side by side, each on one thread, else
    /// the matrix products are split. Results do not depend on it (unless a
    /// time budget runs out: members one after the other get an even share
    /// of what is left each, members side by side all of it).
    std::size_t threads = 1;
    /// A host's own executor (core/parallel.hpp); when given, `threads` is
    /// ignored and no thread is started.
    executor* workers = nullptr;
    /// Nominal coverage of the candidate's calibration, in (0, 1); default
    /// the incumbent's, else default_coverage.
    std::optional<double> coverage;

    // --- the replay sample ---
    /// Mix the stored replay rows into training.
    bool use_replay = true;
    /// The sample's size bound; 0 = keep the stored one (256 when unknown).
    std::size_t replay_capacity = 0;

    // --- the candidate's file ---
    /// Creation time in seconds since 1970; default the system clock.
    std::optional<std::int64_t> created_unix_seconds;
    /// Histogram bins of the new reference summaries; 0 = as the incumbent's (or 10).
    std::size_t histogram_bins = 0;
    /// Earlier trainings kept in the candidate's history (section HIST): the
    /// incumbent's history plus the incumbent's own metadata, the most
    /// recent `history_limit` of them (0 keeps none). The count of
    /// retrainings in the metadata ("retrainings") counts all.
    std::size_t history_limit = 64;
};

/// The gate's verdict on two scores.
struct gate_decision {
    bool promoted = false;
    /// How much better the candidate scored, in the metric's units (> 0: better).
    double improvement = 0.0;
    std::string reason;
};

/// Decides promotion (see docs/design/retraining.md): the candidate must be
/// strictly better and better by at least `margin`.
inline gate_decision decide_promotion(gate_metric metric, double incumbent_score, double candidate_score, double margin) {
    if (metric == gate_metric::automatic)
        raise(codes::deploy_retrain_option, "decide_promotion: resolve the automatic metric to accuracy, log_loss or rmse first");
    if (!(margin >= 0.0 && std::isfinite(margin)))
        raise(codes::deploy_retrain_option, "decide_promotion: the margin must be finite and non-negative, got " + std::to_string(margin));
    gate_decision d;
    d.improvement = higher_is_better(metric) ? candidate_score - incumbent_score : incumbent_score - candidate_score;
    const std::string name = gate_metric_name(metric);
    if (!std::isfinite(candidate_score)) {
        d.improvement = std::numeric_limits<double>::quiet_NaN();
        d.reason = "the candidate's " + name + " is not finite";
    } else if (!std::isfinite(incumbent_score)) {
        d.promoted = true;
        d.improvement = std::numeric_limits<double>::infinity();
        d.reason = "the incumbent's " + name + " is not finite, the candidate's is";
    } else if (!(d.improvement > 0.0)) {
        d.reason = "the candidate is not better on the holdout (" + name + " " + detail::short_number(candidate_score) + ", incumbent " +
            detail::short_number(incumbent_score) + ")";
    } else if (d.improvement < margin) {
        d.reason = "the candidate is better by " + detail::short_number(d.improvement) + " " + name + ", less than the margin " +
            detail::short_number(margin);
    } else {
        d.promoted = true;
        d.reason = "the candidate is better by " + detail::short_number(d.improvement) + " " + name + " (" + detail::short_number(candidate_score) +
            " vs " + detail::short_number(incumbent_score) + "), at least the margin " + detail::short_number(margin);
    }
    return d;
}

/// What a retraining did and decided.
struct retraining_report {
    bool promoted = false;
    std::string decision;  // "promoted" or "kept_incumbent"
    std::string reason;
    // the gate
    std::string metric;  // accuracy, log_loss or rmse
    bool higher_is_better = false;
    double margin = 0.0;
    double incumbent_score = std::numeric_limits<double>::quiet_NaN();
    double candidate_score = std::numeric_limits<double>::quiet_NaN();
    double improvement = std::numeric_limits<double>::quiet_NaN();
    // calibration, on the holdout (NaN where a model has none)
    std::string coverage_measure;  // "interval" (band) or "class_set"
    double nominal_coverage = std::numeric_limits<double>::quiet_NaN();
    double incumbent_coverage = std::numeric_limits<double>::quiet_NaN();
    double candidate_coverage = std::numeric_limits<double>::quiet_NaN();
    double incumbent_width = std::numeric_limits<double>::quiet_NaN();  // mean band width or mean set size
    double candidate_width = std::numeric_limits<double>::quiet_NaN();
    // rows
    std::size_t new_rows = 0;  // rows of the new table
    std::size_t new_rows_refused = 0;  // of those, not usable with the frozen plan
    std::size_t refused_missing_target = 0;
    std::size_t refused_unseen_class = 0;
    std::size_t refused_unseen_category = 0;
    std::size_t refused_missing_value = 0;
    std::size_t refused_not_numeric = 0;
    std::size_t holdout_rows = 0;  // new rows scored by the gate only
    std::size_t new_training_rows = 0;  // new rows in the training mix
    std::size_t replay_rows = 0;  // stored replay rows in the training mix
    std::size_t replay_rows_refused = 0;  // stored replay rows the plan could not encode
    std::size_t training_rows = 0;  // rows trained on (mix minus validation)
    std::size_t validation_rows = 0;  // rows of the mix used for early stopping
    std::uint64_t replay_rows_after = 0;  // the candidate's replay sample
    std::uint64_t replay_rows_seen_after = 0;
    // training (epochs, steps and stop reason: of the first member;
    // training_seconds: of all members)
    std::size_t members = 1;  // networks of the incumbent and of the candidate
    std::size_t epochs_run = 0;
    std::uint64_t steps = 0;
    std::string stop_reason;
    std::string stop_message;
    /// The seeds used: `seed` (holdout, validation rows, replay sample) and
    /// the batch order's (options.training_seed, else `seed`), so that a
    /// retraining can be repeated from its report.
    std::uint64_t seed = 0;
    std::uint64_t training_seed = 0;
    double training_seconds = 0.0;
    double seconds = 0.0;  // the whole call, by the options' clock
    double time_budget_seconds = 0.0;
    // files (retrain_model_file only)
    std::string model_path;
    std::string rollback_path;
    bool file_written = false;
};

/// The report and the candidate's file (also when it was not promoted).
template <class T>
struct retraining_result {
    retraining_report report;
    model_file<T> candidate;
};

/// Offers `rows` of `t` to the replay sample's reservoir, continuing
/// Algorithm R (reservoir_slot) from the stored rows seen, capacity and
/// engine, so that every row offered over all calls stays in the sample
/// with equal probability capacity / rows seen. Cells come from the
/// columns of `t` with the sample's column names (missing where `t` has no
/// such column). Raises core.argument.invalid when the sample has no
/// reservoir state (capacity 0 or no engine: see retrain_model for files
/// written before it was stored).
inline void extend_replay_sample(replay_sample& s, const table& t, const std::vector<std::size_t>& rows) {
    if (s.capacity == 0 || !s.engine || s.rows_seen < s.rows() || s.capacity < s.rows())
        raise(codes::core_argument_invalid,
              "extend_replay_sample: the sample has no valid reservoir state (rows seen " + std::to_string(s.rows_seen) + ", capacity " +
                  std::to_string(s.capacity) + ", " + std::to_string(s.rows()) + " rows held)");
    const std::size_t columns = s.columns.size();
    std::vector<const column*> sources(columns, nullptr);
    for (std::size_t k = 0; k < columns; ++k)
        if (t.contains(s.columns[k])) sources[k] = &t.at(s.columns[k]);
    for (auto r : rows)
        if (r >= t.row_count())
            raise(codes::prep_rows_out_of_range, "extend_replay_sample: row " + std::to_string(r) + " is not below " + std::to_string(t.row_count()));
    random_engine engine;
    engine.set_state(*s.engine);
    const auto write_row = [&](std::size_t slot, std::size_t r) {
        for (std::size_t k = 0; k < columns; ++k) {
            const column* c = sources[k];
            const bool missing = c == nullptr || c->is_missing(r);
            s.missing[slot * columns + k] = missing ? 1 : 0;
            s.cells[slot * columns + k] = missing       ? std::string()
                : c->kind() == column_kind::categorical ? c->category(r)
                                                        : number_to_text(c->number(r));
        }
    };
    for (auto r : rows) {
        const std::uint64_t slot = reservoir_slot(engine, s.rows_seen, s.capacity);
        ++s.rows_seen;
        if (slot < s.rows()) {
            write_row(static_cast<std::size_t>(slot), r);
        } else if (slot < s.capacity) {
            s.cells.resize(s.cells.size() + columns);
            s.missing.resize(s.missing.size() + columns);
            write_row(static_cast<std::size_t>(s.rows() - 1), r);
        }
    }
    s.engine = engine.state();
}

namespace detail {

// Why a row cannot be used with the frozen plan.
enum class refusal : std::uint8_t { none, missing_target, unseen_class, unseen_category, missing_value, not_numeric };

// One raw cell from either source.
struct raw_cell {
    bool missing = true;
    bool is_number = false;  // number holds the value; else text
    double number = 0.0;
    std::string text;
};

inline raw_cell cell_of_table(const column& c, std::size_t r) {
    raw_cell v;
    if (c.is_missing(r)) return v;
    v.missing = false;
    if (c.kind() == column_kind::categorical)
        v.text = c.category(r);
    else {
        v.is_number = true;
        v.number = c.number(r);
    }
    return v;
}

// Builds the rows the frozen plan reads (its input columns and the target)
// from replay cells and new table rows, refusing the rows it cannot encode.
class mix_builder {
public:
    explicit mix_builder(const measured_plan& p) : plan_(p) {
        for (const auto& name : p.input_columns()) {
            names_.push_back(name);
            kinds_.push_back(p.feature_kind(name));
        }
        names_.push_back(p.target_name());
        kinds_.push_back(p.target_type() == target_kind::classification ? column_kind::categorical : column_kind::numeric);
        for (std::size_t k = 0; k < names_.size(); ++k) mix_.add_column(names_[k], kinds_[k]);
    }

    const std::vector<std::string>& names() const noexcept { return names_; }
    table& mix() noexcept { return mix_; }

    // Checks one row (cells in names() order) and appends it when usable;
    // a refused row's column and cell text are kept for describe_refusal().
    refusal add(std::vector<raw_cell>& cells) {
        const std::size_t target = names_.size() - 1;
        double value = 0.0;
        if (cells[target].missing) return refuse(target, cells[target], refusal::missing_target);
        if (plan_.target_type() == target_kind::classification) {
            if (cells[target].is_number) cells[target] = text_cell(number_to_text(cells[target].number));
            if (plan_.classes().find(cells[target].text) < 0) return refuse(target, cells[target], refusal::unseen_class);
        } else if (!cells[target].is_number) {
            if (!parse_number(trim_blanks(cells[target].text), value)) return refuse(target, cells[target], refusal::not_numeric);
            cells[target] = number_cell(value);
        }
        for (std::size_t k = 0; k < target; ++k) {
            raw_cell& c = cells[k];
            if (c.missing) {
                if (plan_.feature_fill(names_[k]).method == fill_method::none) return refuse(k, c, refusal::missing_value);
                continue;
            }
            if (kinds_[k] == column_kind::categorical) {
                if (c.is_number) c = text_cell(number_to_text(c.number));
                const one_hot_layout& layout = plan_.feature_categories(names_[k]);
                if (layout.find(c.text) < 0 && layout.policy() == unseen_policy::fail) return refuse(k, c, refusal::unseen_category);
            } else if (!c.is_number) {
                const std::string_view text = trim_blanks(c.text);
                const bool ok = kinds_[k] == column_kind::datetime
                    ? parse_datetime(text, plan_.feature_time_form(names_[k]), value) || parse_number(text, value)
                    : parse_number(text, value);
                if (!ok) return refuse(k, c, refusal::not_numeric);
                c = number_cell(value);
            }
        }
        for (std::size_t k = 0; k < cells.size(); ++k) {
            column& col = mix_[k];
            if (cells[k].missing)
                col.push_missing();
            else if (kinds_[k] == column_kind::categorical)
                col.push_category(cells[k].text);
            else
                col.push_number(cells[k].number);
        }
        return refusal::none;
    }

    /// Why the last refused row was refused, in the data's terms: "column
    /// 'valve' holds 'wide', a category the model has not seen".
    std::string describe_refusal() const {
        const bool is_target = refused_column_ + 1 == names_.size();
        const std::string column = "column '" + names_[refused_column_] + "'" + (is_target ? " (the target)" : "");
        const std::string value = "'" + refused_text_ + "'";
        switch (refused_why_) {
        case refusal::missing_target: return column + " is empty or missing";
        case refusal::unseen_class: return column + " holds " + value + ", a class the model does not know";
        case refusal::unseen_category: return column + " holds " + value + ", a category the model has not seen";
        case refusal::missing_value: return column + " is empty or missing, and the model has no fill for it";
        case refusal::not_numeric:
            return column + " holds " + value + ", not a number" + (kinds_[refused_column_] == column_kind::datetime ? " or a time" : "");
        case refusal::none: break;
        }
        return column;
    }

private:
    static raw_cell text_cell(std::string t) {
        raw_cell c;
        c.missing = false;
        c.text = std::move(t);
        return c;
    }
    static raw_cell number_cell(double v) {
        raw_cell c;
        c.missing = false;
        c.is_number = true;
        c.number = v;
        return c;
    }

    refusal refuse(std::size_t column, const raw_cell& cell, refusal why) {
        refused_column_ = column;
        refused_why_ = why;
        refused_text_ = cell.missing ? std::string() : cell.is_number ? number_to_text(cell.number) : cell.text;
        // A cell may be megabytes long: the message shows its start.
        constexpr std::size_t shown = 60;
        if (refused_text_.size() > shown) {
            std::size_t cut = shown;
            while (cut > 0 && (static_cast<unsigned char>(refused_text_[cut]) & 0xC0) == 0x80) --cut;  // not inside a UTF-8 character
            refused_text_ = refused_text_.substr(0, cut) + "... (" + std::to_string(refused_text_.size()) + " bytes)";
        }
        return why;
    }

    const measured_plan& plan_;
    std::vector<std::string> names_;
    std::vector<column_kind> kinds_;
    table mix_{"retraining rows"};
    std::size_t refused_column_ = 0;
    refusal refused_why_ = refusal::none;
    std::string refused_text_;
};

inline std::string setting_of(const std::optional<training_metadata>& meta, const std::string& key) {
    if (!meta) return {};
    for (const auto& kv : meta->settings)
        if (kv.first == key) return kv.second;
    return {};
}

inline void check_retraining_options(const retraining_options& o) {
    const auto fail = [](const std::string& what) { raise(codes::deploy_retrain_option, "retraining options: " + what); };
    if (!(o.margin >= 0.0 && std::isfinite(o.margin))) fail("margin must be finite and non-negative, got " + std::to_string(o.margin));
    if (!(o.holdout_share > 0.0 && o.holdout_share < 1.0)) fail("holdout_share must be in (0, 1), got " + std::to_string(o.holdout_share));
    if (o.min_holdout_rows == 0) fail("min_holdout_rows must be at least 1");
    if (!(o.validation_share >= 0.0 && o.validation_share < 1.0))
        fail("validation_share must be in [0, 1), got " + std::to_string(o.validation_share));
    if (o.coverage && !(*o.coverage > 0.0 && *o.coverage < 1.0)) fail("coverage must be in (0, 1), got " + number_to_text(*o.coverage));
    if (o.batch_size && *o.batch_size == 0) fail("batch_size must be at least 1");
    if (o.learning_rate && !(*o.learning_rate > 0.0 && std::isfinite(*o.learning_rate)))
        fail("learning_rate must be positive and finite, got " + std::to_string(*o.learning_rate));
    if (o.weight_decay && !(*o.weight_decay >= 0.0 && std::isfinite(*o.weight_decay)))
        fail("weight_decay must be a finite number, at least 0, got " + number_to_text(*o.weight_decay));
    if (!(o.time_budget_seconds >= 0.0)) fail("time_budget_seconds must not be negative, got " + std::to_string(o.time_budget_seconds));
    if (o.threads == 0) fail("threads must be at least 1");
}

// The gate's score of a network on prepared holdout rows.
template <class T>
double gate_score(const network<T>& net, const measured_plan& p, const prepared_rows<T>& rows, gate_metric metric) {
    matrix<T> out = network_outputs(net, rows.features);
    if (metric == gate_metric::rmse) {
        const scaling& ts = p.target_scaling();
        std::vector<double> truth(rows.rows.size()), values(rows.rows.size());
        for (std::size_t i = 0; i < truth.size(); ++i) {
            truth[i] = ts.inverse(static_cast<double>(rows.targets.data()[i]));
            values[i] = ts.inverse(static_cast<double>(out.data()[i]));
        }
        return score_values(truth, values).rmse;
    }
    const matrix<T> probabilities = softmax_rows(out);
    const std::vector<std::size_t> truth(rows.classes.begin(), rows.classes.end());
    if (metric == gate_metric::log_loss) return log_loss(probabilities, truth);
    return score_classes(truth, row_argmax(probabilities), p.class_count()).accuracy;
}

// A model file's networks: one, or every member of a seed ensemble (the
// network of WGHT first, then the member sections in order).
template <class T>
std::vector<network<T>> networks_of(const model_file<T>& file) {
    std::vector<network<T>> nets;
    for (std::size_t k = 0; k <= file.members.size(); ++k) nets.push_back(rebuild_member(file, k));
    return nets;
}

// Pointers to the networks, in order (for the averaging and calibration
// views, which take a list of networks).
template <class T>
std::vector<network<T>*> pointers_to(std::vector<network<T>>& nets) {
    std::vector<network<T>*> out;
    for (auto& n : nets) out.push_back(&n);
    return out;
}

// The same, read-only.
template <class T>
std::vector<const network<T>*> pointers_to(const std::vector<network<T>>& nets) {
    std::vector<const network<T>*> out;
    for (const auto& n : nets) out.push_back(&n);
    return out;
}

// The networks' mean (fit_model's averaged_outputs).
template <class T>
matrix<T> mean_outputs(const std::vector<network<T>>& nets, const measured_plan& plan, const matrix<T>& features) {
    return averaged_outputs(pointers_to(nets), plan.target_type() == target_kind::classification, features);
}

// What calibration sees of the networks (calibration.hpp's ensemble_outputs).
template <class T>
ensemble_view<T> calibration_view(const std::vector<network<T>>& nets, const measured_plan& plan, const prepared_rows<T>& rows) {
    return ensemble_outputs(pointers_to(nets), plan, rows);
}

// The gate's score of one network or a seed ensemble (on its mean).
template <class T>
double gate_score(const std::vector<network<T>>& nets, const measured_plan& p, const prepared_rows<T>& rows, gate_metric metric) {
    const matrix<T> out = mean_outputs(nets, p, rows.features);  // probabilities or prepared values
    if (metric == gate_metric::rmse) {
        const scaling& ts = p.target_scaling();
        std::vector<double> truth(rows.rows.size()), values(rows.rows.size());
        for (std::size_t i = 0; i < truth.size(); ++i) {
            truth[i] = ts.inverse(static_cast<double>(rows.targets.data()[i]));
            values[i] = ts.inverse(static_cast<double>(out.data()[i]));
        }
        return score_values(truth, values).rmse;
    }
    const std::vector<std::size_t> truth(rows.classes.begin(), rows.classes.end());
    if (metric == gate_metric::log_loss) return log_loss(out, truth);
    return score_classes(truth, row_argmax(out), p.class_count()).accuracy;
}

// The stored calibration's part for the target kind, if any.
inline const interval_calibration* stored_interval(const std::optional<model_calibration>& c) { return c && c->interval ? &*c->interval : nullptr; }
inline const class_calibration* stored_classes(const std::optional<model_calibration>& c) { return c && c->classes ? &*c->classes : nullptr; }

// Coverage and width (mean band width or mean set size) of a calibration on prepared rows.
template <class T>
std::pair<double, double> coverage_of(network<T>& net, const measured_plan& plan, const model_calibration& c, const prepared_rows<T>& rows) {
    const calibration_scores s = score_calibration(net, plan, c, rows);
    return s.classification ? std::make_pair(s.set_coverage, s.set_mean_size) : std::make_pair(s.interval_coverage, s.interval_mean_width);
}

// The same for one network or a seed ensemble, as
// score_calibration(fitted_model) scores a fitted model.
template <class T>
std::pair<double, double> coverage_of(std::vector<network<T>>& nets, const measured_plan& plan, const model_calibration& c,
                                      const prepared_rows<T>& rows) {
    require_rows(rows, "score_calibration");
    const ensemble_view<T> v = calibration_view(nets, plan, rows);
    const calibration_scores s = score_outputs(plan, c, v.outputs, v.has_spread ? &v.spread : nullptr, rows);
    return s.classification ? std::make_pair(s.set_coverage, s.set_mean_size) : std::make_pair(s.interval_coverage, s.interval_mean_width);
}

// Continues the replay sample over the offered rows of `mix` (reservoir_slot).
inline replay_sample continue_replay(const std::optional<replay_sample>& stored, const std::optional<training_metadata>& meta, const table& new_rows,
                                     const std::vector<std::size_t>& offered, const retraining_options& o) {
    replay_sample s;
    if (stored) {
        s = *stored;
    } else {
        for (std::size_t k = 0; k < new_rows.column_count(); ++k) {
            s.columns.push_back(new_rows[k].name());
            s.kinds.push_back(new_rows[k].kind());
        }
    }
    const std::uint64_t held = s.rows();
    // Files written before the reservoir state was stored: the rows seen are
    // at least the training rows, and a sample smaller than them was full.
    if (stored && s.rows_seen == 0) {
        const std::uint64_t trained = meta ? meta->training_rows : 0;
        s.rows_seen = std::max(held, trained);
        s.capacity = s.rows_seen > held ? held : (o.replay_capacity ? o.replay_capacity : std::max<std::uint64_t>(held, 256));
    }
    if (s.capacity == 0) s.capacity = o.replay_capacity ? o.replay_capacity : 256;
    random_engine engine(o.seed ^ s.rows_seen, replay_engine_stream + 1);
    if (s.engine) engine.set_state(*s.engine);
    const std::size_t columns = s.columns.size();
    if (o.replay_capacity > 0 && o.replay_capacity != s.capacity) {
        if (o.replay_capacity > s.capacity && s.rows_seen > held)
            raise(codes::deploy_retrain_option,
                  "retraining: the replay sample has dropped rows at capacity " + std::to_string(s.capacity) + ", so it cannot grow to " +
                      std::to_string(o.replay_capacity) + " and stay uniform (keep the capacity or start a new sample)");
        if (o.replay_capacity < held) {
            // A uniform subset of a uniform sample is uniform.
            std::vector<std::size_t> keep(static_cast<std::size_t>(held));
            for (std::size_t i = 0; i < keep.size(); ++i) keep[i] = i;
            engine.shuffle(keep.begin(), keep.end());
            keep.resize(o.replay_capacity);
            std::sort(keep.begin(), keep.end());
            std::vector<std::string> cells;
            std::vector<std::uint8_t> missing;
            for (auto r : keep)
                for (std::size_t k = 0; k < columns; ++k) {
                    cells.push_back(s.cells[r * columns + k]);
                    missing.push_back(s.missing[r * columns + k]);
                }
            s.cells = std::move(cells);
            s.missing = std::move(missing);
        }
        s.capacity = o.replay_capacity;
    }
    s.engine = engine.state();
    extend_replay_sample(s, new_rows, offered);
    return s;
}

}  // namespace detail

/// Retrains `incumbent` on `new_rows` (raw rows with the plan's input
/// columns and target) and decides on promotion; see docs/design/retraining.md.
/// Raises deploy.model.missing_section when the file has no plan (or its
/// plan no target), deploy.input.missing_column when the new rows lack a
/// column the plan reads or the target, deploy.retrain.option for options
/// out of range and deploy.retrain.too_few_rows when fewer than
/// min_holdout_rows + 1 new rows are usable.
template <class T>
retraining_result<T> retrain_model(const model_file<T>& incumbent, const table& new_rows, const retraining_options& options = {}) {
    TENON_REQUIRE_SCALAR(T);
    detail::check_retraining_options(options);
    const std::function<double()> clock = options.clock ? options.clock : std::function<double()>(detail::steady_seconds);
    const double start = clock();
    if (!incumbent.plan || !incumbent.plan->has_target())
        raise(codes::deploy_model_missing_section, "retrain_model: the model file has no preparation plan with a target (section PLAN)");
    const measured_plan& plan = *incumbent.plan;
    const bool classify = plan.target_type() == target_kind::classification;
    gate_metric metric = options.metric == gate_metric::automatic ? (classify ? gate_metric::accuracy : gate_metric::rmse) : options.metric;
    if (classify == (metric == gate_metric::rmse))
        raise(codes::deploy_retrain_option,
              std::string("retrain_model: the gate metric ") + gate_metric_name(metric) + " does not fit a " +
                  (classify ? "classification" : "regression") + " model");

    retraining_result<T> result;
    retraining_report& report = result.report;
    report.metric = gate_metric_name(metric);
    report.higher_is_better = higher_is_better(metric);
    report.margin = options.margin;
    report.time_budget_seconds = options.time_budget_seconds;
    report.new_rows = new_rows.row_count();

    // --- 1. the rows, through the frozen plan ---
    detail::mix_builder builder(plan);
    for (const auto& name : builder.names())
        if (!new_rows.contains(name))
            raise(codes::deploy_input_missing_column, "retrain_model: the new rows have no column '" + name + "' (the model reads it)");
    std::vector<detail::raw_cell> cells(builder.names().size());
    std::size_t replay_used = 0;
    if (options.use_replay && incumbent.replay) {
        const replay_sample& r = *incumbent.replay;
        std::vector<std::size_t> where(builder.names().size(), r.columns.size());
        for (std::size_t k = 0; k < builder.names().size(); ++k)
            for (std::size_t j = 0; j < r.columns.size(); ++j)
                if (r.columns[j] == builder.names()[k]) where[k] = j;
        const std::size_t width = r.columns.size();
        for (std::uint64_t i = 0; i < r.rows(); ++i) {
            for (std::size_t k = 0; k < cells.size(); ++k) {
                detail::raw_cell& c = cells[k];
                const std::size_t at = static_cast<std::size_t>(i) * width + where[k];
                c.missing = where[k] == width || r.missing[at] != 0;
                c.is_number = false;
                c.text = c.missing ? std::string() : r.cells[at];
            }
            if (builder.add(cells) == detail::refusal::none)
                ++replay_used;
            else
                ++report.replay_rows_refused;
        }
    }
    std::vector<const column*> sources;
    for (const auto& name : builder.names()) sources.push_back(&new_rows.at(name));
    std::vector<std::size_t> usable_new;  // rows of new_rows that the mix holds, in order
    std::string first_refused;  // e.g. "the first, pump.csv line 7: column 'valve' holds 'wide', ..."
    for (std::size_t r = 0; r < new_rows.row_count(); ++r) {
        for (std::size_t k = 0; k < cells.size(); ++k) cells[k] = detail::cell_of_table(*sources[k], r);
        const detail::refusal why = builder.add(cells);
        if (why != detail::refusal::none && first_refused.empty())
            first_refused = "; the first, " + new_rows.row_place(r) + ": " + builder.describe_refusal();
        switch (why) {
        case detail::refusal::none: usable_new.push_back(r); continue;
        case detail::refusal::missing_target: ++report.refused_missing_target; break;
        case detail::refusal::unseen_class: ++report.refused_unseen_class; break;
        case detail::refusal::unseen_category: ++report.refused_unseen_category; break;
        case detail::refusal::missing_value: ++report.refused_missing_value; break;
        case detail::refusal::not_numeric: ++report.refused_not_numeric; break;
        }
        ++report.new_rows_refused;
    }
    const table& mix = builder.mix();

    // --- 2. the holdout ---
    const std::size_t usable = usable_new.size();
    const auto share_rows = static_cast<std::size_t>(std::ceil(options.holdout_share * static_cast<double>(usable)));
    const std::size_t holdout_size = std::max(options.min_holdout_rows, share_rows);
    if (usable < holdout_size + 1)
        raise(codes::deploy_retrain_too_few_rows,
              "retrain_model: " + std::to_string(usable) + " of the " + std::to_string(report.new_rows) + " new rows are usable (" +
                  std::to_string(report.new_rows_refused) + " refused" + first_refused + "); the holdout needs " + std::to_string(holdout_size) +
                  " and training at least 1 more");
    // Positions in usable_new; mix row of usable_new[i] is replay_used + i.
    std::vector<std::size_t> order(usable);
    for (std::size_t i = 0; i < usable; ++i) order[i] = i;
    if (options.holdout == holdout_selection::random) {
        random_engine engine(options.seed, /*stream=*/0x401D0u);
        engine.shuffle(order.begin(), order.end());
        std::sort(order.begin(), order.begin() + static_cast<std::ptrdiff_t>(holdout_size));
        std::sort(order.begin() + static_cast<std::ptrdiff_t>(holdout_size), order.end());
    } else {
        std::rotate(order.begin(), order.end() - static_cast<std::ptrdiff_t>(holdout_size), order.end());
    }
    std::vector<std::size_t> holdout, new_training, offered;
    for (std::size_t i = 0; i < usable; ++i) {
        const std::size_t pos = order[i];
        if (i < holdout_size) {
            holdout.push_back(replay_used + pos);
        } else {
            new_training.push_back(replay_used + pos);
            offered.push_back(usable_new[pos]);
        }
    }
    std::sort(offered.begin(), offered.end());
    report.holdout_rows = holdout.size();
    report.new_training_rows = new_training.size();
    report.replay_rows = replay_used;

    // --- 3. the candidate ---
    std::vector<std::size_t> pool;
    for (std::size_t i = 0; i < replay_used; ++i) pool.push_back(i);
    pool.insert(pool.end(), new_training.begin(), new_training.end());
    std::vector<std::size_t> train_rows = pool, validation_rows;
    const auto validation_size = static_cast<std::size_t>(std::floor(options.validation_share * static_cast<double>(pool.size())));
    if (validation_size > 0 && validation_size < pool.size()) {
        random_engine engine(options.seed, /*stream=*/0x7A11Du);
        engine.shuffle(train_rows.begin(), train_rows.end());
        validation_rows.assign(train_rows.end() - static_cast<std::ptrdiff_t>(validation_size), train_rows.end());
        train_rows.resize(train_rows.size() - validation_size);
        std::sort(train_rows.begin(), train_rows.end());
        std::sort(validation_rows.begin(), validation_rows.end());
    }
    report.training_rows = train_rows.size();
    report.validation_rows = validation_rows.size();

    std::vector<network<T>> incumbent_nets = detail::networks_of(incumbent);
    std::vector<network<T>> candidate_nets = detail::networks_of(incumbent);
    report.members = incumbent_nets.size();
    const std::optional<training_metadata>& meta = incumbent.metadata;
    loss_kind loss = classify ? loss_kind::cross_entropy : loss_kind::l2;
    if (meta && !meta->loss.empty()) loss = parse_loss_kind(meta->loss);
    const std::string stored_update = detail::setting_of(meta, "update"), stored_rate = detail::setting_of(meta, "learning_rate"),
                      stored_batch = detail::setting_of(meta, "batch_size");
    double stored_learning_rate = 0.0;
    const update_kind update = options.update ? *options.update : stored_update.empty() ? update_kind::adam : parse_update_kind(stored_update);
    const double learning_rate = options.learning_rate                                                            ? *options.learning_rate
        : (!stored_rate.empty() && parse_number(stored_rate, stored_learning_rate) && stored_learning_rate > 0.0) ? stored_learning_rate
                                                                                                                  : 1e-3;
    // The stored decay goes on with a rule that has one (a file written
    // before the setting was kept has none: 0).
    double weight_decay = 0.0;
    if (options.weight_decay)
        weight_decay = *options.weight_decay;
    else if (update == update_kind::adam || update == update_kind::adamw) {
        const std::string stored = detail::setting_of(meta, "weight_decay");
        double value = 0.0;
        if (!stored.empty() && parse_number(stored, value) && value >= 0.0 && std::isfinite(value)) weight_decay = value;
    }
    (void)make_update_rule<T>(update, weight_decay);  // a decay the rule lacks is refused before training
    std::size_t batch_size = 32;
    double stored_batch_number = 0.0;
    if (options.batch_size)
        batch_size = *options.batch_size;
    else if (!stored_batch.empty() && parse_number(stored_batch, stored_batch_number) && stored_batch_number >= 1.0)
        batch_size = static_cast<std::size_t>(stored_batch_number);

    report.seed = options.seed;
    report.training_seed = options.training_seed.value_or(options.seed);
    const prepared_rows<T> holdout_prepared = plan.template apply<T>(mix, holdout);
    training_outcome outcome;
    const double remaining = options.time_budget_seconds > 0.0 ? options.time_budget_seconds - (clock() - start) : 0.0;
    if (options.epochs > 0 && !(options.time_budget_seconds > 0.0 && remaining <= 0.0)) {
        supervised_rows<T> train = detail::to_supervised(plan.template apply<T>(mix, train_rows), plan);
        supervised_rows<T> validation;
        if (!validation_rows.empty()) validation = detail::to_supervised(plan.template apply<T>(mix, validation_rows), plan);
        training_options<T> o;
        o.epochs = options.epochs;
        o.batch_size = batch_size;
        o.patience = options.patience;
        o.seed = options.seed;
        o.loss = loss;
        static_cast<run_controls&>(o) = options;  // cancel flag and observers
        o.time_budget_seconds = remaining;
        o.clock = clock;
        o.workers = options.workers;
        std::unique_ptr<thread_pool> threads;
        if (!o.workers && options.threads > 1) {
            threads = std::make_unique<thread_pool>(options.threads);
            o.workers = threads.get();
        }
        const std::uint64_t training_seed = options.training_seed ? *options.training_seed : options.seed;
        // Seeded as fit_model seeds its members; one after the other, each
        // member gets an even share of the budget left when it starts.
        const auto member_seed = [&](std::size_t k) { return detail::member_seed(training_seed, k); };
        const std::function<double()> left = [&] { return options.time_budget_seconds - (clock() - start); };
        const double training_start = clock();
        outcome = detail::train_networks(detail::pointers_to(candidate_nets), o, update, learning_rate, weight_decay, true, member_seed, train,
                                         validation, {}, left)
                      .front();
        if (candidate_nets.size() > 1) outcome.seconds = clock() - training_start;  // all members' training
    } else if (options.epochs > 0) {
        outcome.reason = stop_reason::time_budget;
        outcome.message = "the time budget of " + std::to_string(options.time_budget_seconds) + " s was spent before training began";
    } else {
        outcome.message = "no training asked for (0 epochs)";
    }
    report.epochs_run = outcome.history.size();
    report.steps = outcome.steps;
    report.stop_reason = stop_reason_name(outcome.reason);
    report.stop_message = outcome.message;
    report.training_seconds = outcome.seconds;

    // --- 4. the gate ---
    report.incumbent_score = detail::gate_score(incumbent_nets, plan, holdout_prepared, metric);
    report.candidate_score = detail::gate_score(candidate_nets, plan, holdout_prepared, metric);
    const gate_decision decision = decide_promotion(metric, report.incumbent_score, report.candidate_score, options.margin);
    report.promoted = decision.promoted;
    report.improvement = decision.improvement;
    report.reason = decision.reason;
    report.decision = decision.promoted ? "promoted" : "kept_incumbent";

    // --- 4b. calibration ---
    const interval_calibration* old_band = detail::stored_interval(incumbent.calibration);
    const class_calibration* old_classes = detail::stored_classes(incumbent.calibration);
    const bool incumbent_calibrated = classify ? old_classes != nullptr : old_band != nullptr;
    const double coverage = options.coverage ? *options.coverage
        : incumbent_calibrated               ? (classify ? old_classes->coverage : old_band->coverage)
                                             : default_coverage;
    report.coverage_measure = classify ? "class_set" : "interval";
    report.nominal_coverage = coverage;
    if (incumbent_calibrated) {
        const auto scored = detail::coverage_of(incumbent_nets, plan, *incumbent.calibration, holdout_prepared);
        report.incumbent_coverage = scored.first;
        report.incumbent_width = scored.second;
    }
    std::optional<model_calibration> candidate_calibration;
    if (!validation_rows.empty()) {
        // As calibrate_model calibrates a fitted model: one network's logits
        // or values, an ensemble's mean (and its members' spread).
        const prepared_rows<T> calibration_rows = plan.template apply<T>(mix, validation_rows);
        detail::require_rows(calibration_rows, "retrain_model's calibration");
        const detail::ensemble_view<T> view = detail::calibration_view(candidate_nets, plan, calibration_rows);
        candidate_calibration = detail::calibrate_outputs(plan, view.outputs, view.has_spread ? &view.spread : nullptr, calibration_rows, coverage);
        const auto scored = detail::coverage_of(candidate_nets, plan, *candidate_calibration, holdout_prepared);
        report.candidate_coverage = scored.first;
        report.candidate_width = scored.second;
    }

    // --- 5. the candidate's file ---
    model_file<T>& c = result.candidate;
    c = capture_network(candidate_nets.front());
    for (std::size_t k = 1; k < candidate_nets.size(); ++k) c.members.push_back(capture_network(candidate_nets[k]).weights);
    c.plan.emplace(plan);
    // The metadata describe the candidate's weights only. Of the
    // incumbent's settings, those that describe the model, not its
    // training, are carried over; its data name, split and scores stay with
    // it in the history.
    training_metadata m;
    if (meta) {
        for (const auto& kv : meta->settings)
            for (const char* kept : {"hidden", "hidden_activation", "target", "task", "ensemble"})
                if (kv.first == kept) m.settings.push_back(kv);
    }
    m.library_version = version_string();
    m.created_unix_seconds = options.created_unix_seconds
        ? *options.created_unix_seconds
        : static_cast<std::int64_t>(std::chrono::duration_cast<std::chrono::seconds>(std::chrono::system_clock::now().time_since_epoch()).count());
    m.seed = options.training_seed ? *options.training_seed : options.seed;
    m.epochs_planned = options.epochs;
    m.epochs_run = outcome.history.size();
    m.best_epoch = outcome.best_epoch;
    m.steps = outcome.steps;
    m.training_rows = train_rows.size();
    m.validation_rows = validation_rows.size();
    m.dropped_rows = report.new_rows_refused;
    m.data_fingerprint = training_fingerprint(mix, train_rows);
    m.stop_reason = stop_reason_name(outcome.reason);
    m.loss = loss_kind_name(loss);
    const auto set_metric = [&](const std::string& key, double v) {
        for (auto& kv : m.metrics)
            if (kv.first == key) {
                kv.second = v;
                return;
            }
        m.metrics.emplace_back(key, v);
    };
    const auto set_setting = [&](const std::string& key, const std::string& v) {
        for (auto& kv : m.settings)
            if (kv.first == key) {
                kv.second = v;
                return;
            }
        m.settings.emplace_back(key, v);
    };
    set_metric("best_validation_loss", outcome.best_validation_loss);
    set_metric("training_seconds", outcome.seconds);
    set_metric("gate_incumbent_score", report.incumbent_score);
    set_metric("gate_candidate_score", report.candidate_score);
    set_metric("gate_holdout_rows", static_cast<double>(report.holdout_rows));
    if (candidate_calibration) set_metric("gate_candidate_coverage", report.candidate_coverage);
    if (incumbent_calibrated) set_metric("gate_incumbent_coverage", report.incumbent_coverage);
    set_metric("new_training_rows", static_cast<double>(report.new_training_rows));
    set_metric("replay_training_rows", static_cast<double>(report.replay_rows));
    set_metric("retrainings", (meta && std::isfinite(meta->metric("retrainings")) ? meta->metric("retrainings") : 0.0) + 1.0);
    set_setting("update", update_kind_name(update));
    set_setting("learning_rate", number_to_text(learning_rate));
    set_setting("weight_decay", number_to_text(weight_decay));
    set_setting("batch_size", std::to_string(batch_size));
    set_setting("patience", std::to_string(options.patience));
    set_setting("gate_metric", report.metric);
    set_setting("gate_margin", number_to_text(options.margin));
    set_setting("origin", "retraining");
    set_setting("ensemble", std::to_string(report.members));
    if (!new_rows.source().empty()) {  // the file name, as tenon train records it
        const std::string& source = new_rows.source();
        const std::size_t slash = source.find_last_of("/\\");
        set_setting("data", slash == std::string::npos ? source : source.substr(slash + 1));
    }
    c.metadata = std::move(m);
    c.calibration = candidate_calibration;
    c.history = incumbent.history;
    if (meta) c.history.push_back(*meta);
    if (c.history.size() > options.history_limit)
        c.history.erase(c.history.begin(), c.history.end() - static_cast<std::ptrdiff_t>(options.history_limit));
    std::size_t bins = options.histogram_bins;
    for (const auto& ref : incumbent.references)
        if (bins == 0 && !ref.histogram.empty()) bins = ref.histogram.size();
    c.references = measure_references(mix, train_rows, plan, bins ? bins : 10);
    if (incumbent.replay || options.replay_capacity > 0) {
        c.replay = detail::continue_replay(incumbent.replay, meta, new_rows, offered, options);
        report.replay_rows_after = c.replay->rows();
        report.replay_rows_seen_after = c.replay->rows_seen;
    }
    report.seconds = clock() - start;
    return result;
}

namespace detail {
// T, named through a template parameter: a template whose body names its
// scalar types this way is compiled only where it is called (the body of a
// plain inline function, and every template it names, is compiled in every
// unit that includes it).
template <class T, class>
struct scalar_named {
    using type = T;
};
}  // namespace detail

/// The default rollback path of a model file: "<path>.previous".
inline std::string default_rollback_path(const std::string& path) { return path + ".previous"; }

/// Retrains the model file at `path` (float or double, as stored) and, on
/// promotion, keeps the previous file at `rollback_path` (default
/// "<path>.previous") and writes the candidate to `path`, both atomically
/// and durably through `fs`. Without promotion nothing is written. (A
/// template only so that units that never call it do not compile it.)
template <class Unused = void>
retraining_report retrain_model_file(const std::string& path, const table& new_rows, const retraining_options& options,
                                     const std::string& rollback_path, file_system& fs, const model_limits& limits = {}) {
    using f32 = typename detail::scalar_named<float, Unused>::type;
    using f64 = typename detail::scalar_named<double, Unused>::type;
    const std::function<double()> clock = options.clock ? options.clock : std::function<double()>(detail::steady_seconds);
    const double start = clock();
    const std::vector<std::uint8_t> bytes = read_file_bounded(path, limits.max_file_bytes);
    const model_file_summary summary = inspect_model_bytes(bytes, limits, path);
    retraining_report report;
    std::vector<std::uint8_t> candidate;
    if (summary.scalar_bytes == 4) {
        auto r = retrain_model(model_file_from_bytes<f32>(bytes, limits, path), new_rows, options);
        report = std::move(r.report);
        if (report.promoted) candidate = model_file_to_bytes(r.candidate);
    } else {
        auto r = retrain_model(model_file_from_bytes<f64>(bytes, limits, path), new_rows, options);
        report = std::move(r.report);
        if (report.promoted) candidate = model_file_to_bytes(r.candidate);
    }
    report.model_path = path;
    report.rollback_path = rollback_path.empty() ? default_rollback_path(path) : rollback_path;
    if (report.promoted) {
        write_file_atomically(report.rollback_path, bytes, fs);
        write_file_atomically(path, candidate, fs);
        report.file_written = true;
    }
    report.seconds = clock() - start;
    return report;
}

template <class Unused = void>
retraining_report retrain_model_file(const std::string& path, const table& new_rows, const retraining_options& options = {},
                                     const std::string& rollback_path = "") {
    native_file_system fs;
    return retrain_model_file<Unused>(path, new_rows, options, rollback_path, fs);
}

/// Puts the previous model back: checks that `rollback_path` (default
/// "<path>.previous") holds a readable model file, then writes its bytes to
/// `path` atomically. The rollback file stays. Raises deploy.file.io when
/// it cannot be read and the deploy.model.* codes when it is not valid.
inline void roll_back_model_file(const std::string& path, const std::string& rollback_path, file_system& fs, const model_limits& limits = {}) {
    const std::string from = rollback_path.empty() ? default_rollback_path(path) : rollback_path;
    const std::vector<std::uint8_t> bytes = read_file_bounded(from, limits.max_file_bytes);
    inspect_model_bytes(bytes, limits, from);
    write_file_atomically(path, bytes, fs);
}
inline void roll_back_model_file(const std::string& path, const std::string& rollback_path = "") {
    native_file_system fs;
    roll_back_model_file(path, rollback_path, fs);
}

/// The report as a JSON object (NaN as null).
inline std::string to_json(const retraining_report& r) {
    using detail::json_bool;
    using detail::json_number;
    using detail::json_string;
    const auto count = [](std::uint64_t v) { return std::to_string(v); };
    return "{\"promoted\": " + json_bool(r.promoted) + ", \"decision\": " + json_string(r.decision) + ", \"reason\": " + json_string(r.reason) +
        ", \"gate\": {\"metric\": " + json_string(r.metric) + ", \"higher_is_better\": " + json_bool(r.higher_is_better) +
        ", \"margin\": " + json_number(r.margin) + ", \"incumbent_score\": " + json_number(r.incumbent_score) +
        ", \"candidate_score\": " + json_number(r.candidate_score) + ", \"improvement\": " + json_number(r.improvement) +
        "}, \"calibration\": {\"measure\": " + json_string(r.coverage_measure) + ", \"nominal_coverage\": " + json_number(r.nominal_coverage) +
        ", \"incumbent_coverage\": " + json_number(r.incumbent_coverage) + ", \"candidate_coverage\": " + json_number(r.candidate_coverage) +
        ", \"incumbent_width\": " + json_number(r.incumbent_width) + ", \"candidate_width\": " + json_number(r.candidate_width) +
        "}, \"rows\": {\"new\": " + count(r.new_rows) + ", \"new_refused\": " + count(r.new_rows_refused) +
        ", \"refused_missing_target\": " + count(r.refused_missing_target) + ", \"refused_unseen_class\": " + count(r.refused_unseen_class) +
        ", \"refused_unseen_category\": " + count(r.refused_unseen_category) + ", \"refused_missing_value\": " + count(r.refused_missing_value) +
        ", \"refused_not_numeric\": " + count(r.refused_not_numeric) + ", \"holdout\": " + count(r.holdout_rows) +
        ", \"new_training\": " + count(r.new_training_rows) + ", \"replay\": " + count(r.replay_rows) +
        ", \"replay_refused\": " + count(r.replay_rows_refused) + ", \"training\": " + count(r.training_rows) +
        ", \"validation\": " + count(r.validation_rows) + ", \"replay_after\": " + count(r.replay_rows_after) +
        ", \"replay_seen_after\": " + count(r.replay_rows_seen_after) + "}, \"training\": {\"members\": " + count(r.members) +
        ", \"epochs\": " + count(r.epochs_run) + ", \"steps\": " + count(r.steps) + ", \"stop_reason\": " + json_string(r.stop_reason) +
        ", \"stop_message\": " + json_string(r.stop_message) + ", \"seed\": " + count(r.seed) + ", \"training_seed\": " + count(r.training_seed) +
        ", \"seconds\": " + json_number(r.training_seconds) + "}, \"seconds\": " + json_number(r.seconds) +
        ", \"time_budget_seconds\": " + json_number(r.time_budget_seconds) + ", \"model_path\": " + json_string(r.model_path) +
        ", \"rollback_path\": " + json_string(r.rollback_path) + ", \"file_written\": " + json_bool(r.file_written) + "}";
}

TENON_NAMESPACE_END

// The compiled-once mode (core/compiled_once.hpp).
#if defined(TENON_DETAIL_TRAIN_INSTANCE)
TENON_NAMESPACE_BEGIN
#define TENON_DETAIL_RETRAINING_INSTANCES(T)                                                                                                         \
    TENON_DETAIL_TRAIN_INSTANCE retraining_result<T> retrain_model<T>(const model_file<T>&, const table&, const retraining_options&);
TENON_DETAIL_RETRAINING_INSTANCES(float)
TENON_DETAIL_RETRAINING_INSTANCES(double)
#undef TENON_DETAIL_RETRAINING_INSTANCES
TENON_NAMESPACE_END
#endif
