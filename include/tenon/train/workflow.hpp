// tenon: from a table to a validated model in a few lines.
//
//   tenon::plan p;  p.set_target("fault", tenon::target_kind::classification);
//   auto split = tenon::stratified_holdout(...);
//   auto model = tenon::fit_model<float>(table, p, split.train, split.validation, settings);
//   auto test  = tenon::evaluate_model(model, table, split.test);
//
// fit_model measures the plan on the training rows only, builds a multilayer
// perceptron and trains it with early stopping; evaluate_model scores rows in
// the target's units; cross_validate repeats both per fold, refitting each time.
#pragma once

#include <cmath>
#include <cstddef>
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
#include "tenon/layers/network.hpp"
#include "tenon/prep/plan.hpp"
#include "tenon/prep/split.hpp"
#include "tenon/train/baseline.hpp"
#include "tenon/train/metrics.hpp"
#include "tenon/train/trainer.hpp"
#include "tenon/update/rules.hpp"
#include "tenon/update/schedules.hpp"

TENON_NAMESPACE_BEGIN

enum class update_kind : std::uint8_t { gradient_descent, momentum, nesterov, adam, adamw, rmsprop, adagrad };

inline const char* to_string(update_kind k) noexcept {
    switch (k) {
    case update_kind::gradient_descent: return "gd";
    case update_kind::momentum: return "momentum";
    case update_kind::nesterov: return "nesterov";
    case update_kind::adam: return "adam";
    case update_kind::adamw: return "adamw";
    case update_kind::rmsprop: return "rmsprop";
    case update_kind::adagrad: return "adagrad";
    }
    return "unknown";
}
/// The former spelling of to_string(update_kind).
inline const char* update_kind_name(update_kind v) noexcept { return to_string(v); }

/// Parses gd, momentum, nesterov, adam, adamw, rmsprop or adagrad.
inline update_kind parse_update_kind(const std::string& name) {
    update_kind v{};
    if (!enum_from_text(name, v)) raise(codes::train_option_invalid, "unknown optimizer '" + name + "' (" + enum_choices<update_kind>() + ")");
    return v;
}

/// Parses l1, l2, huber or cross-entropy.
inline loss_kind parse_loss_kind(const std::string& name) {
    loss_kind v{};
    if (!enum_from_text(name, v)) raise(codes::train_option_invalid, "unknown loss '" + name + "' (" + enum_choices<loss_kind>() + ")");
    return v;
}

template <class T>
std::unique_ptr<update_rule<T>> make_update_rule(update_kind kind) {
    switch (kind) {
    case update_kind::gradient_descent: return std::make_unique<gradient_descent<T>>();
    case update_kind::momentum: return std::make_unique<momentum<T>>();
    case update_kind::nesterov: {
        momentum_options<T> m;
        m.nesterov = true;
        return std::make_unique<momentum<T>>(m);
    }
    case update_kind::adam: return std::make_unique<adam<T>>();
    case update_kind::adamw: return std::make_unique<adamw<T>>();
    case update_kind::rmsprop: return std::make_unique<rmsprop<T>>();
    case update_kind::adagrad: return std::make_unique<adagrad<T>>();
    }
    raise(codes::train_option_invalid, "make_update_rule: unknown update rule");
}

/// The update rule with decoupled weight decay `weight_decay`
/// (model_settings::weight_decay): adam and adamw take it as their
/// decoupled_weight_decay (AdamW); 0 leaves the rule as make_update_rule(kind)
/// makes it (adamw keeps its own 0.01). The other rules have no decoupled
/// decay and refuse a positive value.
template <class T>
std::unique_ptr<update_rule<T>> make_update_rule(update_kind kind, double weight_decay) {
    if (!(weight_decay >= 0.0 && std::isfinite(weight_decay)))
        raise(codes::train_option_invalid, "weight decay " + number_to_text(weight_decay) + ": must be a finite number, at least 0");
    if (weight_decay == 0.0) return make_update_rule<T>(kind);
    if (kind != update_kind::adam && kind != update_kind::adamw) {
        raise(codes::train_option_invalid,
              "weight decay " + number_to_text(weight_decay) + " needs the adam or adamw update rule; " + to_string(kind) +
                  " has no decoupled weight decay");
    }
    adam_options<T> a;
    a.decoupled_weight_decay = static_cast<T>(weight_decay);
    return std::make_unique<adam<T>>(a);
}

/// Weights of the classes in the cross-entropy loss (model_settings::class_weights).
enum class class_weighting : std::uint8_t {
    /// Every row counts the same.
    none,
    /// Class c weighs n / (k n_c): n training rows, k classes, n_c rows of
    /// class c (a common practice), so that every class weighs the same in
    /// total and a rare class is not left to the majority.
    balanced
};

inline const char* to_string(class_weighting w) noexcept {
    switch (w) {
    case class_weighting::none: return "none";
    case class_weighting::balanced: return "balanced";
    }
    return "unknown";
}

/// Parses none or balanced.
inline class_weighting parse_class_weighting(const std::string& name) {
    class_weighting v{};
    if (!enum_from_text(name, v))
        raise(codes::train_option_invalid, "unknown class weighting '" + name + "' (" + enum_choices<class_weighting>() + ")");
    return v;
}

/// The balanced weights from the rows per class: n / (k n_c).
inline std::vector<double> balanced_weights_from_counts(const std::vector<double>& counts) {
    double n = 0.0;
    for (const double c : counts) n += c;
    std::vector<double> w(counts.size());
    for (std::size_t c = 0; c < counts.size(); ++c) {
        if (!(counts[c] > 0.0)) {
            raise(codes::train_option_invalid,
                  "balanced class weights: class " + std::to_string(c) + " has no training row, so its weight n / (k n_c) is undefined");
        }
        w[c] = n / (static_cast<double>(counts.size()) * counts[c]);
    }
    return w;
}

/// The balanced weights of `labels` (class indices below `classes`):
/// n / (k n_c) for each class c. A class without a row is an error.
inline std::vector<double> balanced_class_weights(const std::vector<std::size_t>& labels, std::size_t classes) {
    std::vector<double> counts(classes, 0.0);
    for (const std::size_t c : labels) {
        if (c >= classes) raise(codes::train_option_invalid, "balanced_class_weights: class " + std::to_string(c) + " of " + std::to_string(classes));
        counts[c] += 1.0;
    }
    return balanced_weights_from_counts(counts);
}

