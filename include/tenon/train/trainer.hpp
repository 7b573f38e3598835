// tenon: the trainer.
//
// A trainer runs epochs of seeded, shuffled mini-batches over prepared data:
// forward, loss, backward, one update; then a validation pass in inference
// mode. It keeps the weights of the epoch with the lowest validation loss and
// stops for one of the reasons in stop_reason:
//   - the epoch limit;
//   - early stopping: `patience` epochs in a row without the validation loss
//     improving on the best by more than `min_improvement` (the best weights
//     are restored: Prechelt, "Early Stopping - But When?", 1998, section 2);
//   - the wall-clock budget, read from an injectable clock, checked after
//     every batch;
//   - cooperative cancellation through a flag the host sets from any thread,
//     checked after every batch;
//   - divergence: a non-finite loss or gradient restores the weights and
//     update-rule state from the start of the epoch, multiplies the learning
//     rate by `divergence_rate_factor` and retries the epoch, at most
//     `divergence_retries` times.
// With the same seed, data and options, two runs give bit-identical weights
// (every random draw comes from tenon's engine, and the matrix products give
// the same bits for any number of worker threads, see core/gemm.hpp).
//
// Allocation: the trainer keeps one tape for full batches and one for the
// last, shorter batch of an epoch, so after the first epoch a training step
// records into buffers it already has.
#pragma once

#include <algorithm>
#include <atomic>
#include <chrono>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <functional>
#include <limits>
#include <numeric>
#include <string>
#include <vector>

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
    matrix<T> features;                 // rows x inputs
    std::vector<std::size_t> labels;    // classification: one class index per row
    matrix<T> targets;                  // regression: rows x outputs
    std::size_t class_count = 0;        // classification only

    bool is_classification() const noexcept { return class_count > 0; }
    std::size_t rows() const noexcept { return features.shape()[0]; }
};

enum class loss_kind : std::uint8_t { l1, l2, huber, cross_entropy };

inline const char* loss_kind_name(loss_kind k) noexcept {
    switch (k) {
        case loss_kind::l1: return "l1";
        case loss_kind::l2: return "l2";
        case loss_kind::huber: return "huber";
        case loss_kind::cross_entropy: return "cross-entropy";
    }
    return "unknown";
}

enum class stop_reason : std::uint8_t { epoch_limit, no_improvement, time_budget, cancelled, diverged };

inline const char* stop_reason_name(stop_reason r) noexcept {
    switch (r) {
        case stop_reason::epoch_limit: return "epoch_limit";
        case stop_reason::no_improvement: return "no_improvement";
        case stop_reason::time_budget: return "time_budget";
        case stop_reason::cancelled: return "cancelled";
        case stop_reason::diverged: return "diverged";
    }
    return "unknown";
}

/// One line of the training history.
struct epoch_summary {
    std::size_t epoch = 0;               // 1-based
    double train_loss = 0.0;             // mean over the epoch's batches
    double validation_loss = std::numeric_limits<double>::quiet_NaN();
    double validation_metric = std::numeric_limits<double>::quiet_NaN();  // accuracy or RMSE (prepared units)
    double learning_rate = 0.0;          // at the epoch's last step
    double seconds = 0.0;                // training plus validation
    std::size_t retries = 0;             // divergence retries spent on this epoch
};

/// Progress within an epoch, for progress bars.
struct batch_progress {
    std::size_t epoch = 0;      // 1-based
    std::size_t batch = 0;      // 1-based
    std::size_t batches = 0;
    double loss = 0.0;          // this batch's loss
    double elapsed_seconds = 0.0;
};

struct training_outcome {
    stop_reason reason = stop_reason::epoch_limit;
    std::vector<epoch_summary> history;
    std::size_t best_epoch = 0;          // 1-based epoch whose weights were kept; 0 if none
    double best_validation_loss = std::numeric_limits<double>::quiet_NaN();
    std::uint64_t steps = 0;             // updates applied
    double seconds = 0.0;
    std::string message;                 // why training stopped, in words
};

/// Where a run stands after a whole epoch: everything besides the weights,
/// the update-rule state and the schedule state that the next epoch depends
/// on. A run given this (training_options::resume) together with the
/// network, rule and schedule as they were at that point continues exactly
/// as the uninterrupted run would have, bit for bit.
template <class T>
struct training_progress {
    std::size_t epochs_done = 0;            // whole epochs completed
    std::uint64_t steps = 0;                // updates applied
    random_state shuffle_engine;            // the engine that shuffles the rows
    std::vector<std::size_t> order;         // the row permutation the next shuffle starts from
    std::vector<epoch_summary> history;
    std::size_t best_epoch = 0;             // 1-based; 0 = none yet
    double best_validation_loss = std::numeric_limits<double>::infinity();
    network_snapshot<T> best;               // weights of best_epoch (empty when none)
    std::size_t epochs_since_best = 0;
    double rate_factor = 1.0;               // product of divergence reductions so far
};

