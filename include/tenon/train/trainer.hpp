// tenon: the trainer.
//
// A trainer runs epochs of seeded, shuffled mini-batches over prepared data
// (forward, loss, backward, one update, then validation in inference mode),
// keeps the weights of the epoch with the lowest validation loss, and stops
// at the epoch limit, by early stopping (Prechelt 1998), on a wall-clock
// budget, on cancellation, or after repeated divergence (stop_reason). The
// same seed, data and options give bit-identical weights for any thread
// count. Several trainers can train one model as a team (training_team).
// Stop rules, allocation and teams in detail: docs/design/trainer.md.
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
#include <numeric>
#include <string>
#include <vector>

#include "tenon/core/enum_text.hpp"
#include "tenon/core/elementwise.hpp"
#include "tenon/core/parallel.hpp"
#include "tenon/layers/network.hpp"
#include "tenon/losses/classification.hpp"
#include "tenon/losses/regression.hpp"
#include "tenon/train/metrics.hpp"
#include "tenon/update/schedules.hpp"
#include "tenon/update/update_rule.hpp"

TENON_NAMESPACE_BEGIN

/// Rows ready for training: features, and either class labels or targets.
template <class T>
struct supervised_rows {
    matrix<T> features;  // rows x inputs
    std::vector<std::size_t> labels;  // classification: one class index per row
    matrix<T> targets;  // regression: rows x outputs
    std::size_t class_count = 0;  // classification only

    bool is_classification() const noexcept { return class_count > 0; }
    std::size_t rows() const noexcept { return features.shape()[0]; }
};

enum class loss_kind : std::uint8_t { l1, l2, huber, cross_entropy };

inline const char* to_string(loss_kind k) noexcept {
    switch (k) {
    case loss_kind::l1: return "l1";
    case loss_kind::l2: return "l2";
    case loss_kind::huber: return "huber";
    case loss_kind::cross_entropy: return "cross-entropy";
    }
    return "unknown";
}
/// The former spelling of to_string(loss_kind).
inline const char* loss_kind_name(loss_kind v) noexcept { return to_string(v); }

enum class stop_reason : std::uint8_t { epoch_limit, no_improvement, time_budget, cancelled, diverged, step_limit };

inline const char* to_string(stop_reason r) noexcept {
    switch (r) {
    case stop_reason::epoch_limit: return "epoch_limit";
    case stop_reason::no_improvement: return "no_improvement";
    case stop_reason::time_budget: return "time_budget";
    case stop_reason::cancelled: return "cancelled";
    case stop_reason::diverged: return "diverged";
    case stop_reason::step_limit: return "step_limit";
    }
    return "unknown";
}
/// The former spelling of to_string(stop_reason).
inline const char* stop_reason_name(stop_reason v) noexcept { return to_string(v); }

/// Progress within an epoch, for progress bars.
struct batch_progress {
    std::size_t epoch = 0;  // 1-based
    std::size_t batch = 0;  // 1-based
    std::size_t batches = 0;
    double loss = 0.0;  // this batch's loss
    double elapsed_seconds = 0.0;
};

struct training_outcome {
    stop_reason reason = stop_reason::epoch_limit;
    std::vector<epoch_summary> history;
    std::size_t best_epoch = 0;  // 1-based epoch whose weights were kept; 0 if none
    double best_validation_loss = std::numeric_limits<double>::quiet_NaN();
    std::uint64_t steps = 0;  // updates applied
    std::uint64_t best_step = 0;  // updates applied when the kept epoch ended; 0 if none (or resumed before it)
    double seconds = 0.0;
    std::string message;  // why training stopped, in words
};

/// How the members of a training team hold the training rows (see "Teams"
/// in docs/design/trainer.md).
enum class team_rows : std::uint8_t {
    /// Every member passes all training rows; each takes its part of every
    /// global batch from one shuffle shared by all.
    all_on_every_member,
    /// Every member passes only its own shard of the rows and shuffles it
    /// itself; the global batch is the members' batches together.
    shard_per_member
};

/// The members of a team of trainers (docs/design/trainer.md, "Teams"). Every call
/// is collective: all members make the same calls in the same order, each
/// returning when all have made it.
class training_team {
public:
    virtual ~training_team() = default;
    virtual std::size_t member_count() const = 0;
    /// This member's index in [0, member_count()).
    virtual std::size_t member_index() const = 0;
    /// Replaces `values[k]` by its sum over the members, for every k; every
    /// member must receive the same bits.
    virtual void sum(float* values, std::size_t count) = 0;
    virtual void sum(double* values, std::size_t count) = 0;
};

/// Collective over `team` (every member calls it at the same point): when
/// any member passes a failure, every member throws, a failing member its
/// own exception and every other member train.team.member_failed naming the
/// failed members, so that no member goes on to a collective call the
/// failed ones never make. Returns normally when no member failed. `stage`
/// names the caller in the message (e.g. "trainer").
inline void throw_if_any_member_failed(training_team& team, const std::exception_ptr& failure, const char* stage) {
    const std::size_t members = team.member_count(), me = team.member_index();
    if (members == 0 || me >= members) {
        raise(codes::train_team_mismatch, std::string(stage) + ": team member " + std::to_string(me) + " of " + std::to_string(members));
    }
    std::vector<double> failed(members, 0.0);
    failed[me] = failure ? 1.0 : 0.0;
    team.sum(failed.data(), failed.size());
    if (failure) std::rethrow_exception(failure);
    std::string who;
    std::size_t count = 0;
    for (std::size_t m = 0; m < members; ++m) {
        if (failed[m] == 0.0) continue;
        who += (count++ == 0 ? "" : ", ") + std::to_string(m);
    }
    if (count > 0) {
        raise(codes::train_team_member_failed,
              std::string(stage) + ": team member" + (count > 1 ? "s " : " ") + who + " of " + std::to_string(members) + " failed (see " +
                  (count > 1 ? "their" : "its") + " own error); member " + std::to_string(me) + " stops with " + (count > 1 ? "them" : "it"));
    }
}