/// Everything that shapes a model and its training besides the data.
/// The host's controls (time budget, clock, cancel flag, observers) are
/// the run_controls part, handed to the trainer whole.
struct model_settings : run_controls {
    /// Hidden layer widths; unset chooses by the training row count
    /// (hidden_widths). Empty: no hidden layer (a linear model).
    std::optional<std::vector<std::size_t>> hidden;
    activation hidden_activation = activation::relu;
    /// Loss; by default cross-entropy for classification and l2 for regression.
    bool loss_given = false;
    loss_kind loss = loss_kind::l2;
    update_kind update = update_kind::adam;
    double learning_rate = 1e-3;
    /// Decoupled weight decay lambda (Loshchilov & Hutter 2019, "Decoupled
    /// Weight Decay Regularization"): each step also shrinks every weight by
    /// learning_rate x lambda, outside Adam's moments (AdamW). Needs update
    /// adam or adamw; 0 (the default) adds none. The baseline is fitted
    /// without it.
    double weight_decay = 0.0;
    /// A linear path from the inputs to the outputs beside the hidden layers
    /// (layers/network.hpp, linear_bypass). Unset: on for regression, where
    /// it lets the model extrapolate like a linear one (e.g. a seasonal input
    /// past its training range), off for classification.
    std::optional<bool> linear_path;
    /// The most epochs; early stopping normally ends the run long before.
    std::size_t epochs = 1000;
    std::size_t batch_size = 32;
    /// Early stopping: the run stops when `patience` epochs and
    /// `patience_steps` optimizer steps have passed since the best epoch, and
    /// never before `min_steps` steps. Counting steps as well keeps a small
    /// table (a few steps an epoch) from being stopped after a few dozen
    /// updates. With fewer than 100 validation rows the step patience is
    /// doubled (a noisy curve dips and recovers by chance).
    std::size_t patience = 15;
    std::size_t patience_steps = 600;
    std::size_t min_steps = 1500;
    /// Exponential smoothing of the validation loss for early stopping
    /// (training_options::smoothing). Unset: 0.7 under 100 validation rows,
    /// 0.5 under 1000, else 0 (a large set's curve is smooth already).
    std::optional<double> smoothing;
    double min_improvement = 0.0;
    /// Networks averaged (class probabilities or values), each trained from
    /// its own seed on the same rows; 0 chooses by the training row count: 5
    /// under 100,000 rows, else 1. Averaging a few networks is a common
    /// practice; the threshold is our own (on Fashion-MNIST, 51,000 training
    /// rows, five 256-128 networks scored 0.892 test accuracy where one
    /// scored 0.876, README "Defaults"). With more than one thread the
    /// members train side by side, each on one thread; the result is the
    /// same for any thread count.
    std::size_t ensemble = 0;
    std::uint64_t seed = 0;
    /// Threads for the matrix products (the calling thread included): with
    /// more than 1, fit_model starts a thread_pool of this size for the run
    /// and stops it before returning. Results do not depend on it.
    std::size_t threads = 1;
    /// A host's own executor (core/parallel.hpp); when given, `threads` is
    /// ignored and no thread is started.
    executor* workers = nullptr;
    /// Train as a member of this team (train/trainer.hpp; e.g. one MPI rank,
    /// distributed/data_parallel.hpp); `batch_size` is then each member's
    /// batch and the global batch is batch_size x members. Every member
    /// calls fit_model with the same settings, and with the same table and
    /// rows unless the members hold shards (`member_rows`).
    training_team* team = nullptr;
    /// How the team's members hold the rows (docs/design/trainer.md, "Teams").
    /// With team_rows::shard_per_member each member passes its own shard of
    /// the training and validation rows (of its own table, with the same
    /// columns as the others'): the plan is measured over all members'
    /// training rows through `exchange`, and each member prepares and holds
    /// only its own rows.
    team_rows member_rows = team_rows::all_on_every_member;
    /// Merges the plan's statistics over the members' shards (prep/
    /// statistics.hpp; over MPI: distributed/plan_merge.hpp's
    /// mpi_statistics_exchange). Needed when the team holds shards; not used
    /// otherwise.
    statistics_exchange* exchange = nullptr;
    /// Shuffle the training rows every epoch; false takes them in the order
    /// given (training_options::shuffle).
    bool shuffle = true;
    /// Refit on the training plus validation rows (refit_model) after the
    /// validated run has made every choice that reads the validation rows
    /// (each member's stopping step, network versus baseline). Unset: on
    /// when the training and validation rows (with a target) number fewer
    /// than 5,000, a threshold of our own: there the validation rows are a
    /// large share of what the model could learn from. Without validation
    /// rows, or when the run was stopped by the time budget or the cancel
    /// flag, no refit happens; the refit's budget is what the validated run
    /// (its first network) left of time_budget_seconds. A team cannot
    /// refit (true is an error there; unset means off). The plan stays
    /// measured on the training rows, so the validation rows' preparation
    /// does not change.
    std::optional<bool> refit;
    /// Classification: weights of the classes in the loss (class_weighting),
    /// measured on the training rows; the logistic baseline uses the same.
    class_weighting class_weights = class_weighting::none;
};

/// Whether fit_model refits for `s` on `rows` training plus validation rows
/// (model_settings::refit; validation rows and the rest checked apart).
inline bool refit_wanted(const model_settings& s, std::size_t rows) noexcept { return s.refit.value_or(rows < 5000); }

/// The networks fit_model trains for `s` on `train_rows` rows:
/// s.ensemble, or by the row count when it is 0 (see model_settings).
inline std::size_t ensemble_size(const model_settings& s, std::size_t train_rows) noexcept {
    return s.ensemble > 0 ? s.ensemble : train_rows < 100000 ? 5 : 1;
}

/// The hidden widths fit_model builds for `s` on `train_rows` rows: s.hidden
/// when set; else two layers, the first the power of two nearest the square
/// root of the row count, kept within 64 to 256, the second half as wide
/// (64,32 up to about 8,000 rows, 128,64 to about 32,000, then 256,128). A
/// rule of our own: more rows carry more weights before the validation
/// curve turns (Fashion-MNIST: 0.876 test accuracy at 256,128 against 0.871
/// at 64,32, one network each; README "Defaults").
inline std::vector<std::size_t> hidden_widths(const model_settings& s, std::size_t train_rows) {
    if (s.hidden) return *s.hidden;
    std::size_t first = 64;
    // The nearest power of two to sqrt(n) is 2^k for 4^k / 2 <= n < 4^k * 2.
    while (first < 256 && static_cast<double>(train_rows) >= 2.0 * static_cast<double>(first) * static_cast<double>(first)) first *= 2;
    return {first, first / 2};
}

