// tenon: where a training run stands, as plain data: the history of its
// epochs, a copy of the weights and the state a resumed run continues from.
// The trainer (train/) fills it; a model file's section RSUM stores it.
#pragma once

#include <cstddef>
#include <cstdint>
#include <limits>
#include <vector>

#include "tenon/core/matrix.hpp"
#include "tenon/core/random.hpp"

TENON_NAMESPACE_BEGIN

/// One line of the training history.
struct epoch_summary {
    std::size_t epoch = 0;  // 1-based
    double training_loss = 0.0;  // mean over the epoch's batches
    double validation_loss = std::numeric_limits<double>::quiet_NaN();
    double validation_metric = std::numeric_limits<double>::quiet_NaN();  // accuracy or RMSE (prepared units)
    double learning_rate = 0.0;  // at the epoch's last step
    double seconds = 0.0;  // training plus validation
    std::size_t retries = 0;  // divergence retries spent on this epoch
};

/// A copy of every parameter and state buffer of a network, in order.
template <class T>
struct network_snapshot {
    std::vector<matrix<T>> values;
};

/// Where a run stands after a whole epoch: everything besides the weights,
/// the update-rule state and the schedule state that the next epoch depends
/// on. A run given this (training_options::resume) together with the
/// network, rule and schedule as they were at that point continues exactly
/// as the uninterrupted run would have, bit for bit. In a team whose members
/// hold shards, each member's progress is its own (its shard's order and
/// shuffle engine): each member resumes from the progress it saved.
template <class T>
struct training_progress {
    std::size_t epochs_done = 0;  // whole epochs completed
    std::uint64_t steps = 0;  // updates applied
    random_state shuffle_engine;  // the engine that shuffles the rows
    std::vector<std::size_t> order;  // the row permutation the next shuffle starts from
    std::vector<epoch_summary> history;
    std::size_t best_epoch = 0;  // 1-based; 0 = none yet
    double best_validation_loss = std::numeric_limits<double>::infinity();
    network_snapshot<T> best;  // weights of best_epoch (empty when none)
    std::size_t epochs_since_best = 0;
    double rate_factor = 1.0;  // product of divergence reductions so far
};

TENON_NAMESPACE_END
