// tenon: writing model files from training, and reading them back into
// networks (the training branch's side of format/model_file.hpp).
//
// make_model_file() gathers what a fitted model's file holds (architecture,
// weights, plan, metadata, reference summaries, a replay sample);
// rebuild_network() turns a file's architecture and weights back into a
// trainable network; capture_resume_state()/restore_resume_state() carry a
// run's update-rule, schedule and engine state through section RSUM.
#pragma once

#include <algorithm>
#include <chrono>
#include <cstddef>
#include <cstdint>
#include <cstring>
#include <limits>
#include <string>
#include <utility>
#include <vector>

#include "tenon/format/model_file.hpp"
#include "tenon/core/compiled_once.hpp"
#include "tenon/layers/network.hpp"
#include "tenon/prep/plan.hpp"
#include "tenon/prep/reference.hpp"
#include "tenon/train/trainer.hpp"
#include "tenon/train/workflow.hpp"
#include "tenon/update/schedules.hpp"
#include "tenon/update/update_rule.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {
template <class T>
void collect_layer_engines(layer<T>& l, std::vector<std::pair<std::string, random_engine*>>& out) {
    if (auto* d = dynamic_cast<dropout<T>*>(&l)) out.emplace_back(d->qualified_name(), &d->engine());
    if (auto* r = dynamic_cast<residual<T>*>(&l))
        for (std::size_t i = 0; i < r->layer_count(); ++i) collect_layer_engines(r->layer_at(i), out);
    if (auto* b = dynamic_cast<linear_bypass<T>*>(&l))
        for (std::size_t i = 0; i < b->layer_count(); ++i) collect_layer_engines(b->layer_at(i), out);
}
template <class T>
std::vector<std::pair<std::string, random_engine*>> layer_engines(network<T>& net) {
    std::vector<std::pair<std::string, random_engine*>> out;
    for (std::size_t i = 0; i < net.layer_count(); ++i) collect_layer_engines(net.layer_at(i), out);
    return out;
}
}  // namespace detail

/// The architecture and weights of a network, as a model file holds them.
template <class T>
model_file<T> capture_network(const network<T>& net) {
    model_file<T> m;
    m.architecture = net.describe();
    for (auto* p : net.parameters()) m.weights.push_back({p->name(), p->value()});
    for (auto* p : net.state_buffers()) m.weights.push_back({p->name(), p->value()});
    return m;
}

/// Rebuilds the stored network with its weights; raises
/// deploy.model.shape_mismatch when the weights do not fit the architecture
/// and deploy.model.malformed when the architecture cannot be built.
template <class T>
network<T> rebuild_network(const layer_record& architecture, const std::vector<named_matrix<T>>& weights);
template <class T>
network<T> rebuild_network(const model_file<T>& m) {
    return rebuild_network<T>(m.architecture, m.weights);
}
/// Rebuilds member `k` of the file's ensemble (0: the network of WGHT).
template <class T>
network<T> rebuild_member(const model_file<T>& m, std::size_t k) {
    if (k > m.members.size())
        raise(codes::core_argument_invalid,
              "model file: member " + std::to_string(k) + " asked of an ensemble of " + std::to_string(1 + m.members.size()));
    return rebuild_network<T>(m.architecture, k == 0 ? m.weights : m.members[k - 1]);
}
/// Rebuilds an architecture with the given weights (see rebuild_network).
template <class T>
network<T> rebuild_network(const layer_record& architecture, const std::vector<named_matrix<T>>& weights) {
    check_weights_fit(architecture, weights);
    network<T> net = detail::parse_section("model file architecture", [&] { return make_network<T>(architecture); });
    const auto& params = net.parameters();
    const auto& state = net.state_buffers();
    for (std::size_t i = 0; i < weights.size(); ++i) (i < params.size() ? params[i] : state[i - params.size()])->assign(weights[i].values);
    net.set_mode(run_mode::inference);
    return net;
}

/// The serving form of a network (architecture and weights), for
/// predictor<T>'s constructor from a network.
template <class T>
model_file<T> serving_form(network<T>& net) {
    return capture_network(net);
}