/// What a host controls while a run goes: a time budget with the clock
/// that measures it, a cancel flag, and observers of every epoch and batch.
/// training_options, model_settings and retraining_options each hold it as
/// one part and hand it on whole (time budgets in tests use an injected
/// clock, never sleeps).
struct run_controls {
    /// Wall-clock budget in seconds for the whole run; 0 or less = none.
    double time_budget_seconds = 0.0;
    /// Seconds from an arbitrary origin; defaults to std::chrono::steady_clock.
    std::function<double()> clock;
    /// Set to true from any thread to stop after the current batch.
    const std::atomic<bool>* cancel = nullptr;
    /// Called after every epoch; return false to stop (reason: cancelled).
    std::function<bool(const epoch_summary&)> on_epoch;
    /// Called after every batch (keep it cheap).
    std::function<void(const batch_progress&)> on_batch;
};

template <class T>
struct training_options : run_controls {
    std::size_t epochs = 100;
    std::size_t batch_size = 32;
    std::uint64_t seed = 0;
    /// Early stopping: epochs without improvement before stopping; 0 disables.
    std::size_t patience = 10;
    /// A validation loss counts as an improvement when it is lower than the
    /// best so far by more than this.
    double min_improvement = 0.0;
    /// Early stopping counted in optimizer steps as well: with a value above
    /// 0 the run stops only when both `patience` epochs and this many steps
    /// have passed since the best epoch, so a small data set (a few steps an
    /// epoch) is not stopped after a few dozen updates. 0: epochs alone.
    std::size_t patience_steps = 0;
    /// Early stopping never ends a run before this many optimizer steps (the
    /// epoch limit, the budget and cancellation still do).
    std::size_t min_steps = 0;
    /// Stop after this many optimizer steps, within an epoch if need be
    /// (stop_reason::step_limit); 0: no limit. A refit on more rows
    /// (train/workflow.hpp, refit_model) trains for the steps a validated
    /// run chose.
    std::size_t max_steps = 0;
    /// Judge improvement on an exponentially smoothed validation loss,
    /// s = smoothing s + (1 - smoothing) loss, in [0, 1); 0 judges the raw
    /// loss. A small validation set gives a noisy curve whose single low
    /// point would otherwise pick the kept epoch and restart the patience.
    double smoothing = 0.0;
    /// Keep the best epoch's weights when training stops (put them back).
    bool keep_best = true;
    loss_kind loss = loss_kind::l2;
    loss_options<T> loss_settings;
    std::size_t divergence_retries = 3;
    double divergence_rate_factor = 0.5;
    /// Continue a run from this point instead of starting afresh (the
    /// network, update rule and schedule must hold their state from the same
    /// point). `epochs` still counts from the start of the original run.
    const training_progress<T>* resume = nullptr;
    /// Runs the matrix products of training and validation on these workers
    /// (core/parallel.hpp); nullptr keeps everything on the calling thread.
    /// Results are bit-identical for any thread count. Must outlive run().
    executor* workers = nullptr;
    /// Train as a member of this team (nullptr: alone); `batch_size` is then
    /// the batch of each member. Must outlive run().
    training_team* team = nullptr;
    /// How the team's members hold the training and validation rows (see
    /// "Teams" in docs/design/trainer.md); every member gives the same choice.
    team_rows member_rows = team_rows::all_on_every_member;
    /// Shuffle the training rows at the start of every epoch; false takes
    /// them in the order given, every epoch.
    bool shuffle = true;
};

namespace detail {

inline double steady_seconds() { return std::chrono::duration<double>(std::chrono::steady_clock::now().time_since_epoch()).count(); }

template <class T>
void validate_rows(const supervised_rows<T>& d, const char* which, std::size_t inputs, loss_kind loss) {
    const std::size_t rows = d.rows();
    if (rows == 0) raise(codes::train_rows_empty, std::string("trainer: the ") + which + " rows are empty");
    if (inputs != 0 && d.features.shape()[1] != inputs) {
        raise(codes::core_shape_mismatch,
              std::string("trainer: ") + which + " features have " + std::to_string(d.features.shape()[1]) + " columns, the " + "training features " +
                  std::to_string(inputs));
    }
    if (d.is_classification()) {
        if (loss != loss_kind::cross_entropy) {
            raise(codes::train_option_invalid, std::string("trainer: class labels need the cross-entropy loss, not ") + loss_kind_name(loss));
        }
        if (d.labels.size() != rows) {
            raise(codes::core_shape_mismatch,
                  std::string("trainer: ") + which + " has " + std::to_string(rows) + " feature rows but " + std::to_string(d.labels.size()) +
                      " labels");
        }
        for (std::size_t i = 0; i < rows; ++i) {
            if (d.labels[i] >= d.class_count) {
                raise(codes::train_option_invalid,
                      std::string("trainer: ") + which + " row " + std::to_string(i) + " has class " + std::to_string(d.labels[i]) +
                          ", outside [0, " + std::to_string(d.class_count) + ")");
            }
        }
    } else {
        if (loss == loss_kind::cross_entropy) raise(codes::train_option_invalid, "trainer: the cross-entropy loss needs class labels");
        if (d.targets.shape()[0] != rows) {
            raise(codes::core_shape_mismatch,
                  std::string("trainer: ") + which + " has " + std::to_string(rows) + " feature rows but " + std::to_string(d.targets.shape()[0]) +
                      " target rows");
        }
    }
    if (const std::size_t k = first_non_finite(d.features.data(), d.features.size()); k < d.features.size()) {
        const std::size_t c = d.features.shape()[1];
        raise(codes::train_input_non_finite,
              std::string("trainer: ") + which + " feature at row " + std::to_string(k / c) + ", column " + std::to_string(k % c) + " is " +
                  std::to_string(d.features.data()[k]));
    }
    if (const std::size_t k = first_non_finite(d.targets.data(), d.targets.size()); k < d.targets.size()) {
        const std::size_t c = d.targets.shape()[1];
        raise(codes::train_input_non_finite,
              std::string("trainer: ") + which + " target at row " + std::to_string(k / c) + ", column " + std::to_string(k % c) + " is " +
                  std::to_string(d.targets.data()[k]));
    }
}

template <class T>
bool all_finite(const matrix<T>& m) noexcept {
    return first_non_finite(m.data(), m.size()) == m.size();
}

}  // namespace detail