/// A trained model with the plan that prepares its inputs.
template <class T>
struct fitted_model {
    measured_plan plan;
    network<T> net;
    training_outcome outcome;
    loss_kind loss = loss_kind::l2;
    // Row counts; with a team holding shards, over all members' shards.
    std::size_t train_rows = 0;
    std::size_t validation_rows = 0;
    std::size_t dropped_rows = 0;  // rows with a missing target, left out of training and validation
    /// The plain baseline, fitted on the same prepared training rows:
    /// ridge least squares for regression (train/baseline.hpp), multinomial
    /// logistic regression for classification (a network without hidden
    /// layers, trained as the network is, with early stopping on the same
    /// validation rows). Empty (0 features) in a team. evaluate_baseline
    /// scores it.
    linear_fit baseline;
    /// The baseline had the lower validation loss, so `net` computes the
    /// baseline (fit_model ships the better of the two).
    bool kept_baseline = false;
    /// Validation loss of the network (before any swap) and of the baseline,
    /// in prepared units (mean squared error, or cross-entropy); NaN without
    /// validation rows or baseline.
    double network_validation_loss = std::numeric_limits<double>::quiet_NaN();
    double baseline_validation_loss = std::numeric_limits<double>::quiet_NaN();
    /// The ensemble's other networks (`net` is the first member); their
    /// outputs are averaged with net's (predict_prepared). Empty for one network.
    std::vector<network<T>> members;
    /// Member count: 1 + members.size().
    std::size_t member_count() const noexcept { return 1 + members.size(); }
    /// Per member (net first): the optimizer steps at which its validation
    /// loss was best (training_outcome::best_step); empty without validation
    /// rows. For the logistic baseline: baseline_best_step.
    std::vector<std::uint64_t> best_steps{};
    std::uint64_t baseline_best_step = 0;
    /// Class weights of the loss (model_settings::class_weights); empty for none.
    std::vector<double> class_weights{};
    /// After refit_model: the training plus validation rows (with a target)
    /// it trained on, and each member's steps (net first; the baseline's
    /// for a shipped baseline, 0 for ridge least squares). 0 and empty when
    /// not refit.
    std::size_t refit_rows = 0;
    std::vector<std::uint64_t> refit_steps{};
    /// The training rows fit_model was given (this member's shard in a team
    /// holding shards) and its settings without the host's controls (no
    /// observers, clock, cancel flag, team or executor): what
    /// make_model_file(model, table) needs besides the table.
    std::vector<std::size_t> fitted_rows{};
    model_settings settings{};
};

namespace detail {

// The settings as a fitted model keeps them: the host's controls dropped,
// so that nothing the model holds points into the host's frames.
inline model_settings kept_settings(model_settings s) {
    static_cast<run_controls&>(s) = run_controls{};
    s.team = nullptr;
    s.workers = nullptr;
    s.exchange = nullptr;
    return s;
}

}  // namespace detail

/// Scores of a model on some rows, in the target's original units.
struct evaluation {
    bool classification = false;
    std::size_t rows = 0;
    std::size_t dropped_rows = 0;  // rows with a missing target, not scored
    // classification
    double accuracy = 0.0;
    double macro_f1 = 0.0;
    double log_loss = 0.0;
    classification_scores classes;
    // regression, original units
    double rmse = 0.0;
    double mae = 0.0;
    double r2 = 0.0;
};