/// The serving form of a fitted model: its networks and plan, no reference
/// summaries and no calibration (make_model_file adds those), for
/// predictor<T>'s constructor from a fitted model.
template <class T>
model_file<T> serving_form(const fitted_model<T>& model) {
    model_file<T> m = capture_network(model.net);
    for (const auto& member : model.members) m.members.push_back(capture_network(member).weights);
    m.plan.emplace(model.plan);
    return m;
}

/// FNV-1a 64 over the column names and the given rows' cells in row order
/// (a missing cell, a number's bits or a category's bytes, each with a kind
/// byte), so two tables with equal training cells get equal fingerprints.
inline std::uint64_t training_fingerprint(const table& t, const std::vector<std::size_t>& rows) {
    fnv1a_64 h;
    for (std::size_t k = 0; k < t.column_count(); ++k) {
        h.add_u64(t[k].name().size());
        h.add(t[k].name().data(), t[k].name().size());
    }
    for (auto r : rows) {
        if (r >= t.row_count())
            raise(codes::prep_rows_out_of_range, "training_fingerprint: row " + std::to_string(r) + " is not below " + std::to_string(t.row_count()));
        for (std::size_t k = 0; k < t.column_count(); ++k) {
            const column& c = t[k];
            if (c.is_missing(r)) {
                h.add_byte(0);
            } else if (c.kind() == column_kind::categorical) {
                h.add_byte(2);
                h.add_u64(c.category(r).size());
                h.add(c.category(r).data(), c.category(r).size());
            } else {
                h.add_byte(1);
                std::uint64_t bits;
                const double v = c.number(r);
                std::memcpy(&bits, &v, 8);
                h.add_u64(bits);
            }
        }
    }
    return h.value();
}

/// One step of reservoir sampling (Vitter 1985, "Random sampling with a
/// reservoir", ACM TOMS 11(1), Algorithm R): the item with 0-based index
/// `seen` in the stream goes to slot `seen` while the reservoir has fewer
/// than `capacity` items, else replaces slot j for j uniform in [0, seen]
/// when j < capacity. Returns the slot, or `capacity` to discard the item.
/// Each of the first n items is then held with probability capacity / n.
inline std::uint64_t reservoir_slot(random_engine& engine, std::uint64_t seen, std::uint64_t capacity) {
    if (seen < capacity) return seen;
    const std::uint64_t j = engine.below(seen + 1);
    return j < capacity ? j : capacity;
}

/// The seed stream of the replay sample's reservoir engine.
inline constexpr std::uint64_t replay_engine_stream = 0x8E91A7u;

/// Up to `max_rows` of `rows` of `t` chosen uniformly by reservoir sampling
/// (reservoir_slot), kept in table order, as cell texts, with the
/// reservoir's state so that later retrainings continue the same sample.
/// Slots are relabelled by the sort; Algorithm R draws a uniform slot, so any
/// fixed relabelling keeps the sample uniform.
inline replay_sample sample_replay_rows(const table& t, const std::vector<std::size_t>& rows, std::size_t max_rows, std::uint64_t seed) {
    std::vector<std::size_t> chosen;
    random_engine engine(seed, replay_engine_stream);
    for (std::size_t i = 0; i < rows.size(); ++i) {
        const std::uint64_t slot = reservoir_slot(engine, i, max_rows);
        if (slot < chosen.size())
            chosen[static_cast<std::size_t>(slot)] = rows[i];
        else if (slot < max_rows)
            chosen.push_back(rows[i]);
    }
    std::sort(chosen.begin(), chosen.end());
    replay_sample s;
    s.rows_seen = rows.size();
    s.capacity = max_rows;
    s.engine = engine.state();
    for (std::size_t k = 0; k < t.column_count(); ++k) {
        s.columns.push_back(t[k].name());
        s.kinds.push_back(t[k].kind());
    }
    for (auto r : chosen)
        for (std::size_t k = 0; k < t.column_count(); ++k) {
            const column& c = t[k];
            const bool missing = c.is_missing(r);
            s.missing.push_back(missing ? 1 : 0);
            s.cells.push_back(missing ? std::string() : c.kind() == column_kind::categorical ? c.category(r) : number_to_text(c.number(r)));
        }
    return s;
}

/// Choices for make_model_file.
struct model_file_options {
    /// Raw training rows kept for later retraining (0: no RPLY section).
    std::size_t replay_rows = 256;
    std::size_t histogram_bins = 10;
    /// Creation time in seconds since 1970; by default the system clock.
    std::optional<std::int64_t> created_unix_seconds;
};