/// Records the configured loss of `output` against rows `[begin, end)` of the
/// batch buffers.
template <class T>
var<T> record_loss(tape<T>& t, var<T> output, loss_kind kind, const matrix<T>& targets, const std::vector<std::size_t>& labels,
                   const loss_options<T>& settings) {
    switch (kind) {
    case loss_kind::l1: return l1_loss(t, output, targets, settings);
    case loss_kind::l2: return l2_loss(t, output, targets, settings);
    case loss_kind::huber: return huber_loss(t, output, targets, settings);
    case loss_kind::cross_entropy: return cross_entropy_loss(t, output, labels, settings);
    }
    raise(codes::train_option_invalid, "record_loss: unknown loss kind");
}

/// Network outputs for every row, computed in inference mode in chunks of
/// `chunk` rows (logits for classification, values for regression), the
/// matrix products split across `workers` when given.
template <class T>
matrix<T> network_outputs(const network<T>& net, const matrix<T>& features, std::size_t chunk = 512, executor* workers = nullptr) {
    const std::size_t rows = features.shape()[0], cols = features.shape()[1];
    const std::size_t width = net.output_width(cols);
    matrix<T> out({rows, width});
    tape<T> t;
    t.set_executor(workers);
    t.set_inference_only(true);
    for (std::size_t start = 0; start < rows; start += chunk) {
        const std::size_t n = std::min(chunk, rows - start);
        t.clear();
        const var<T> y = net.infer(t, t.input(features.data() + start * cols, n, cols));
        std::copy(y.value().data(), y.value().data() + n * width, out.data() + start * width);
    }
    return out;
}

/// softmax(logits / temperature) per row, each exp taken of (z - max z) /
/// temperature: the predictor computes the same operations in the same order.
template <class T>
matrix<T> tempered_softmax_rows(const matrix<T>& logits, double temperature) {
    const std::size_t rows = logits.shape()[0], cols = logits.shape()[1];
    const T t = static_cast<T>(temperature);
    matrix<T> p({rows, cols});
    for (std::size_t i = 0; i < rows; ++i) {
        const T* z = logits.data() + i * cols;
        T* q = p.data() + i * cols;
        const T m = *std::max_element(z, z + cols);
        T s = T(0);
        for (std::size_t j = 0; j < cols; ++j) s += (q[j] = std::exp((z[j] - m) / t));
        for (std::size_t j = 0; j < cols; ++j) q[j] /= s;
    }
    return p;
}

/// Row-wise softmax of logits (probabilities), computed stably: the
/// tempered form at temperature 1 (dividing by 1 changes no bit).
template <class T>
matrix<T> softmax_rows(const matrix<T>& logits) {
    return tempered_softmax_rows(logits, 1.0);
}

template <class T>
class trainer {
    TENON_REQUIRE_SCALAR(T);

public:
    trainer(network<T>& net, update_rule<T>& rule, rate_schedule& schedule, training_options<T> options)
        : net_(net), rule_(rule), schedule_(schedule), options_(std::move(options)) {
        if (options_.batch_size == 0) raise(codes::train_option_invalid, "trainer: batch_size must be at least 1");
        if (!(options_.divergence_rate_factor > 0.0 && options_.divergence_rate_factor < 1.0)) {
            raise(codes::train_option_invalid,
                  "trainer: divergence_rate_factor must be in (0, 1), got " + std::to_string(options_.divergence_rate_factor));
        }
        if (!(options_.min_improvement >= 0.0)) {
            raise(codes::train_option_invalid, "trainer: min_improvement must be non-negative, got " + std::to_string(options_.min_improvement));
        }
        if (!options_.loss_settings.sample_weights.empty()) {
            raise(codes::train_option_invalid,
                  "trainer: per-sample loss weights cannot be given for the whole run (" +
                      std::to_string(options_.loss_settings.sample_weights.size()) +
                      " weights); use class weights, or record the loss yourself per batch");
        }
        if (!(options_.smoothing >= 0.0 && options_.smoothing < 1.0)) {
            raise(codes::train_option_invalid, "trainer: smoothing must be in [0, 1), got " + std::to_string(options_.smoothing));
        }
        if (options_.resume && (options_.patience_steps > 0 || options_.min_steps > 0 || options_.smoothing > 0.0)) {
            raise(codes::train_option_invalid,
                  "trainer: a resumed run counts patience in epochs only (patience_steps, min_steps and smoothing must be 0)");
        }
        if (!options_.clock) options_.clock = detail::steady_seconds;
    }

    const training_options<T>& options() const noexcept { return options_; }

    /// The state after the last completed epoch of run(), updated before
    /// on_epoch is called: save it (with the network, rule and schedule
    /// state) from on_epoch to checkpoint a run.
    const training_progress<T>& progress() const noexcept { return progress_; }