namespace detail {

template <class T>
supervised_rows<T> to_supervised(prepared_rows<T>&& p, const measured_plan& plan) {
    supervised_rows<T> d;
    d.features = std::move(p.features);
    if (plan.target_type() == target_kind::classification) {
        d.class_count = plan.class_count();
        d.labels.assign(p.classes.begin(), p.classes.end());
    } else {
        d.targets = std::move(p.targets);
    }
    return d;
}

// The networks' mean: class probabilities (each network's softmax) or
// values in prepared units, summed in order and divided by the count, as
// the predictor does (serve/predictor.hpp).
template <class T>
matrix<T> averaged_outputs(const std::vector<const network<T>*>& nets, bool classify, const matrix<T>& features) {
    matrix<T> sum = network_outputs(*nets.front(), features);
    if (classify) sum = softmax_rows(sum);
    if (nets.size() == 1) return sum;
    for (std::size_t n = 1; n < nets.size(); ++n) {
        matrix<T> m = network_outputs(*nets[n], features);
        if (classify) m = softmax_rows(m);
        for (std::size_t k = 0; k < sum.size(); ++k) sum.data()[k] += m.data()[k];
    }
    const T count = static_cast<T>(nets.size());
    for (std::size_t k = 0; k < sum.size(); ++k) sum.data()[k] /= count;
    return sum;
}

// The model's networks, net first.
template <class T>
std::vector<network<T>*> member_networks(fitted_model<T>& model) {
    std::vector<network<T>*> nets{&model.net};
    for (auto& m : model.members) nets.push_back(&m);
    return nets;
}

// The same, read-only (for outputs, scores and files).
template <class T>
std::vector<const network<T>*> member_networks(const fitted_model<T>& model) {
    std::vector<const network<T>*> nets{&model.net};
    for (const auto& m : model.members) nets.push_back(&m);
    return nets;
}

template <class T>
matrix<T> averaged_outputs(const fitted_model<T>& model, const matrix<T>& features) {
    return averaged_outputs(member_networks(model), model.plan.target_type() == target_kind::classification, features);
}

// Trains `nets`, each from its own seed (member_seed(k)): the first with
// the host's observers, the others without. With an executor of more than
// one thread, and `alone` (not in a team), they train side by side, each on
// one thread; otherwise one after the other on the workers, and then, when
// `remaining` is given and a time budget is set, member k gets an even
// share of what it says is left (the first the whole budget's share). With
// `step_limits` (one per network) each stops after its own number of steps.
// Returns the outcomes in order.
template <class T, class Seed>
std::vector<training_outcome> train_networks(const std::vector<network<T>*>& nets, const training_options<T>& o, update_kind update,
                                             double learning_rate, double weight_decay, bool alone, const Seed& member_seed,
                                             const supervised_rows<T>& train, const supervised_rows<T>& validation,
                                             const std::vector<std::uint64_t>& step_limits = {}, const std::function<double()>& remaining = {}) {
    struct job {
        network<T>* net = nullptr;
        training_options<T> options;
        training_outcome outcome;
        std::exception_ptr error;
    };
    const std::size_t count = nets.size();
    std::vector<job> jobs(count);
    const bool side_by_side = count > 1 && alone && o.workers && o.workers->concurrency() > 1;
    for (std::size_t k = 0; k < count; ++k) {
        jobs[k].net = nets[k];
        jobs[k].options = o;
        jobs[k].options.seed = member_seed(k);
        if (!step_limits.empty()) jobs[k].options.max_steps = static_cast<std::size_t>(step_limits[k]);
        if (k > 0) {
            jobs[k].options.on_epoch = nullptr;
            jobs[k].options.on_batch = nullptr;
        }
        if (side_by_side) jobs[k].options.workers = nullptr;
    }
    const auto run_one = [&](job& j) {
        auto rule = make_update_rule<T>(update, weight_decay);
        constant_rate schedule(learning_rate);
        trainer<T> tr(*j.net, *rule, schedule, std::move(j.options));
        j.outcome = tr.run(train, validation);
    };
    if (side_by_side) {
        struct context {
            std::vector<job>* jobs;
            const decltype(run_one)* run;
        } c{&jobs, &run_one};
        o.workers->run(
            count,
            [](void* p, std::size_t k) {
                auto* ctx = static_cast<context*>(p);
                job& j = (*ctx->jobs)[k];
#if TENON_HAS_EXCEPTIONS
                try {
                    (*ctx->run)(j);
                } catch (...) {
                    j.error = std::current_exception();
                }
#else
                (*ctx->run)(j);
#endif
            },
            &c);
        for (auto& j : jobs)
            if (j.error) std::rethrow_exception(j.error);
    } else {
        for (std::size_t k = 0; k < count; ++k) {
            job& j = jobs[k];
            if (remaining && o.time_budget_seconds > 0.0) {
                const double left = k == 0 ? o.time_budget_seconds : remaining();
                if (left <= 0.0) {  // nothing left for this network: it keeps the weights it has
                    j.outcome.reason = stop_reason::time_budget;
                    j.outcome.message = "the time budget was spent before this member's training began";
                    continue;
                }
                j.options.time_budget_seconds = left / static_cast<double>(count - k);
            }
            run_one(j);
        }
    }
    std::vector<training_outcome> outcomes;
    for (auto& j : jobs) outcomes.push_back(std::move(j.outcome));
    return outcomes;
}

// Trains the model's networks (train_networks; net first) with the
// settings' update rule, and keeps net's outcome as the model's.
template <class T, class Seed>
std::vector<training_outcome> train_members(fitted_model<T>& model, const training_options<T>& o, const model_settings& s, const Seed& member_seed,
                                            const supervised_rows<T>& train, const supervised_rows<T>& validation,
                                            const std::vector<std::uint64_t>& step_limits = {}) {
    std::vector<training_outcome> outcomes =
        train_networks(member_networks(model), o, s.update, s.learning_rate, s.weight_decay, !s.team, member_seed, train, validation, step_limits);
    model.outcome = outcomes.front();
    return outcomes;
}

// He initialization suits rectifier-like units (He et al. 2015); Glorot
// suits tanh and sigmoid (Glorot & Bengio 2010).
inline initializer hidden_initializer(activation a) noexcept {
    const bool rectifier =
        a == activation::relu || a == activation::leaky_relu || a == activation::elu || a == activation::gelu || a == activation::gelu_tanh;
    return initializer{rectifier ? init_scheme::he : init_scheme::glorot, init_distribution::uniform};
}

// A network with a linear path starts from the linear fit `b`: the path's
// weights and the output bias from it, the hidden layers' output weights
// at zero, so training starts at the fit's predictions and the hidden
// layers learn what it leaves. False when `n` has no linear path.
// The logistic-regression baseline (a network without hidden layers,
// Glorot-initialized from the settings' seed) trained on `train` with the
// options `o` but without the host's observers, into `logistic`; its
// weights also go to `out`.
template <class T>
training_outcome train_logistic_baseline(const supervised_rows<T>& train, const supervised_rows<T>& validation, training_options<T> o,
                                         const model_settings& s, network<T>& logistic, linear_fit& out) {
    logistic = make_mlp<T>({train.features.shape()[1], train.class_count}, activation::identity,
                           initializer{init_scheme::glorot, init_distribution::uniform}, s.seed);
    o.on_epoch = nullptr;
    o.on_batch = nullptr;
    auto rule = make_update_rule<T>(s.update);
    constant_rate schedule(s.learning_rate);
    trainer<T> lt(logistic, *rule, schedule, std::move(o));
    const training_outcome r = lt.run(train, validation);
    out.features = train.features.shape()[1];
    out.outputs = train.class_count;
    out.class_scores = true;
    const matrix<T>& w = logistic.find("output.weights").value();
    const matrix<T>& c = logistic.find("output.bias").value();
    out.weights.assign(w.data(), w.data() + w.size());
    out.intercept.assign(c.data(), c.data() + c.size());
    return r;
}

template <class T>
bool start_from_linear(network<T>& n, const linear_fit& b) {
    if (n.layer_count() == 0) return false;
    auto* bypass = dynamic_cast<linear_bypass<T>*>(&n.layer_at(0));
    if (!bypass) return false;
    auto* output = dynamic_cast<dense<T>*>(&bypass->layer_at(bypass->layer_count() - 1));
    if (!output || !output->has_bias()) return false;
    matrix<T>& w = bypass->linear_weights().value();
    for (std::size_t k = 0; k < w.size(); ++k) w.data()[k] = static_cast<T>(b.weights[k]);
    output->weights().value().fill(T(0));
    for (std::size_t j = 0; j < output->outputs(); ++j) output->bias().value().data()[j] = static_cast<T>(b.intercept[j]);
    return true;
}

// Seed of ensemble member k: the golden-ratio increment of SplitMix64
// (Steele, Lea & Flood 2014) spreads them over the seed space.
inline std::uint64_t member_seed(std::uint64_t seed, std::size_t k) noexcept { return seed + static_cast<std::uint64_t>(k) * 0x9E3779B97F4A7C15ull; }

}  // namespace detail

template <class T>
bool refit_model(fitted_model<T>& model, const table& t, const std::vector<std::size_t>& train_rows, const std::vector<std::size_t>& validation_rows,
                 const model_settings& s);