template <class T>
struct training_options {
    std::size_t epochs = 100;
    std::size_t batch_size = 32;
    std::uint64_t seed = 0;
    /// Early stopping: epochs without improvement before stopping; 0 disables.
    std::size_t patience = 10;
    /// A validation loss counts as an improvement when it is lower than the
    /// best so far by more than this.
    double min_improvement = 0.0;
    /// Restore the best epoch's weights when training stops.
    bool restore_best = true;
    loss_kind loss = loss_kind::l2;
    loss_options<T> loss_settings;
    std::size_t divergence_retries = 3;
    double divergence_rate_factor = 0.5;
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
    /// Continue a run from this point instead of starting afresh (the
    /// network, update rule and schedule must hold their state from the same
    /// point). `epochs` still counts from the start of the original run.
    const training_progress<T>* resume = nullptr;
    /// Runs the matrix products of training and validation on these workers
    /// (core/parallel.hpp); nullptr keeps everything on the calling thread.
    /// Results are bit-identical for any thread count. Must outlive run().
    executor* workers = nullptr;
};

namespace detail {

inline double steady_seconds() {
    return std::chrono::duration<double>(std::chrono::steady_clock::now().time_since_epoch()).count();
}

template <class T>
void validate_rows(const supervised_rows<T>& d, const char* which, std::size_t inputs, loss_kind loss) {
    const std::size_t rows = d.rows();
    if (rows == 0) raise(codes::train_no_rows, std::string("trainer: the ") + which + " rows are empty");
    if (inputs != 0 && d.features.shape()[1] != inputs) {
        raise(codes::shape_mismatch, std::string("trainer: ") + which + " features have " + std::to_string(d.features.shape()[1]) +
                                         " columns, the " + "training features " + std::to_string(inputs));
    }
    if (d.is_classification()) {
        if (loss != loss_kind::cross_entropy) {
            raise(codes::train_option, std::string("trainer: class labels need the cross-entropy loss, not ") + loss_kind_name(loss));
        }
        if (d.labels.size() != rows) {
            raise(codes::shape_mismatch, std::string("trainer: ") + which + " has " + std::to_string(rows) + " feature rows but " +
                                             std::to_string(d.labels.size()) + " labels");
        }
        for (std::size_t i = 0; i < rows; ++i) {
            if (d.labels[i] >= d.class_count) {
                raise(codes::train_option, std::string("trainer: ") + which + " row " + std::to_string(i) + " has class " +
                                               std::to_string(d.labels[i]) + ", outside [0, " + std::to_string(d.class_count) + ")");
            }
        }
    } else {
        if (loss == loss_kind::cross_entropy) raise(codes::train_option, "trainer: the cross-entropy loss needs class labels");
        if (d.targets.shape()[0] != rows) {
            raise(codes::shape_mismatch, std::string("trainer: ") + which + " has " + std::to_string(rows) + " feature rows but " +
                                             std::to_string(d.targets.shape()[0]) + " target rows");
        }
    }
    for (std::size_t k = 0; k < d.features.size(); ++k) {
        if (!std::isfinite(d.features.data()[k])) {
            const std::size_t c = d.features.shape()[1];
            raise(codes::train_non_finite_input, std::string("trainer: ") + which + " feature at row " + std::to_string(k / c) +
                                                     ", column " + std::to_string(k % c) + " is " + std::to_string(d.features.data()[k]));
        }
    }
    for (std::size_t k = 0; k < d.targets.size(); ++k) {
        if (!std::isfinite(d.targets.data()[k])) {
            const std::size_t c = d.targets.shape()[1];
            raise(codes::train_non_finite_input, std::string("trainer: ") + which + " target at row " + std::to_string(k / c) +
                                                     ", column " + std::to_string(k % c) + " is " + std::to_string(d.targets.data()[k]));
        }
    }
}

template <class T>
bool all_finite(const matrix<T>& m) noexcept {
    const T* p = m.data();
    for (std::size_t k = 0; k < m.size(); ++k)
        if (!std::isfinite(p[k])) return false;
    return true;
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
    raise(codes::train_option, "record_loss: unknown loss kind");
}

/// Network outputs for every row, computed in inference mode in chunks of
/// `chunk` rows (logits for classification, values for regression), the
/// matrix products split across `workers` when given.
template <class T>
matrix<T> network_outputs(network<T>& net, const matrix<T>& features, std::size_t chunk = 512, executor* workers = nullptr) {
    const std::size_t rows = features.shape()[0], cols = features.shape()[1];
    const run_mode saved = net.mode();
    net.set_mode(run_mode::inference);
    const std::size_t width = net.output_width(cols);
    matrix<T> out({rows, width});
    tape<T> t;
    t.set_executor(workers);
    for (std::size_t start = 0; start < rows; start += chunk) {
        const std::size_t n = std::min(chunk, rows - start);
        t.clear();
        const var<T> y = net.forward(t, t.input(features.data() + start * cols, n, cols));
        std::copy(y.value().data(), y.value().data() + n * width, out.data() + start * width);
    }
    net.set_mode(saved);
    return out;
}

/// Row-wise softmax of logits (probabilities), computed stably.
template <class T>
matrix<T> softmax_rows(const matrix<T>& logits) {
    const std::size_t rows = logits.shape()[0], cols = logits.shape()[1];
    matrix<T> p({rows, cols});
    for (std::size_t i = 0; i < rows; ++i) {
        const T* z = logits.data() + i * cols;
        T* q = p.data() + i * cols;
        const T m = *std::max_element(z, z + cols);
        T s = T(0);
        for (std::size_t j = 0; j < cols; ++j) s += (q[j] = std::exp(z[j] - m));
        for (std::size_t j = 0; j < cols; ++j) q[j] /= s;
    }
    return p;
}

template <class T>
class trainer {
    TENON_REQUIRE_SCALAR(T);

public:
    trainer(network<T>& net, update_rule<T>& rule, rate_schedule& schedule, training_options<T> options)
        : net_(net), rule_(rule), schedule_(schedule), options_(std::move(options)) {
        if (options_.batch_size == 0) raise(codes::train_option, "trainer: batch_size must be at least 1");
        if (!(options_.divergence_rate_factor > 0.0 && options_.divergence_rate_factor < 1.0)) {
            raise(codes::train_option, "trainer: divergence_rate_factor must be in (0, 1), got " + std::to_string(options_.divergence_rate_factor));
        }
        if (!(options_.min_improvement >= 0.0)) {
            raise(codes::train_option, "trainer: min_improvement must be non-negative, got " + std::to_string(options_.min_improvement));
        }
        if (!options_.loss_settings.sample_weights.empty()) {
            raise(codes::train_option, "trainer: per-sample loss weights cannot be given for the whole run (" +
                                           std::to_string(options_.loss_settings.sample_weights.size()) +
                                           " weights); use class weights, or record the loss yourself per batch");
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
    training_outcome run(const supervised_rows<T>& train, const supervised_rows<T>& validation) {
        const std::size_t inputs = train.features.shape()[1];
        detail::validate_rows(train, "training", 0, options_.loss);
        const bool validate = validation.rows() > 0;
        if (validate) detail::validate_rows(validation, "validation", inputs, options_.loss);
        if (validate && validation.is_classification() != train.is_classification()) {
            raise(codes::train_option, "trainer: training and validation rows disagree on classification versus regression");
        }
        const std::size_t width = net_.output_width(inputs);
        if (train.is_classification() && width != train.class_count) {
            raise(codes::shape_mismatch, "trainer: the network gives " + std::to_string(width) + " outputs for " +
                                             std::to_string(train.class_count) + " classes");
        }
        if (!train.is_classification() && width != train.targets.shape()[1]) {
            raise(codes::shape_mismatch, "trainer: the network gives " + std::to_string(width) + " outputs for " +
                                             std::to_string(train.targets.shape()[1]) + " target columns");
        }

        training_outcome out;
        const double start = options_.clock();
        random_engine shuffle_engine(options_.seed, /*stream=*/0x5EED5u);
        std::vector<std::size_t> order(train.rows());
        std::iota(order.begin(), order.end(), std::size_t(0));

        network_snapshot<T> best, epoch_start;
        double best_loss = std::numeric_limits<double>::infinity();
        std::size_t since_best = 0;
        double rate_factor = 1.0;
        bool stop = false;
        std::size_t epoch = 0;
        if (options_.resume) {
            const training_progress<T>& r = *options_.resume;
            if (r.order.size() != train.rows()) {
                raise(codes::train_option, "trainer: the resumed run shuffled " + std::to_string(r.order.size()) +
                                               " training rows, this run has " + std::to_string(train.rows()));
            }
            std::vector<std::uint8_t> seen(train.rows(), 0);
            for (const std::size_t i : r.order) {
                if (i >= train.rows() || seen[i]) raise(codes::train_option, "trainer: the resumed row order is not a permutation");
                seen[i] = 1;
            }
            if (r.best_epoch > r.epochs_done || (r.best_epoch > 0 && r.best.values.empty())) {
                raise(codes::train_option, "trainer: the resumed progress names best epoch " + std::to_string(r.best_epoch) +
                                               " without its weights or after epoch " + std::to_string(r.epochs_done));
            }
            if (!(r.rate_factor > 0.0 && r.rate_factor <= 1.0)) {
                raise(codes::train_option, "trainer: the resumed rate factor must be in (0, 1], got " + std::to_string(r.rate_factor));
            }
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
            const std::vector<std::uint8_t> rule_state = rule_.save_state();
            const random_state engine_state = shuffle_engine.state();
            const std::uint64_t steps_before = out.steps;

            std::size_t retries = 0;
            epoch_result r;
            for (;;) {
                r = run_epoch(train, order, shuffle_engine, epoch, rate_factor, out.steps, start);
                if (r.status != epoch_status::diverged) break;
                // Divergence guard: back to the start of the epoch, smaller steps.
                net_.restore(epoch_start);
                rule_.load_state(rule_state);
                shuffle_engine.set_state(engine_state);
                out.steps = steps_before;
                if (retries == options_.divergence_retries) break;
                ++retries;
                rate_factor *= options_.divergence_rate_factor;
            }

            epoch_summary s;
            s.epoch = epoch + 1;
            s.retries = retries;
            s.train_loss = r.loss;
            s.learning_rate = r.learning_rate;

            if (r.status == epoch_status::diverged) {
                out.reason = stop_reason::diverged;
                out.message = "the loss or a gradient became non-finite in epoch " + std::to_string(epoch + 1) + " after " +
                              std::to_string(retries) + " retries with a lower learning rate; the weights from before that epoch were kept";
                s.seconds = options_.clock() - epoch_t0;
                out.history.push_back(s);
                break;
            }
            if (r.status == epoch_status::cancelled || r.status == epoch_status::out_of_time) {
                // A partial epoch: its weights are kept only if no validated epoch exists.
                out.reason = r.status == epoch_status::cancelled ? stop_reason::cancelled : stop_reason::time_budget;
                out.message = r.status == epoch_status::cancelled ? "cancelled by the host during epoch " + std::to_string(epoch + 1)
                                                                  : "the time budget of " + std::to_string(options_.time_budget_seconds) +
                                                                        " s ran out during epoch " + std::to_string(epoch + 1);
                s.seconds = options_.clock() - epoch_t0;
                out.history.push_back(s);
                break;
            }

            if (validate) {
                evaluate(validation, s.validation_loss, s.validation_metric);
                schedule_.report_metric(s.validation_loss);
                if (!std::isfinite(s.validation_loss)) {
                    net_.restore(epoch_start);
                    rule_.load_state(rule_state);
                    out.reason = stop_reason::diverged;
                    out.message = "the validation loss became non-finite in epoch " + std::to_string(epoch + 1);
                    s.seconds = options_.clock() - epoch_t0;
                    out.history.push_back(s);
                    break;
                }
                if (s.validation_loss < best_loss - options_.min_improvement || out.best_epoch == 0) {
                    best_loss = s.validation_loss;
                    out.best_epoch = epoch + 1;
                    out.best_validation_loss = best_loss;
                    net_.snapshot_into(best);
                    since_best = 0;
                } else {
                    ++since_best;
                }
            } else {
                schedule_.report_metric(s.train_loss);
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
            if (out.best_epoch > 0) progress_.best.values = best.values; else progress_.best.values.clear();
            progress_.epochs_since_best = since_best;
            progress_.rate_factor = rate_factor;

            if (options_.on_epoch && !options_.on_epoch(s)) {
                out.reason = stop_reason::cancelled;
                out.message = "stopped by the epoch observer after epoch " + std::to_string(epoch);
                stop = true;
            } else if (validate && options_.patience > 0 && since_best >= options_.patience) {
                out.reason = stop_reason::no_improvement;
                out.message = "no validation improvement for " + std::to_string(options_.patience) + " epochs; best was epoch " +
                              std::to_string(out.best_epoch);
                stop = true;
            } else if (budget_spent(start)) {
                out.reason = stop_reason::time_budget;
                out.message = "the time budget of " + std::to_string(options_.time_budget_seconds) + " s ran out after epoch " +
                              std::to_string(epoch);
                stop = true;
            }
        }
        if (!stop && out.reason == stop_reason::epoch_limit) {
            out.message = "completed " + std::to_string(options_.epochs) + " epochs";
        }
        if (options_.restore_best && out.best_epoch > 0) net_.restore(best);
        out.seconds = options_.clock() - start;
        return out;
    }

    /// Loss and metric (accuracy, or RMSE in prepared units) of `rows` in
    /// inference mode.
    void evaluate(const supervised_rows<T>& rows, double& loss, double& metric) {
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

    bool budget_spent(double start) const {
        return options_.time_budget_seconds > 0.0 && options_.clock() - start >= options_.time_budget_seconds;
    }

    // One pass over the shuffled training rows.
    epoch_result run_epoch(const supervised_rows<T>& d, std::vector<std::size_t>& order, random_engine& engine, std::size_t epoch,
                           double rate_factor, std::uint64_t& steps, double start) {
        epoch_result r;
        engine.shuffle(order.begin(), order.end());
        net_.set_mode(run_mode::training);
        const std::size_t rows = d.rows(), inputs = d.features.shape()[1];
        const std::size_t batches = (rows + options_.batch_size - 1) / options_.batch_size;
        double loss_sum = 0.0;
        for (std::size_t b = 0; b < batches; ++b) {
            const std::size_t first = b * options_.batch_size;
            const std::size_t n = std::min(options_.batch_size, rows - first);
            batch_buffers& buf = n == options_.batch_size ? full_ : tail_;
            gather(d, order, first, n, inputs, buf);

            buf.t.clear();
            buf.t.set_executor(options_.workers);
            for (auto* p : net_.parameters()) p->zero_grad();
            const var<T> x = buf.t.input(buf.features);
            const var<T> y = net_.forward(buf.t, x);
            const var<T> loss = record_loss(buf.t, y, options_.loss, buf.targets, buf.labels, options_.loss_settings);
            const double lv = static_cast<double>(loss.value()(0, 0));
            if (!std::isfinite(lv)) {
                r.status = epoch_status::diverged;
                net_.set_mode(run_mode::inference);
                return r;
            }
            buf.t.backward(loss);
            for (const auto* p : net_.parameters()) {
                if (p->trainable() && !detail::all_finite(p->grad())) {
                    r.status = epoch_status::diverged;
                    net_.set_mode(run_mode::inference);
                    return r;
                }
            }
            const double lr = schedule_.rate(steps, epoch) * rate_factor;
            rule_.apply(net_.parameters(), static_cast<T>(lr));
            ++steps;
            r.learning_rate = lr;
            loss_sum += lv;
            if (options_.on_batch) {
                options_.on_batch(batch_progress{epoch + 1, b + 1, batches, lv, options_.clock() - start});
            }
            if (options_.cancel && options_.cancel->load(std::memory_order_relaxed)) {
                r.status = epoch_status::cancelled;
                break;
            }
            if (budget_spent(start)) {
                r.status = epoch_status::out_of_time;
                break;
            }
        }
        r.loss = loss_sum / static_cast<double>(batches);
        net_.set_mode(run_mode::inference);
        return r;
    }

    struct batch_buffers {
        tape<T> t;
        matrix<T> features;
        matrix<T> targets;
        std::vector<std::size_t> labels;
    };

    static void gather(const supervised_rows<T>& d, const std::vector<std::size_t>& order, std::size_t first, std::size_t n,
                       std::size_t inputs, batch_buffers& buf) {
        ensure_shape(buf.features, shape2{n, inputs});
        for (std::size_t i = 0; i < n; ++i) {
            const T* src = d.features.data() + order[first + i] * inputs;
            std::copy(src, src + inputs, buf.features.data() + i * inputs);
        }
        if (d.is_classification()) {
            buf.labels.resize(n);
            for (std::size_t i = 0; i < n; ++i) buf.labels[i] = d.labels[order[first + i]];
        } else {
            const std::size_t outs = d.targets.shape()[1];
            ensure_shape(buf.targets, shape2{n, outs});
            for (std::size_t i = 0; i < n; ++i) {
                const T* src = d.targets.data() + order[first + i] * outs;
                std::copy(src, src + outs, buf.targets.data() + i * outs);
            }
        }
    }

    network<T>& net_;
    update_rule<T>& rule_;
    rate_schedule& schedule_;
    training_options<T> options_;
    batch_buffers full_, tail_;
    training_progress<T> progress_;
};

TENON_NAMESPACE_END