    /// Trains on `train`, validating on `validation` after every epoch (pass
    /// an empty validation set to train without validation or early stopping).
    /// In a team whose members hold shards (training_options::member_rows),
    /// both are this member's shards: `train` of at least one row,
    /// `validation` possibly empty (the team validates when any member has
    /// validation rows).
    training_outcome run(const supervised_rows<T>& train, const supervised_rows<T>& validation) {
        training_team* const team = options_.team;
        const bool shards = team && options_.member_rows == team_rows::shard_per_member;
        // A team member whose checks fail must not leave the others waiting
        // in the first collective call: the failure is shared first.
        std::exception_ptr failure;
        const auto checks = [&] {
            check_rows(train, validation);
            if (options_.resume) check_resume(*options_.resume, train.rows());
            if (team && !shards) team_validation(validation);
        };
#if TENON_HAS_EXCEPTIONS
        try {
            checks();
        } catch (...) {
            if (!team) throw;
            failure = std::current_exception();
        }
#else
        checks();  // without exceptions a failed check ends the process (core/error.hpp)
#endif
        bool validate = validation.rows() > 0;
        if (team) {
            throw_if_any_member_failed(*team, failure, "trainer");
            epoch_batches_ = check_team(train, validation, validate);
        } else {
            epoch_batches_ = (train.rows() + options_.batch_size - 1) / options_.batch_size;
        }
        const supervised_rows<T>& validation_share = team && !shards ? shared_validation_ : validation;

        training_outcome out;
        const double start = options_.clock();
        // With shards each member shuffles its own rows: a stream of its own.
        const std::uint64_t stream = shards ? 0x5EED5u + (static_cast<std::uint64_t>(team->member_index()) + 1) * 0x100000000ull : 0x5EED5u;
        random_engine shuffle_engine(options_.seed, stream);
        std::vector<std::size_t> order(train.rows());
        std::iota(order.begin(), order.end(), std::size_t(0));

        network_snapshot<T> best, epoch_start;
        double best_loss = std::numeric_limits<double>::infinity();
        double smoothed = std::numeric_limits<double>::quiet_NaN();
        std::size_t since_best = 0;
        std::uint64_t best_step = 0;
        // Patience: epochs, and steps when asked, since the best epoch; never before min_steps.
        const auto patience_spent = [&] {
            return options_.patience > 0 && since_best >= options_.patience && out.steps - best_step >= options_.patience_steps &&
                out.steps >= options_.min_steps;
        };
        double rate_factor = 1.0;
        bool stop = false;
        std::size_t epoch = 0;
        if (options_.resume) {
            const training_progress<T>& r = *options_.resume;
            shuffle_engine.set_state(r.shuffle_engine);
            order = r.order;
            best = r.best;
            best_loss = r.best_validation_loss;
            out.best_epoch = r.best_epoch;
            out.best_validation_loss = r.best_epoch > 0 ? r.best_validation_loss : std::numeric_limits<double>::quiet_NaN();
            since_best = r.epochs_since_best;
            rate_factor = r.rate_factor;
            out.steps = r.steps;
            out.history = r.history;
            epoch = r.epochs_done;
            // The uninterrupted run checked patience right after that epoch.
            if (validate && options_.patience > 0 && since_best >= options_.patience && epoch > 0) {
                out.reason = stop_reason::no_improvement;
                out.message = "no validation improvement for " + std::to_string(options_.patience) + " epochs; best was epoch " +
                    std::to_string(out.best_epoch);
                stop = true;
            }
        }

        while (!stop && epoch < options_.epochs) {
            const double epoch_t0 = options_.clock();
            net_.snapshot_into(epoch_start);
            rule_.copy_state_into(rule_start_);
            const random_state engine_state = shuffle_engine.state();
            const std::uint64_t steps_before = out.steps;

            std::size_t retries = 0;
            epoch_result r;
            for (;;) {
                r = run_epoch(train, order, shuffle_engine, epoch, rate_factor, out.steps, start);
                if (r.status != epoch_status::diverged) break;
                // Divergence guard: back to the start of the epoch, smaller steps.
                net_.restore(epoch_start);
                rule_.restore_state(rule_start_);
                shuffle_engine.set_state(engine_state);
                out.steps = steps_before;
                if (retries == options_.divergence_retries) break;
                ++retries;
                rate_factor *= options_.divergence_rate_factor;
            }

            epoch_summary s;
            s.epoch = epoch + 1;
            s.retries = retries;
            s.training_loss = r.loss;
            s.learning_rate = r.learning_rate;

            if (r.status == epoch_status::diverged) {
                out.reason = stop_reason::diverged;
                out.message = "the loss or a gradient became non-finite in epoch " + std::to_string(epoch + 1) + " after " + std::to_string(retries) +
                    " retries with a lower learning rate; the weights from before that epoch were kept";
                s.seconds = options_.clock() - epoch_t0;
                out.history.push_back(s);
                break;
            }
            if (r.status == epoch_status::cancelled || r.status == epoch_status::out_of_time) {
                // A partial epoch: its weights are kept only if no validated epoch exists.
                out.reason = r.status == epoch_status::cancelled ? stop_reason::cancelled : stop_reason::time_budget;
                out.message = r.status == epoch_status::cancelled
                    ? "cancelled by the host during epoch " + std::to_string(epoch + 1)
                    : "the time budget of " + std::to_string(options_.time_budget_seconds) + " s ran out during epoch " + std::to_string(epoch + 1);
                s.seconds = options_.clock() - epoch_t0;
                out.history.push_back(s);
                break;
            }

            if (options_.team) average_state_buffers();
            if (validate) {
                if (options_.team)
                    evaluate_shared(validation_share, train.is_classification(), s.validation_loss, s.validation_metric);
                else
                    assess(validation, s.validation_loss, s.validation_metric);
                schedule_.report_metric(s.validation_loss);
                if (!std::isfinite(s.validation_loss)) {
                    net_.restore(epoch_start);
                    rule_.restore_state(rule_start_);
                    out.reason = stop_reason::diverged;
                    out.message = "the validation loss became non-finite in epoch " + std::to_string(epoch + 1);
                    s.seconds = options_.clock() - epoch_t0;
                    out.history.push_back(s);
                    break;
                }
                const double a = options_.smoothing;
                smoothed = out.best_epoch == 0 || a == 0.0 ? s.validation_loss : a * smoothed + (1.0 - a) * s.validation_loss;
                if (smoothed < best_loss - options_.min_improvement || out.best_epoch == 0) {
                    best_loss = smoothed;
                    out.best_epoch = epoch + 1;
                    out.best_validation_loss = s.validation_loss;
                    best_step = out.steps;
                    out.best_step = out.steps;
                    net_.snapshot_into(best);
                    since_best = 0;
                } else {
                    ++since_best;
                }
            } else {
                schedule_.report_metric(s.training_loss);
            }
            s.seconds = options_.clock() - epoch_t0;
            out.history.push_back(s);
            ++epoch;

            // What a checkpoint taken now (e.g. from on_epoch) needs to resume.
            progress_.epochs_done = epoch;
            progress_.steps = out.steps;
            progress_.shuffle_engine = shuffle_engine.state();
            progress_.order = order;
            progress_.history = out.history;
            progress_.best_epoch = out.best_epoch;
            progress_.best_validation_loss = best_loss;
            if (out.best_epoch > 0)
                progress_.best.values = best.values;
            else
                progress_.best.values.clear();
            progress_.epochs_since_best = since_best;
            progress_.rate_factor = rate_factor;

            bool observer_stop = options_.on_epoch && !options_.on_epoch(s);
            bool out_of_time = budget_spent(start);
            if (options_.team) {
                // Any member's observer or clock stops all members.
                double flags[2] = {observer_stop ? 1.0 : 0.0, out_of_time ? 1.0 : 0.0};
                options_.team->sum(flags, 2);
                observer_stop = flags[0] > 0.0;
                out_of_time = flags[1] > 0.0;
            }
            if (observer_stop) {
                out.reason = stop_reason::cancelled;
                out.message = "stopped by the epoch observer after epoch " + std::to_string(epoch);
                stop = true;
            } else if (options_.max_steps > 0 && out.steps >= options_.max_steps) {
                out.reason = stop_reason::step_limit;
                out.message = "completed " + std::to_string(out.steps) + " steps";
                stop = true;
            } else if (validate && patience_spent()) {
                out.reason = stop_reason::no_improvement;
                out.message = "no validation improvement for " + std::to_string(since_best) + " epochs (" + std::to_string(out.steps - best_step) +
                    " steps); best was epoch " + std::to_string(out.best_epoch);
                stop = true;
            } else if (out_of_time) {
                out.reason = stop_reason::time_budget;
                out.message =
                    "the time budget of " + std::to_string(options_.time_budget_seconds) + " s ran out after epoch " + std::to_string(epoch);
                stop = true;
            }
        }
        if (!stop && out.reason == stop_reason::epoch_limit) {
            out.message = "completed " + std::to_string(options_.epochs) + " epochs";
        }
        if (options_.keep_best && out.best_epoch > 0) net_.restore(best);
        out.seconds = options_.clock() - start;
        return out;
    }