/// Measures `preparation` on `train_rows`, trains a perceptron on them with early
/// stopping on `validation_rows` (which may be empty: then training runs all
/// epochs on the training loss), and returns the model with its plan.
/// In a team whose members hold shards (model_settings::member_rows), the
/// rows are this member's shard: the plan is measured over all members'
/// training rows (model_settings::exchange), this member prepares only its
/// own rows, and every member returns the same model.
template <class T>
fitted_model<T> fit_model(const table& t, const plan& preparation, const std::vector<std::size_t>& train_rows,
                          const std::vector<std::size_t>& validation_rows, const model_settings& s) {
    TENON_REQUIRE_SCALAR(T);
    const bool shards = s.team && s.member_rows == team_rows::shard_per_member;
    if (shards && !s.exchange) {
        raise(codes::train_option_invalid,
              "fit_model: a team whose members hold shards of the rows needs model_settings::exchange, so that one "
              "plan is measured over all members' training rows");
    }
    if (shards) require_same_columns(t, *s.exchange, "fit_model");
    if (s.team && s.refit.value_or(false)) raise(codes::train_option_invalid, "fit_model: a team cannot refit (model_settings::refit)");
    measured_plan measured = preparation.measure(t, train_rows, shards ? s.exchange : nullptr);
    // Preparing the rows can fail on one member alone (e.g. a missing cell
    // without a fill in its shard): the members agree on failing before the
    // trainer's first collective call.
    std::exception_ptr failure;
    supervised_rows<T> train, validation;
    std::size_t dropped = 0;
    loss_kind loss = loss_kind::l2;
    network<T> net;
    std::vector<std::size_t> sizes;
    initializer init;
    bool linear_path = false;
    const auto prepare = [&] {
        if (!measured.has_target()) raise(codes::train_option_invalid, "fit_model: the plan has no target column");
        const bool classify = measured.target_type() == target_kind::classification;
        if (classify && measured.class_count() < 2) {
            raise(codes::train_option_invalid,
                  "fit_model: the target '" + measured.target_name() + "' has " + std::to_string(measured.class_count()) +
                      " class in the training rows; classification needs at least 2");
        }
        prepared_rows<T> train_prepared = measured.template apply<T>(t, train_rows);
        prepared_rows<T> val_prepared;
        if (!validation_rows.empty()) val_prepared = measured.template apply<T>(t, validation_rows);
        dropped = train_prepared.dropped_missing_target + val_prepared.dropped_missing_target;

        train = detail::to_supervised(std::move(train_prepared), measured);
        if (!validation_rows.empty()) validation = detail::to_supervised(std::move(val_prepared), measured);

        loss = s.loss_given ? s.loss : (classify ? loss_kind::cross_entropy : loss_kind::l2);
        if (classify != (loss == loss_kind::cross_entropy)) {
            raise(codes::train_option_invalid,
                  std::string("fit_model: the ") + loss_kind_name(loss) + " loss does not fit a " + (classify ? "classification" : "regression") +
                      " target");
        }
        sizes.push_back(measured.feature_count());
        sizes.push_back(classify ? measured.class_count() : 1);  // the hidden widths go between, once the row count is known
        init = detail::hidden_initializer(s.hidden_activation);
        linear_path = s.linear_path.value_or(!classify);
    };
#if TENON_HAS_EXCEPTIONS
    try {
        prepare();
    } catch (...) {
        if (!s.team) throw;
        failure = std::current_exception();
    }
#else
    prepare();  // without exceptions a failure ends the process (core/error.hpp)
#endif
    if (s.team) throw_if_any_member_failed(*s.team, failure, "fit_model");
    fitted_model<T> model{std::move(measured),
                          std::move(net),
                          {},
                          loss,
                          train.rows(),
                          validation.rows(),
                          dropped,
                          {},
                          false,
                          std::numeric_limits<double>::quiet_NaN(),
                          std::numeric_limits<double>::quiet_NaN(),
                          {}};
    if (shards) {  // the counts of all members' shards
        double counts[3] = {static_cast<double>(model.train_rows), static_cast<double>(model.validation_rows), static_cast<double>(dropped)};
        s.team->sum(counts, 3);
        model.train_rows = static_cast<std::size_t>(counts[0]);
        model.validation_rows = static_cast<std::size_t>(counts[1]);
        model.dropped_rows = static_cast<std::size_t>(counts[2]);
    }
    model.fitted_rows = train_rows;
    model.settings = detail::kept_settings(s);
    // The widths may depend on the training row count (over all shards, so
    // every member of a team builds the same network).
    const std::vector<std::size_t> hidden = hidden_widths(s, model.train_rows);
    sizes.insert(sizes.begin() + 1, hidden.begin(), hidden.end());
    model.net = make_mlp<T>(sizes, s.hidden_activation, init, s.seed, activation::identity, linear_path);

    // The linear baseline; a linear path starts from it, with the hidden
    // layers' output weights at zero, so training starts at the baseline's
    // predictions and the hidden layers learn what it leaves.
    std::optional<network_snapshot<T>> baseline_net;  // the network computing the baseline, when it has a linear path
    const auto start_from_baseline = [&](network<T>& n) { return detail::start_from_linear(n, model.baseline); };
    if (!s.team && !train.is_classification()) {
        model.baseline = fit_least_squares(train.features, train.targets);
        if (start_from_baseline(model.net)) baseline_net = model.net.snapshot();
    }
    // The ensemble's other members: the same architecture from seeds of their
    // own (the golden-ratio increment of SplitMix64, Steele, Lea & Flood
    // 2014, spreads them over the seed space).
    if (s.team && s.ensemble > 1)
        raise(codes::train_option_invalid,
              "fit_model: a team trains one network; an ensemble of " + std::to_string(s.ensemble) + " is not supported");
    const std::size_t member_total = s.team ? 1 : ensemble_size(s, model.train_rows);
    const auto member_seed = [&](std::size_t k) { return detail::member_seed(s.seed, k); };
    for (std::size_t k = 1; k < member_total; ++k) {
        model.members.push_back(make_mlp<T>(sizes, s.hidden_activation, init, member_seed(k), activation::identity, linear_path));
        if (baseline_net) start_from_baseline(model.members.back());
    }

    training_options<T> o;
    o.epochs = s.epochs;
    o.batch_size = s.batch_size;
    o.patience = s.patience;
    // Rules of thumb of our own (common practice: a noisier curve gets more patience and more smoothing).
    const std::size_t validation_count = model.validation_rows;
    o.patience_steps = validation_count < 100 ? 2 * s.patience_steps : s.patience_steps;
    o.min_steps = s.min_steps;
    o.smoothing = s.smoothing ? *s.smoothing : validation_count < 100 ? 0.7 : validation_count < 1000 ? 0.5 : 0.0;
    o.min_improvement = s.min_improvement;
    o.seed = s.seed;
    o.loss = loss;
    if (s.class_weights != class_weighting::none && !train.is_classification()) {
        raise(codes::train_option_invalid,
              std::string("fit_model: class weights (") + to_string(s.class_weights) + ") need a classification target; '" +
                  model.plan.target_name() + "' is a regression target");
    }
    if (s.class_weights == class_weighting::balanced && train.is_classification()) {
        std::vector<double> counts(train.class_count, 0.0);
        for (const std::size_t c : train.labels) counts[c] += 1.0;
        if (shards) s.team->sum(counts.data(), counts.size());  // over all members' shards
        model.class_weights = balanced_weights_from_counts(counts);
        for (const double w : model.class_weights) o.loss_settings.class_weights.push_back(static_cast<T>(w));
    }
    static_cast<run_controls&>(o) = s;  // budget, clock, cancel flag, observers
    o.team = s.team;
    o.member_rows = s.member_rows;
    o.shuffle = s.shuffle;
    std::unique_ptr<thread_pool> pool;
    if (s.workers) {
        o.workers = s.workers;
    } else if (s.threads != 1) {
        pool = std::make_unique<thread_pool>(s.threads);
        o.workers = pool.get();
    }
    // Multinomial logistic regression: a network without hidden layers,
    // trained with the same options but without the host's observers.
    network<T> logistic;
    double logistic_loss = std::numeric_limits<double>::quiet_NaN();
    if (!s.team && train.is_classification()) {
        const training_outcome logistic_outcome = detail::train_logistic_baseline(train, validation, o, s, logistic, model.baseline);
        logistic_loss = logistic_outcome.best_validation_loss;
        model.baseline_best_step = logistic_outcome.best_step;
    }

    const std::vector<training_outcome> member_outcomes = detail::train_members(model, o, s, member_seed, train, validation);
    if (validation.rows() > 0)
        for (const auto& m : member_outcomes) model.best_steps.push_back(m.best_step);
    // Ship the better of the two on validation: when the baseline's loss is
    // lower, the network becomes the baseline (for regression: hidden
    // layers' output weights zero, linear path and bias from the baseline).
    if (model.baseline.features > 0 && validation.rows() > 0 && model.outcome.best_epoch > 0) {
        const matrix<T> predicted = detail::averaged_outputs(model, validation.features);
        if (train.is_classification()) {
            // Weighted as the loss is (the logistic baseline's loss too).
            double cross_entropy = 0.0, weight = 0.0;
            for (std::size_t i = 0; i < validation.rows(); ++i) {
                const double w = model.class_weights.empty() ? 1.0 : model.class_weights[validation.labels[i]];
                cross_entropy -= w * std::log(std::max(static_cast<double>(predicted(i, validation.labels[i])), 1e-300));
                weight += w;
            }
            model.network_validation_loss = cross_entropy / weight;
            model.baseline_validation_loss = logistic_loss;
        } else {
            double network_error = 0.0, baseline_error = 0.0;
            std::vector<double> row(model.baseline.outputs);
            for (std::size_t i = 0; i < validation.rows(); ++i) {
                model.baseline.predict_row(&validation.features(i, 0), row.data());
                for (std::size_t j = 0; j < row.size(); ++j) {
                    const double y = static_cast<double>(validation.targets(i, j));
                    network_error += (static_cast<double>(predicted(i, j)) - y) * (static_cast<double>(predicted(i, j)) - y);
                    baseline_error += (row[j] - y) * (row[j] - y);
                }
            }
            const double count = static_cast<double>(validation.targets.size());
            model.network_validation_loss = network_error / count;
            model.baseline_validation_loss = baseline_error / count;
        }
        if (model.baseline_validation_loss < model.network_validation_loss) {
            if (baseline_net) {
                model.net.restore(*baseline_net);
                model.members.clear();
                model.kept_baseline = true;
            } else if (train.is_classification()) {
                model.net = std::move(logistic);
                model.members.clear();
                model.kept_baseline = true;
            }
        }
    }
    // The refit on training plus validation rows (model_settings::refit).
    const bool cut = model.outcome.reason == stop_reason::time_budget || model.outcome.reason == stop_reason::cancelled;
    if (!s.team && !cut && validation.rows() > 0 && refit_wanted(s, model.train_rows + model.validation_rows)) {
        pool.reset();  // refit_model starts its own
        model_settings rest = s;  // the refit gets the time budget the validated run left
        if (rest.time_budget_seconds > 0.0) rest.time_budget_seconds -= model.outcome.seconds;
        if (s.time_budget_seconds <= 0.0 || rest.time_budget_seconds > 0.0) refit_model(model, t, train_rows, validation_rows, rest);
    }
    return model;
}