/// Everything a fitted model's file holds: architecture, weights, plan,
/// metadata, reference summaries of `train_rows` of `t` (the rows fit_model
/// was given) and a replay sample.
template <class T>
model_file<T> make_model_file(const fitted_model<T>& model, const table& t, const std::vector<std::size_t>& train_rows,
                              const model_settings& settings, const model_file_options& options = {}) {
    model_file<T> m = capture_network(model.net);
    for (const auto& member : model.members) m.members.push_back(capture_network(member).weights);
    m.plan.emplace(model.plan);
    training_metadata meta;
    meta.library_version = version_string();
    meta.created_unix_seconds = options.created_unix_seconds
        ? *options.created_unix_seconds
        : static_cast<std::int64_t>(std::chrono::duration_cast<std::chrono::seconds>(std::chrono::system_clock::now().time_since_epoch()).count());
    meta.seed = settings.seed;
    meta.epochs_planned = settings.epochs;
    meta.epochs_run = model.outcome.history.size();
    meta.best_epoch = model.outcome.best_epoch;
    meta.steps = model.outcome.steps;
    meta.training_rows = model.train_rows;
    meta.validation_rows = model.validation_rows;
    meta.dropped_rows = model.dropped_rows;
    meta.data_fingerprint = training_fingerprint(t, train_rows);
    meta.stop_reason = stop_reason_name(model.outcome.reason);
    meta.loss = loss_kind_name(model.loss);
    meta.metrics.emplace_back("best_validation_loss", model.outcome.best_validation_loss);
    if (!model.outcome.history.empty()) {
        const epoch_summary& last = model.outcome.history.back();
        meta.metrics.emplace_back("final_training_loss", last.training_loss);
        meta.metrics.emplace_back("final_validation_loss", last.validation_loss);
        meta.metrics.emplace_back("final_validation_metric", last.validation_metric);
    }
    meta.metrics.emplace_back("training_seconds", model.outcome.seconds);
    std::string hidden;
    const std::vector<std::size_t> widths = hidden_widths(settings, model.train_rows);
    for (std::size_t i = 0; i < widths.size(); ++i) hidden += (i ? "," : "") + std::to_string(widths[i]);
    meta.settings.emplace_back("hidden", hidden);
    meta.settings.emplace_back("hidden_activation", activation_name(settings.hidden_activation));
    meta.settings.emplace_back("update", update_kind_name(settings.update));
    meta.settings.emplace_back("learning_rate", number_to_text(settings.learning_rate));
    meta.settings.emplace_back("weight_decay", number_to_text(settings.weight_decay));
    meta.settings.emplace_back("batch_size", std::to_string(settings.batch_size));
    meta.settings.emplace_back("patience", std::to_string(settings.patience));
    meta.settings.emplace_back("ensemble", std::to_string(model.member_count()));
    // "off", or the rows and each member's steps of refit_model.
    std::string refit = "off";
    if (model.refit_rows > 0) {
        refit = std::to_string(model.refit_rows) + " rows; steps";
        for (std::size_t k = 0; k < model.refit_steps.size(); ++k) refit += (k ? "," : " ") + std::to_string(model.refit_steps[k]);
    }
    meta.settings.emplace_back("refit", refit);
    if (!model.class_weights.empty()) {
        std::string weights;
        for (std::size_t k = 0; k < model.class_weights.size(); ++k) weights += (k ? "," : "") + number_to_text(model.class_weights[k]);
        meta.settings.emplace_back("class_weights", weights);
    }
    m.metadata = std::move(meta);
    m.references = measure_references(t, train_rows, model.plan, options.histogram_bins);
    if (options.replay_rows > 0) m.replay = sample_replay_rows(t, train_rows, options.replay_rows, settings.seed);
    return m;
}

/// The same from what the fitted model keeps: the training rows fit_model
/// was given and its settings (fitted_model::fitted_rows, settings). `t` is
/// the table fit_model was given; a table with fewer rows is refused.
template <class T>
model_file<T> make_model_file(const fitted_model<T>& model, const table& t, const model_file_options& options = {}) {
    for (const std::size_t r : model.fitted_rows)
        if (r >= t.row_count()) {
            raise(codes::train_option_invalid,
                  "make_model_file: the model was fitted on row " + std::to_string(r) + ", and the table has " + std::to_string(t.row_count()) +
                      " rows (pass the table fit_model was given)");
        }
    return make_model_file(model, t, model.fitted_rows, model.settings, options);
}