    /// Loss and metric (accuracy, or RMSE in prepared units) of `rows` in
    /// inference mode.
    void assess(const supervised_rows<T>& rows, double& loss, double& metric) {
        const matrix<T> outputs = network_outputs(net_, rows.features, 512, options_.workers);
        tape<T> t;
        const var<T> o = t.input(outputs);
        loss = static_cast<double>(record_loss(t, o, options_.loss, rows.targets, rows.labels, options_.loss_settings).value()(0, 0));
        if (rows.is_classification()) {
            const auto predicted = row_argmax(outputs);
            std::size_t correct = 0;
            for (std::size_t i = 0; i < predicted.size(); ++i) correct += predicted[i] == rows.labels[i];
            metric = static_cast<double>(correct) / static_cast<double>(predicted.size());
        } else {
            metric = score_values(rows.targets.data(), outputs.data(), outputs.size()).rmse;
        }
    }

private:
    enum class epoch_status { completed, diverged, cancelled, out_of_time };
    struct epoch_result {
        epoch_status status = epoch_status::completed;
        double loss = 0.0;
        double learning_rate = 0.0;
    };

    bool budget_spent(double start) const { return options_.time_budget_seconds > 0.0 && options_.clock() - start >= options_.time_budget_seconds; }

    // The rows and the network fit each other. A team member's validation
    // shard may be empty (the team validates when any member has rows).
    void check_rows(const supervised_rows<T>& train, const supervised_rows<T>& validation) const {
        const std::size_t inputs = train.features.shape()[1];
        detail::validate_rows(train, "training", 0, options_.loss);
        const bool validate = validation.rows() > 0;
        if (validate) detail::validate_rows(validation, "validation", inputs, options_.loss);
        if (validate && validation.is_classification() != train.is_classification()) {
            raise(codes::train_option_invalid, "trainer: training and validation rows disagree on classification versus regression");
        }
        const std::size_t width = net_.output_width(inputs);
        if (train.is_classification() && width != train.class_count) {
            raise(codes::core_shape_mismatch,
                  "trainer: the network gives " + std::to_string(width) + " outputs for " + std::to_string(train.class_count) + " classes");
        }
        if (!train.is_classification() && width != train.targets.shape()[1]) {
            raise(codes::core_shape_mismatch,
                  "trainer: the network gives " + std::to_string(width) + " outputs for " + std::to_string(train.targets.shape()[1]) +
                      " target columns");
        }
    }

    // A resumed state fits these rows (with shards: this member's shard).
    static void check_resume(const training_progress<T>& r, std::size_t rows) {
        if (r.order.size() != rows) {
            raise(codes::train_option_invalid,
                  "trainer: the resumed run shuffled " + std::to_string(r.order.size()) + " training rows, this run has " + std::to_string(rows));
        }
        std::vector<std::uint8_t> seen(rows, 0);
        for (const std::size_t i : r.order) {
            if (i >= rows || seen[i]) raise(codes::train_option_invalid, "trainer: the resumed row order is not a permutation");
            seen[i] = 1;
        }
        if (r.best_epoch > r.epochs_done || (r.best_epoch > 0 && r.best.values.empty())) {
            raise(codes::train_option_invalid,
                  "trainer: the resumed progress names best epoch " + std::to_string(r.best_epoch) + " without its weights or after epoch " +
                      std::to_string(r.epochs_done));
        }
        if (!(r.rate_factor > 0.0 && r.rate_factor <= 1.0)) {
            raise(codes::train_option_invalid, "trainer: the resumed rate factor must be in (0, 1], got " + std::to_string(r.rate_factor));
        }
    }