/// Trains `model` (from fit_model with the same settings, before any refit)
/// again on `train_rows` plus `validation_rows`, without validation: each
/// member from its own initial weights and seed for the optimizer steps at
/// which its validation loss was best (fitted_model::best_steps), the
/// baseline on the same rows (ridge least squares; multinomial logistic
/// regression for its own best step count). A network with a linear path
/// starts from the refit ridge fit, as fit_model starts from its ridge fit.
/// What the validated run chose stays: the member count, network versus
/// baseline, the plan (measured on the training rows) and the validation
/// losses. No other rows are read. The host's observers are not called;
/// the time budget and cancel flag apply to the refit alone, and when
/// either stops a member early (or it diverges) the model is left as it
/// was and the function returns false. Returns true when refit (then
/// fitted_model::refit_rows and refit_steps say how).
/// A host calibrates on the validation rows before calling this
/// (train/calibration.hpp needs rows the model did not train on).
template <class T>
bool refit_model(fitted_model<T>& model, const table& t, const std::vector<std::size_t>& train_rows, const std::vector<std::size_t>& validation_rows,
                 const model_settings& s) {
    TENON_REQUIRE_SCALAR(T);
    if (s.team) raise(codes::train_option_invalid, "refit_model: a team cannot refit");
    if (model.refit_rows > 0)
        raise(codes::train_option_invalid, "refit_model: the model was refit already (on " + std::to_string(model.refit_rows) + " rows)");
    if (validation_rows.empty() || model.best_steps.empty()) {
        raise(codes::train_option_invalid,
              "refit_model: the model has no validated stopping step to refit for (fit_model was given no validation rows)");
    }
    if (model.best_steps.size() != model.member_count() && !model.kept_baseline) {
        raise(codes::train_option_invalid,
              "refit_model: " + std::to_string(model.best_steps.size()) + " stopping steps for " + std::to_string(model.member_count()) + " members");
    }
    for (const std::uint64_t steps : model.best_steps)
        if (steps == 0) return false;  // no kept epoch (e.g. diverged at once): nothing to repeat
    const bool classify = model.plan.target_type() == target_kind::classification;
    if (classify && model.baseline.features > 0 && model.baseline_best_step == 0) return false;

    std::vector<std::size_t> rows(train_rows);
    rows.insert(rows.end(), validation_rows.begin(), validation_rows.end());
    supervised_rows<T> all = detail::to_supervised(model.plan.template apply<T>(t, rows), model.plan);
    const supervised_rows<T> none;

    training_options<T> o;
    o.epochs = std::numeric_limits<std::size_t>::max();  // the step limit ends each run
    o.batch_size = s.batch_size;
    o.patience = 0;
    o.seed = s.seed;
    o.loss = model.loss;
    for (const double w : model.class_weights) o.loss_settings.class_weights.push_back(static_cast<T>(w));
    static_cast<run_controls&>(o) = s;  // budget, clock, cancel flag
    o.on_epoch = nullptr;
    o.on_batch = nullptr;
    o.shuffle = s.shuffle;
    std::unique_ptr<thread_pool> pool;
    if (s.workers) {
        o.workers = s.workers;
    } else if (s.threads != 1) {
        pool = std::make_unique<thread_pool>(s.threads);
        o.workers = pool.get();
    }
    const auto completed = [](const training_outcome& r) { return r.reason == stop_reason::step_limit; };

    // The baseline on all rows.
    linear_fit baseline = model.baseline;
    network<T> logistic;
    std::uint64_t logistic_steps = 0;
    if (model.baseline.features > 0 && !classify) {
        baseline = fit_least_squares(all.features, all.targets);
    } else if (model.baseline.features > 0) {
        training_options<T> lo = o;
        lo.max_steps = static_cast<std::size_t>(model.baseline_best_step);
        const training_outcome r = detail::train_logistic_baseline(all, none, lo, s, logistic, baseline);
        if (!completed(r)) return false;
        logistic_steps = r.steps;
    }

    // The networks, as fit_model built them, from their own seeds.
    std::vector<std::size_t> sizes{model.plan.feature_count()};
    const std::vector<std::size_t> hidden = hidden_widths(s, model.train_rows);
    sizes.insert(sizes.end(), hidden.begin(), hidden.end());
    sizes.push_back(classify ? model.plan.class_count() : 1);
    const initializer init = detail::hidden_initializer(s.hidden_activation);
    const bool linear_path = s.linear_path.value_or(!classify);
    const auto build = [&](std::size_t k) {
        network<T> n = make_mlp<T>(sizes, s.hidden_activation, init, detail::member_seed(s.seed, k), activation::identity, linear_path);
        if (model.baseline.features > 0 && !classify) detail::start_from_linear(n, baseline);
        return n;
    };
    std::vector<std::uint64_t> steps;
    if (model.kept_baseline) {
        if (classify) {
            model.net = std::move(logistic);
            steps.push_back(logistic_steps);
        } else {
            model.net = build(0);  // the linear path from the refit ridge fit, the hidden layers silent
            steps.push_back(0);
        }
    } else {
        network<T> first = build(0);
        if (first.parameter_count() != model.net.parameter_count()) {
            raise(codes::train_option_invalid,
                  "refit_model: the settings build a network of " + std::to_string(first.parameter_count()) + " parameters, the model's has " +
                      std::to_string(model.net.parameter_count()) + " (pass the settings fit_model was given)");
        }
        // The new networks train in the model's place; the old ones come back if a run is cut.
        network<T> old_net = std::move(model.net);
        std::vector<network<T>> old_members = std::move(model.members);
        const training_outcome old_outcome = model.outcome;
        model.net = std::move(first);
        model.members.clear();
        for (std::size_t k = 1; k < model.best_steps.size(); ++k) model.members.push_back(build(k));
        const auto seeds = [&](std::size_t k) { return detail::member_seed(s.seed, k); };
        std::vector<training_outcome> outcomes;
#if TENON_HAS_EXCEPTIONS
        try {
            outcomes = detail::train_members(model, o, s, seeds, all, none, model.best_steps);
        } catch (...) {  // the model as it was
            model.net = std::move(old_net);
            model.members = std::move(old_members);
            model.outcome = old_outcome;
            throw;
        }
#else
        outcomes = detail::train_members(model, o, s, seeds, all, none, model.best_steps);
#endif
        model.outcome = old_outcome;  // the validated run's
        for (const auto& r : outcomes) {
            if (!completed(r)) {
                model.net = std::move(old_net);
                model.members = std::move(old_members);
                return false;
            }
            steps.push_back(r.steps);
        }
    }
    model.baseline = std::move(baseline);
    model.refit_rows = all.rows();
    model.refit_steps = std::move(steps);
    return true;
}