/// The state a checkpoint needs besides the weights: the update rule's and
/// schedule's state, the trainer's progress (trainer::progress(), e.g. from
/// on_epoch) and the engines of dropout layers.
template <class T>
resume_state<T> capture_resume_state(network<T>& net, const update_rule<T>& rule, const rate_schedule& schedule,
                                     const training_progress<T>& progress) {
    resume_state<T> s;
    s.update_kind = rule.kind();
    s.update_state = rule.save_state();
    s.schedule_kind = schedule.kind();
    s.schedule_state = schedule.save_state();
    s.progress = progress;
    for (const auto& e : detail::layer_engines(net)) s.layer_engines.emplace_back(e.first, e.second->state());
    return s;
}

/// Puts a saved state back into a network (rebuilt with rebuild_network), an
/// update rule and a schedule of the same kinds; then pass &s.progress as
/// training_options::resume. Raises deploy.resume.mismatch for other kinds
/// or layers, leaving nothing half-restored where it can check first.
template <class T>
void restore_resume_state(const resume_state<T>& s, network<T>& net, update_rule<T>& rule, rate_schedule& schedule) {
    if (s.update_kind != rule.kind())
        raise(codes::deploy_resume_mismatch, "resume: the state was saved by a '" + s.update_kind + "' update rule, not '" + rule.kind() + "'");
    if (s.schedule_kind != schedule.kind())
        raise(codes::deploy_resume_mismatch, "resume: the state was saved with a '" + s.schedule_kind + "' schedule, not '" + schedule.kind() + "'");
    const auto engines = detail::layer_engines(net);
    if (engines.size() != s.layer_engines.size())
        raise(codes::deploy_resume_mismatch,
              "resume: the state holds " + std::to_string(s.layer_engines.size()) + " layer engines, the network has " +
                  std::to_string(engines.size()));
    for (std::size_t i = 0; i < engines.size(); ++i)
        if (engines[i].first != s.layer_engines[i].first)
            raise(codes::deploy_resume_mismatch,
                  "resume: layer engine " + std::to_string(i) + " is '" + s.layer_engines[i].first + "', the network's is '" + engines[i].first +
                      "'");
    const std::size_t values = net.parameters().size() + net.state_buffers().size();
    if (!s.progress.best.values.empty() && s.progress.best.values.size() != values)
        raise(codes::deploy_resume_mismatch,
              "resume: the best-epoch weights hold " + std::to_string(s.progress.best.values.size()) + " matrices, the network has " +
                  std::to_string(values));
    rule.load_state(s.update_state);
    schedule.load_state(s.schedule_state);
    for (std::size_t i = 0; i < engines.size(); ++i) engines[i].second->set_state(s.layer_engines[i].second);
}

TENON_NAMESPACE_END

// The compiled-once mode (core/compiled_once.hpp).
#if defined(TENON_DETAIL_TRAIN_INSTANCE)
TENON_NAMESPACE_BEGIN
#define TENON_DETAIL_AUTHORING_INSTANCES(T)                                                                                                          \
    TENON_DETAIL_TRAIN_INSTANCE model_file<T> make_model_file<T>(const fitted_model<T>&, const table&, const std::vector<std::size_t>&,              \
                                                                 const model_settings&, const model_file_options&);                                  \
    TENON_DETAIL_TRAIN_INSTANCE model_file<T> make_model_file<T>(const fitted_model<T>&, const table&, const model_file_options&);                   \
    TENON_DETAIL_TRAIN_INSTANCE network<T> rebuild_network<T>(const model_file<T>&);                                                                 \
    TENON_DETAIL_TRAIN_INSTANCE network<T> rebuild_member<T>(const model_file<T>&, std::size_t);
TENON_DETAIL_AUTHORING_INSTANCES(float)
TENON_DETAIL_AUTHORING_INSTANCES(double)
#undef TENON_DETAIL_AUTHORING_INSTANCES
TENON_NAMESPACE_END
#endif