    // One pass over the (shuffled) training rows: epoch_batches_ steps.
    epoch_result run_epoch(const supervised_rows<T>& d, std::vector<std::size_t>& order, random_engine& engine, std::size_t epoch, double rate_factor,
                           std::uint64_t& steps, double start) {
        epoch_result r;
        if (options_.shuffle) engine.shuffle(order.begin(), order.end());
        net_.set_mode(run_mode::training);
        training_team* team = options_.team;
        const bool shards = team && options_.member_rows == team_rows::shard_per_member;
        // With all rows on every member, this member's positions of global
        // batch b are b G + me, b G + me + members, ... (G = batch x members);
        // with shards (and alone) its own positions [b batch, (b + 1) batch).
        const std::size_t members = team && !shards ? team->member_count() : 1, me = team && !shards ? team->member_index() : 0;
        const std::size_t global_batch = options_.batch_size * members;
        const std::size_t rows = d.rows(), inputs = d.features.shape()[1];
        const std::size_t batches = epoch_batches_;
        double loss_sum = 0.0;
        std::size_t done = 0;  // steps of this epoch
        // From here on the update rule clears each gradient after using it
        // (see the update below), so every step starts from zero gradients.
        for (auto* p : net_.parameters()) p->clear_gradient();
        for (std::size_t b = 0; b < batches; ++b) {
            const std::size_t first = b * global_batch;
            const std::size_t global_rows = first < rows ? std::min(global_batch, rows - first) : 0;
            const std::size_t n = global_rows > me ? (global_rows - me + members - 1) / members : 0;
            batch_buffers& buf = n == options_.batch_size ? full_ : tail_;
            double lv = 0.0;
            bool finite = true;
            if (n > 0) {  // only a team member can have no row in a step
                buf.t.clear();
                buf.t.set_executor(options_.workers);
                // The rows go straight into the tape's input buffer.
                const var<T> x = buf.t.input_from(shape2{n, inputs},
                                                  [&](T* batch_rows) { gather_batch(d, order, first + me, members, n, inputs, batch_rows, buf); });
                const var<T> y = net_.forward(buf.t, x);
                const var<T> loss = record_loss(buf.t, y, options_.loss, buf.targets, buf.labels, options_.loss_settings);
                lv = static_cast<double>(loss.value()(0, 0));
                finite = std::isfinite(lv);
                if (finite) {
                    buf.t.backward(loss);
                    // Alone, the update rule looks at the gradients (apply_and_check below).
                    if (team)
                        for (const auto* p : net_.parameters()) finite = finite && !(p->trainable() && !detail::all_finite(p->grad()));
                }
            }
            bool cancelled = false, out_of_time = false;
            if (team) {
                cancelled = options_.cancel && options_.cancel->load(std::memory_order_relaxed);
                out_of_time = budget_spent(start);
                share_step(*team, buf.labels, n, lv, finite, cancelled, out_of_time);
            }
            if (!finite) {
                r.status = epoch_status::diverged;
                net_.set_mode(run_mode::inference);
                return r;
            }
            const double lr = schedule_.rate(steps, epoch) * rate_factor;
            {
                // The update runs on the trainer's workers and clears each
                // gradient after using it (the next step accumulates into
                // zeros); the rule's own settings are back afterwards.
                struct settings_for_step {
                    update_rule<T>& rule;
                    executor* own;
                    bool clears;
                    ~settings_for_step() {
                        rule.set_executor(own);
                        rule.set_clears_gradients(clears);
                    }
                } scope{rule_, rule_.workers(), rule_.clears_gradients()};
                rule_.set_executor(options_.workers);
                rule_.set_clears_gradients(true);
                if (team) {
                    rule_.apply(net_.parameters(), static_cast<T>(lr));
                } else if (!rule_.apply_and_check(net_.parameters(), static_cast<T>(lr))) {
                    // A non-finite gradient: the caller restores the epoch's start.
                    r.status = epoch_status::diverged;
                    net_.set_mode(run_mode::inference);
                    return r;
                }
            }
            ++steps;
            ++done;
            r.learning_rate = lr;
            loss_sum += lv;
            if (options_.on_batch) {
                options_.on_batch(batch_progress{epoch + 1, b + 1, batches, lv, options_.clock() - start});
            }
            if (team ? cancelled : options_.cancel && options_.cancel->load(std::memory_order_relaxed)) {
                r.status = epoch_status::cancelled;
                break;
            }
            if (team ? out_of_time : budget_spent(start)) {
                r.status = epoch_status::out_of_time;
                break;
            }
            if (options_.max_steps > 0 && steps >= options_.max_steps) break;  // a partial epoch, completed
        }
        r.loss = loss_sum / static_cast<double>(std::max<std::size_t>(done, 1));
        net_.set_mode(run_mode::inference);
        return r;
    }

    struct batch_buffers {
        tape<T> t;
        matrix<T> targets;
        std::vector<std::size_t> labels;
    };

    // gather_batch's copying, part `index` of `parts`: its share of the rows.
    struct batch_gather {
        const supervised_rows<T>* d;
        const std::vector<std::size_t>* order;
        std::size_t first, stride, n, inputs;
        T* rows;
        std::size_t parts;

        static void run_part(void* context, std::size_t index) {
            const batch_gather& w = *static_cast<const batch_gather*>(context);
            w.gather(index * w.n / w.parts, (index + 1) * w.n / w.parts);
        }
        void gather(std::size_t begin, std::size_t end) const {
            // The shuffled rows lie anywhere in memory: ask for the row after
            // next while copying this one (about 30% less waiting, measured on
            // Fashion-MNIST's 54,000 rows).
            constexpr std::size_t ahead = 2, line = 64 / sizeof(T);
            const T* features = d->features.data();
            for (std::size_t i = begin; i < end; ++i) {
                if (i + ahead < end) {
                    const T* next = features + (*order)[first + (i + ahead) * stride] * inputs;
                    for (std::size_t k = 0; k < inputs; k += line) detail::prefetch_for_reading(next + k);
                }
                const T* src = features + (*order)[first + i * stride] * inputs;
                std::copy(src, src + inputs, rows + i * inputs);
            }
        }
    };