/// Predictions for prepared features: class probabilities (rows x classes)
/// for classification, values in the target's original units (rows x 1) for
/// regression.
template <class T>
matrix<T> predict_prepared(const fitted_model<T>& model, const matrix<T>& features) {
    matrix<T> out = detail::averaged_outputs(model, features);
    if (model.plan.target_type() == target_kind::classification) return out;
    const scaling& ts = model.plan.target_scaling();
    for (std::size_t k = 0; k < out.size(); ++k) out.data()[k] = static_cast<T>(ts.inverse(static_cast<double>(out.data()[k])));
    return out;
}

/// Scores `rows` of `t` (rows with a missing target are counted, not scored).
template <class T>
evaluation evaluate_model(const fitted_model<T>& model, const table& t, const std::vector<std::size_t>& rows) {
    prepared_rows<T> p = model.plan.template apply<T>(t, rows);
    evaluation e;
    e.rows = p.rows.size();
    e.dropped_rows = p.dropped_missing_target;
    if (e.rows == 0) raise(codes::train_rows_empty, "evaluate_model: no rows with a target to score");
    const matrix<T> predicted = predict_prepared(model, p.features);
    if (model.plan.target_type() == target_kind::classification) {
        e.classification = true;
        const std::vector<std::size_t> truth(p.classes.begin(), p.classes.end());
        e.classes = score_classes(truth, row_argmax(predicted), model.plan.class_count());
        e.accuracy = e.classes.accuracy;
        e.macro_f1 = e.classes.macro_f1;
        e.log_loss = log_loss(predicted, truth);
    } else {
        const scaling& ts = model.plan.target_scaling();
        std::vector<double> truth(e.rows), values(e.rows);
        for (std::size_t i = 0; i < e.rows; ++i) {
            truth[i] = ts.inverse(static_cast<double>(p.targets.data()[i]));
            values[i] = static_cast<double>(predicted.data()[i]);
        }
        const regression_scores r = score_values(truth, values);
        e.rmse = r.rmse;
        e.mae = r.mae;
        e.r2 = r.r2;
    }
    return e;
}