    // The batch of a step: the features of rows order[first],
    // order[first + stride], ... (n of them) into `rows` (n x inputs), split
    // across the workers when there are several (a shuffled row lies
    // anywhere in memory, so each thread's copying mostly waits for it);
    // labels or targets into `buf`.
    void gather_batch(const supervised_rows<T>& d, const std::vector<std::size_t>& order, std::size_t first, std::size_t stride, std::size_t n,
                      std::size_t inputs, T* rows, batch_buffers& buf) {
        batch_gather work{&d, &order, first, stride, n, inputs, rows, 1};
        executor* workers = options_.workers;
        // Below this many values a hand-off costs more than it saves.
        constexpr std::size_t split_threshold = std::size_t(1) << 14;
        if (workers && workers->concurrency() > 1 && n * inputs >= split_threshold) {
            work.parts = std::min(workers->concurrency(), n);
            workers->run(work.parts, &batch_gather::run_part, &work);
        } else {
            work.gather(0, n);
        }
        if (d.is_classification()) {
            buf.labels.resize(n);
            for (std::size_t i = 0; i < n; ++i) buf.labels[i] = d.labels[order[first + i * stride]];
        } else {
            const std::size_t outs = d.targets.shape()[1];
            ensure_shape(buf.targets, shape2{n, outs});
            for (std::size_t i = 0; i < n; ++i) {
                const T* src = d.targets.data() + order[first + i * stride] * outs;
                std::copy(src, src + outs, buf.targets.data() + i * outs);
            }
        }
    }

    // The weight of a member's batch in the global batch's loss, following
    // losses/loss_options.hpp: with the mean reduction the sum of the rows'
    // weights (class weights for cross-entropy, else 1 per row), with the
    // sum reduction 1 (the global loss is the sum of the members' losses).
    double batch_weight(const std::vector<std::size_t>& labels, std::size_t n) const {
        if (n == 0) return 0.0;
        if (options_.loss_settings.reduction == loss_reduction::sum) return 1.0;
        const auto& cw = options_.loss_settings.class_weights;
        if (options_.loss != loss_kind::cross_entropy || cw.empty()) return static_cast<double>(n);
        double w = 0.0;
        for (std::size_t i = 0; i < n; ++i) w += static_cast<double>(cw[labels[i]]);
        return w;
    }

    // One fused sum over the team per step: every trainable gradient times
    // this member's batch weight, then weight, weighted loss and three flags
    // (non-finite, cancelled, out of time). The averaged gradient replaces
    // the local one; the flags become the team's.
    void share_step(training_team& team, const std::vector<std::size_t>& labels, std::size_t n, double& lv, bool& finite, bool& cancelled,
                    bool& out_of_time) {
        const double w = finite ? batch_weight(labels, n) : 0.0;
        std::size_t total = 0;
        for (const auto* p : net_.parameters())
            if (p->trainable()) total += p->size();
        fused_.resize(total + 5);  // no allocation after the first step
        T* f = fused_.data();
        for (const auto* p : net_.parameters()) {
            if (!p->trainable()) continue;
            const T* g = p->grad().data();
            for (std::size_t k = 0; k < p->size(); ++k) *f++ = finite ? g[k] * static_cast<T>(w) : T(0);
        }
        f[0] = static_cast<T>(w);
        f[1] = finite ? static_cast<T>(lv * w) : T(0);
        f[2] = finite ? T(0) : T(1);
        f[3] = cancelled ? T(1) : T(0);
        f[4] = out_of_time ? T(1) : T(0);
        team.sum(fused_.data(), fused_.size());
        const bool mean = options_.loss_settings.reduction == loss_reduction::mean;
        const T divisor = mean ? f[0] : T(1);
        finite = f[2] == T(0) && divisor > T(0);
        cancelled = f[3] > T(0);
        out_of_time = f[4] > T(0);
        if (!finite) return;
        lv = static_cast<double>(f[1]) / static_cast<double>(divisor);
        const T* src = fused_.data();
        for (auto* p : net_.parameters()) {
            if (!p->trainable()) continue;
            T* g = p->grad().data();
            for (std::size_t k = 0; k < p->size(); ++k) g[k] = *src++ / divisor;
        }
        for (const auto* p : net_.parameters()) finite = finite && !(p->trainable() && !detail::all_finite(p->grad()));
    }

    // The members must train one model with the same settings. Each member
    // writes its numbers into its own slots of one buffer; one sum gives
    // every member all members' numbers, and every member makes the same
    // comparisons on them, so all raise together or none does. With all rows
    // on every member the row counts must agree too; with shards they give
    // the steps of an epoch (the largest shard's batch count) and whether
    // the team validates (any member has validation rows). Returns the
    // steps per epoch.
    std::size_t check_team(const supervised_rows<T>& train, const supervised_rows<T>& validation, bool& validate) {
        training_team& team = *options_.team;
        const std::size_t members = team.member_count(), me = team.member_index();
        const bool shards = options_.member_rows == team_rows::shard_per_member;
        enum field : std::size_t {
            holding,
            training_rows,
            validation_rows,
            input_columns,
            outputs,
            classes,
            batch,
            seed_low,
            seed_high,
            epochs,
            patience,
            min_improvement,
            retries,
            rate_factor,
            loss,
            reduction,
            shuffle,
            parameters,
            field_count
        };
        static const char* const names[field_count] = {"row holding (0 all rows on every member, 1 a shard per member)",
                                                       "training rows",
                                                       "validation rows",
                                                       "input columns",
                                                       "network outputs",
                                                       "class count",
                                                       "batch size",
                                                       "seed (low bits)",
                                                       "seed (high bits)",
                                                       "epochs",
                                                       "patience",
                                                       "minimum improvement",
                                                       "divergence retries",
                                                       "divergence rate factor",
                                                       "loss",
                                                       "loss reduction",
                                                       "shuffling (1 on, 0 off)",
                                                       "parameters"};
        std::vector<double> all(members * field_count, 0.0);
        double* mine = all.data() + me * field_count;
        const std::size_t inputs = train.features.shape()[1];
        mine[training_rows] = static_cast<double>(train.rows());
        mine[validation_rows] = static_cast<double>(validation.rows());
        mine[input_columns] = static_cast<double>(inputs);
        mine[outputs] = static_cast<double>(net_.output_width(inputs));
        mine[classes] = static_cast<double>(train.class_count);
        mine[batch] = static_cast<double>(options_.batch_size);
        mine[seed_low] = static_cast<double>(options_.seed & 0xFFFFFFFFu);
        mine[seed_high] = static_cast<double>(options_.seed >> 32);
        mine[epochs] = static_cast<double>(options_.epochs);
        mine[patience] = static_cast<double>(options_.patience);
        mine[min_improvement] = options_.min_improvement;
        mine[retries] = static_cast<double>(options_.divergence_retries);
        mine[rate_factor] = options_.divergence_rate_factor;
        mine[loss] = static_cast<double>(options_.loss);
        mine[reduction] = static_cast<double>(options_.loss_settings.reduction);
        mine[shuffle] = options_.shuffle ? 1.0 : 0.0;
        mine[holding] = static_cast<double>(options_.member_rows);
        mine[parameters] = static_cast<double>(net_.parameter_count());
        team.sum(all.data(), all.size());
        const bool all_shards = all[holding] == static_cast<double>(team_rows::shard_per_member);
        for (std::size_t k = 0; k < field_count; ++k) {
            if (all_shards && (k == training_rows || k == validation_rows)) continue;
            for (std::size_t m = 1; m < members; ++m) {
                const double first = all[k], other = all[m * field_count + k];
                if (other == first) continue;
                raise(codes::train_team_mismatch,
                      std::string("trainer: the team's members disagree on the ") + names[k] + " (member 0 has " + number_text(first) + ", member " +
                          std::to_string(m) + " has " + number_text(other) + "; this is member " + std::to_string(me) + ")");
            }
        }
        if (!shards) return (train.rows() + options_.batch_size * members - 1) / (options_.batch_size * members);
        std::size_t steps = 0;
        double validation_total = 0.0;
        for (std::size_t m = 0; m < members; ++m) {
            const auto shard = static_cast<std::size_t>(all[m * field_count + training_rows]);
            steps = std::max(steps, (shard + options_.batch_size - 1) / options_.batch_size);
            validation_total += all[m * field_count + validation_rows];
        }
        validate = validation_total > 0.0;
        return steps;
    }
    static std::string number_text(double v) {
        std::string t = std::to_string(v);
        while (!t.empty() && t.back() == '0') t.pop_back();
        if (!t.empty() && t.back() == '.') t.pop_back();
        return t;
    }

    // Every member-th validation row, starting at this member's index.
    const supervised_rows<T>& team_validation(const supervised_rows<T>& validation) {
        const std::size_t members = options_.team->member_count(), me = options_.team->member_index();
        const std::size_t rows = validation.rows(), n = rows > me ? (rows - me + members - 1) / members : 0;
        shared_validation_ = supervised_rows<T>{};
        shared_validation_.class_count = validation.class_count;
        const std::size_t inputs = validation.features.shape()[1];
        shared_validation_.features = matrix<T>({n, inputs});
        const bool classify = validation.is_classification();
        const std::size_t outs = classify ? 0 : validation.targets.shape()[1];
        if (!classify) shared_validation_.targets = matrix<T>({n, outs});
        for (std::size_t i = 0; i < n; ++i) {
            const std::size_t r = me + i * members;
            std::copy(validation.features.data() + r * inputs, validation.features.data() + (r + 1) * inputs,
                      shared_validation_.features.data() + i * inputs);
            if (classify)
                shared_validation_.labels.push_back(validation.labels[r]);
            else
                std::copy(validation.targets.data() + r * outs, validation.targets.data() + (r + 1) * outs,
                          shared_validation_.targets.data() + i * outs);
        }
        return shared_validation_;
    }

    // The validation loss and metric of the whole validation set from each
    // member's share (which may be empty): the loss weighted as in training,
    // accuracy by rows, RMSE through the summed squared errors.
    void evaluate_shared(const supervised_rows<T>& share, bool classify, double& loss, double& metric) {
        double local_loss = 0.0, local_metric = 0.0;
        const std::size_t n = share.rows();
        if (n > 0) assess(share, local_loss, local_metric);
        const double w = batch_weight(share.labels, n);
        const double values = n > 0 ? static_cast<double>(n * (classify ? 1 : share.targets.shape()[1])) : 0.0;
        double sums[4] = {w * local_loss, w, classify ? local_metric * values : local_metric * local_metric * values, values};
        options_.team->sum(sums, 4);
        loss = options_.loss_settings.reduction == loss_reduction::mean ? sums[0] / sums[1] : sums[0];
        metric = classify ? sums[2] / sums[3] : std::sqrt(sums[2] / sums[3]);
    }

    // Population estimates are not trained by the gradient: the members'
    // are averaged so that every member holds the same model.
    void average_state_buffers() {
        const auto& state = net_.state_buffers();
        if (state.empty()) return;
        std::size_t total = 0;
        for (const auto* p : state) total += p->size();
        fused_.resize(total);
        T* f = fused_.data();
        for (const auto* p : state) f = std::copy(p->value().data(), p->value().data() + p->size(), f);
        options_.team->sum(fused_.data(), total);
        const T m = static_cast<T>(options_.team->member_count());
        const T* src = fused_.data();
        for (auto* p : state)
            for (std::size_t k = 0; k < p->size(); ++k) p->value().data()[k] = *src++ / m;
    }

    network<T>& net_;
    update_rule<T>& rule_;
    rate_schedule& schedule_;
    training_options<T> options_;
    batch_buffers full_, tail_;
    typename update_rule<T>::state_copy rule_start_;  // the rule at the current epoch's start
    training_progress<T> progress_;
    std::vector<T> fused_;  // a team's per-step sum
    std::size_t epoch_batches_ = 0;  // steps per epoch
    supervised_rows<T> shared_validation_;  // a team member's validation rows
};

TENON_NAMESPACE_END