/// Scores the model's plain baseline (fitted_model::baseline) on `rows`, in
/// the target's original units, as evaluate_model scores the model.
template <class T>
evaluation evaluate_baseline(const fitted_model<T>& model, const table& t, const std::vector<std::size_t>& rows) {
    if (model.baseline.features == 0) raise(codes::train_option_invalid, "evaluate_baseline: the model holds no baseline (it was trained in a team)");
    prepared_rows<T> p = model.plan.template apply<T>(t, rows);
    evaluation e;
    e.rows = p.rows.size();
    e.dropped_rows = p.dropped_missing_target;
    if (e.rows == 0) raise(codes::train_rows_empty, "evaluate_baseline: no rows with a target to score");
    if (model.baseline.class_scores) {
        e.classification = true;
        const std::size_t k = model.baseline.outputs;
        matrix<T> probabilities({e.rows, k});
        std::vector<double> scores(k);
        for (std::size_t i = 0; i < e.rows; ++i) {
            model.baseline.predict_row(&p.features(i, 0), scores.data());
            for (std::size_t j = 0; j < k; ++j) probabilities(i, j) = static_cast<T>(scores[j]);
        }
        probabilities = softmax_rows(probabilities);
        const std::vector<std::size_t> truth(p.classes.begin(), p.classes.end());
        e.classes = score_classes(truth, row_argmax(probabilities), model.plan.class_count());
        e.accuracy = e.classes.accuracy;
        e.macro_f1 = e.classes.macro_f1;
        e.log_loss = log_loss(probabilities, truth);
        return e;
    }
    const scaling& ts = model.plan.target_scaling();
    std::vector<double> truth(e.rows), values(e.rows);
    double v = 0.0;
    for (std::size_t i = 0; i < e.rows; ++i) {
        model.baseline.predict_row(&p.features(i, 0), &v);
        truth[i] = ts.inverse(static_cast<double>(p.targets.data()[i]));
        values[i] = ts.inverse(v);
    }
    const regression_scores r = score_values(truth, values);
    e.rmse = r.rmse;
    e.mae = r.mae;
    e.r2 = r.r2;
    return e;
}

/// Mean and sample standard deviation (n - 1) of one metric over folds.
struct metric_spread {
    std::string name;
    double mean = 0.0;
    double standard_deviation = 0.0;
    std::vector<double> per_fold;
};

struct cross_validation_report {
    std::vector<evaluation> folds;
    std::vector<metric_spread> metrics;  // accuracy, macro_f1, log_loss or rmse, mae, r2
};

/// Fits and scores one model per fold. Within each fold, `validation_share`
/// of the fold's training rows (the latest ones when `chronological`, else a
/// seeded random choice) is held out for early stopping; the plan is
/// measured on the rest, so nothing of the fold's test rows is seen.
template <class T>
cross_validation_report cross_validate(const table& t, const plan& preparation, const std::vector<fold>& folds, const model_settings& s,
                                       double validation_share = 0.15, bool chronological = false) {
    if (folds.size() < 2) raise(codes::train_option_invalid, "cross_validate: needs at least 2 folds, got " + std::to_string(folds.size()));
    if (!(validation_share >= 0.0 && validation_share < 1.0)) {
        raise(codes::train_option_invalid, "cross_validate: the validation share must be in [0, 1), got " + std::to_string(validation_share));
    }
    cross_validation_report report;
    for (std::size_t f = 0; f < folds.size(); ++f) {
        std::vector<std::size_t> inner = folds[f].train;
        if (!chronological) {
            random_engine engine(s.seed, 0xF01D0000u + f);
            engine.shuffle(inner.begin(), inner.end());
        }
        const auto n_val = static_cast<std::size_t>(std::floor(validation_share * static_cast<double>(inner.size())));
        std::vector<std::size_t> val(inner.end() - static_cast<std::ptrdiff_t>(n_val), inner.end());
        inner.resize(inner.size() - n_val);
        std::sort(inner.begin(), inner.end());
        std::sort(val.begin(), val.end());
        fitted_model<T> m = fit_model<T>(t, preparation, inner, val, s);
        report.folds.push_back(evaluate_model(m, t, folds[f].test));
    }
    const bool classify = report.folds.front().classification;
    auto add = [&](const char* name, double evaluation::*field) {
        metric_spread m;
        m.name = name;
        for (const auto& e : report.folds) m.per_fold.push_back(e.*field);
        for (double v : m.per_fold) m.mean += v;
        m.mean /= static_cast<double>(m.per_fold.size());
        double ss = 0.0;
        for (double v : m.per_fold) ss += (v - m.mean) * (v - m.mean);
        m.standard_deviation = std::sqrt(ss / static_cast<double>(m.per_fold.size() - 1));
        report.metrics.push_back(std::move(m));
    };
    if (classify) {
        add("accuracy", &evaluation::accuracy);
        add("macro_f1", &evaluation::macro_f1);
        add("log_loss", &evaluation::log_loss);
    } else {
        add("rmse", &evaluation::rmse);
        add("mae", &evaluation::mae);
        add("r2", &evaluation::r2);
    }
    return report;
}

TENON_NAMESPACE_END

// The compiled-once mode (core/compiled_once.hpp).
#if defined(TENON_DETAIL_TRAIN_INSTANCE)
TENON_NAMESPACE_BEGIN
#define TENON_DETAIL_WORKFLOW_INSTANCES(T)                                                                                                           \
    TENON_DETAIL_TRAIN_INSTANCE fitted_model<T> fit_model<T>(const table&, const plan&, const std::vector<std::size_t>&,                             \
                                                             const std::vector<std::size_t>&, const model_settings&);                                \
    TENON_DETAIL_TRAIN_INSTANCE bool refit_model<T>(fitted_model<T>&, const table&, const std::vector<std::size_t>&,                                 \
                                                    const std::vector<std::size_t>&, const model_settings&);                                         \
    TENON_DETAIL_TRAIN_INSTANCE matrix<T> predict_prepared<T>(const fitted_model<T>&, const matrix<T>&);                                             \
    TENON_DETAIL_TRAIN_INSTANCE evaluation evaluate_model<T>(const fitted_model<T>&, const table&, const std::vector<std::size_t>&);                 \
    TENON_DETAIL_TRAIN_INSTANCE evaluation evaluate_baseline<T>(const fitted_model<T>&, const table&, const std::vector<std::size_t>&);              \
    TENON_DETAIL_TRAIN_INSTANCE cross_validation_report cross_validate<T>(const table&, const plan&, const std::vector<fold>&,                       \
                                                                          const model_settings&, double, bool);
TENON_DETAIL_WORKFLOW_INSTANCES(float)
TENON_DETAIL_WORKFLOW_INSTANCES(double)
#undef TENON_DETAIL_WORKFLOW_INSTANCES
TENON_NAMESPACE_END
#endif
