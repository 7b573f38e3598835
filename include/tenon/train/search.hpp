// tenon: a budgeted search for model settings by k-fold cross-validation on
// the training rows.
//
//   auto found = tenon::search_settings<float>(table, p, split.train, settings, 60.0);  // 60 s
//   auto model = tenon::fit_model<float>(table, p, split.train, split.validation, found.chosen);
//
// It tries hidden widths and depths, learning rates and weight decays on the
// training rows alone, within a budget measured by model_settings::clock; the
// order comes from the seed. Rows ordered in time or grouped by machine take
// the caller's folds (walk-forward, whole groups) instead of random ones.
#pragma once

#include <algorithm>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <functional>
#include <limits>
#include <string>
#include <vector>

#include "tenon/core/random.hpp"
#include "tenon/core/compiled_once.hpp"
#include "tenon/prep/plan.hpp"
#include "tenon/prep/split.hpp"
#include "tenon/train/trainer.hpp"
#include "tenon/train/workflow.hpp"

TENON_NAMESPACE_BEGIN

/// One set of settings search_settings tried, with its score.
struct search_candidate {
    std::vector<std::size_t> hidden;
    double learning_rate = 0.0;
    double weight_decay = 0.0;
    /// Mean over the completed folds of the network's validation loss at its
    /// kept epoch, in prepared units: mean squared error for regression,
    /// cross-entropy for classification (fitted_model::network_validation_loss).
    /// NaN when no fold completed; infinity when a fold gave no finite loss
    /// (training diverged before a first validated epoch).
    double mean_fold_loss = std::numeric_limits<double>::quiet_NaN();
    /// Each completed fold's loss, in fold order.
    std::vector<double> fold_losses;
    std::size_t folds_completed = 0;
    /// The budget (or the host's cancel flag) ended a fold's training or left
    /// a fold unstarted; such a candidate is never chosen.
    bool cut_short = false;
    /// Seconds its folds took, by the search's clock.
    double seconds = 0.0;
};

/// What search_settings chose and what it tried.
struct settings_search_result {
    /// The starting settings with the chosen hidden, learning_rate and
    /// weight_decay; everything else (ensemble, seed, budget...) as given.
    model_settings chosen;
    /// Index of the chosen candidate in `candidates`; 0 is the starting settings.
    std::size_t chosen_index = 0;
    /// Index of the complete candidate with the lowest mean fold loss (0
    /// when none completed); chosen unless it is within the folds' noise of
    /// the start (choose_search_candidate).
    std::size_t lowest_index = 0;
    /// In the order tried.
    std::vector<search_candidate> candidates;
    /// Candidates in the search's list (the starting settings and the grid).
    std::size_t candidates_listed = 0;
    std::size_t folds = 0;
    double budget_seconds = 0.0;
    /// Seconds the search took, by its clock.
    double seconds = 0.0;
};

/// The grid search_settings samples (our own choice of common ranges):
/// widths 16, 32, 64, 128, each with 1 to 3 layers halving the width
/// (64: "64", "64,32", "64,32,16"), learning rates 3e-4, 1e-3, 3e-3, weight
/// decays 0, 1e-4, 1e-3; 108 candidates in a fixed order.
inline std::vector<search_candidate> settings_search_grid() {
    std::vector<search_candidate> grid;
    for (std::size_t width : {16, 32, 64, 128})
        for (std::size_t depth = 1; depth <= 3; ++depth)
            for (double rate : {3e-4, 1e-3, 3e-3})
                for (double decay : {0.0, 1e-4, 1e-3}) {
                    search_candidate c;
                    for (std::size_t layer = 0; layer < depth; ++layer) c.hidden.push_back(width >> layer);
                    c.learning_rate = rate;
                    c.weight_decay = decay;
                    grid.push_back(c);
                }
    return grid;
}

/// The candidate search_settings chooses among `tried` (the first being the
/// starting settings), each given `folds` folds: the lowest mean fold loss
/// among those that completed every fold and were not cut short. The lowest
/// of many noisy means is lower than its settings deserve (a winner's
/// curse), so it replaces a complete start only when it beats the start by
/// more than the standard error of their fold-by-fold differences (both saw
/// the same folds); our own rule, in the spirit of the one-standard-error
/// rule of Breiman, Friedman, Olshen & Stone 1984. 0 when none completed.
inline std::size_t choose_search_candidate(const std::vector<search_candidate>& tried, std::size_t folds) {
    const auto complete = [folds](const search_candidate& c) {
        return !c.cut_short && c.folds_completed == folds && c.fold_losses.size() == folds && std::isfinite(c.mean_fold_loss);
    };
    double best = std::numeric_limits<double>::infinity();
    std::size_t lowest = 0;
    for (std::size_t i = 0; i < tried.size(); ++i)
        if (complete(tried[i]) && tried[i].mean_fold_loss < best) {
            best = tried[i].mean_fold_loss;
            lowest = i;
        }
    if (lowest == 0 || !complete(tried[0]) || folds < 2) return lowest;
    const search_candidate &low = tried[lowest], &first = tried[0];
    double mean = 0.0, squares = 0.0;
    for (std::size_t f = 0; f < folds; ++f) mean += low.fold_losses[f] - first.fold_losses[f];
    mean /= static_cast<double>(folds);
    for (std::size_t f = 0; f < folds; ++f) {
        const double d = low.fold_losses[f] - first.fold_losses[f] - mean;
        squares += d * d;
    }
    const double standard_error = std::sqrt(squares / static_cast<double>(folds - 1) / static_cast<double>(folds));
    return mean + standard_error < 0.0 ? lowest : 0;
}

namespace detail {

// The checks every search makes before training anything; returns the
// starting hidden widths for `rows` training rows.
template <class T>
std::vector<std::size_t> check_search_start(const model_settings& start, double budget_seconds, std::size_t folds, std::size_t rows) {
    if (!(budget_seconds > 0.0 && std::isfinite(budget_seconds)))
        raise(codes::train_option_invalid, "search_settings: the budget must be a positive number of seconds, got " + number_to_text(budget_seconds));
    if (folds < 2) raise(codes::train_option_invalid, "search_settings: needs at least 2 folds, got " + std::to_string(folds));
    if (start.team) raise(codes::train_option_invalid, "search_settings: a team cannot search; search alone and give the team the chosen settings");
    std::vector<std::size_t> hidden = hidden_widths(start, rows);
    if (hidden.empty() || !(start.learning_rate > 0.0))
        raise(codes::train_option_invalid, "search_settings: the starting settings need hidden layers and a positive learning rate");
    // A decay the rule cannot apply is refused before any training.
    (void)make_update_rule<T>(start.update, start.weight_decay);
    return hidden;
}

template <class T>
settings_search_result search_over_folds(const table& t, const plan& preparation, const std::vector<fold>& row_folds, const model_settings& start,
                                         double budget_seconds, std::size_t max_candidates, std::size_t width_rows) {
    const std::size_t folds = row_folds.size();
    const std::vector<std::size_t> start_hidden = check_search_start<T>(start, budget_seconds, folds, width_rows);
    for (std::size_t f = 0; f < folds; ++f)
        if (row_folds[f].train.empty() || row_folds[f].test.empty())
            raise(codes::train_option_invalid,
                  "search_settings: fold " + std::to_string(f + 1) + " has " + std::to_string(row_folds[f].train.size()) + " training and " +
                      std::to_string(row_folds[f].test.size()) + " held-out rows; each needs both");
    const std::function<double()> clock = start.clock ? start.clock : std::function<double()>(steady_seconds);
    const double began = clock();

    // The candidates: the start, then the shuffled grid.
    std::vector<search_candidate> listed(1);
    listed[0].hidden = start_hidden;
    listed[0].learning_rate = start.learning_rate;
    listed[0].weight_decay = start.weight_decay;
    {
        std::vector<search_candidate> grid = settings_search_grid();
        random_engine order(start.seed, 0x5EA5C0DEull);
        order.shuffle(grid.begin(), grid.end());
        // Rules without decoupled decay (make_update_rule) try no decay.
        const bool decays = start.update == update_kind::adam || start.update == update_kind::adamw;
        for (auto& c : grid)
            if ((decays || c.weight_decay == 0.0) &&
                !(c.hidden == start_hidden && c.learning_rate == start.learning_rate && c.weight_decay == start.weight_decay))
                listed.push_back(std::move(c));
    }
    if (max_candidates > 0 && listed.size() > max_candidates) listed.resize(max_candidates);

    settings_search_result result;
    result.candidates_listed = listed.size();
    result.folds = folds;
    result.budget_seconds = budget_seconds;
    double complete_seconds = 0.0;
    std::size_t complete = 0;
    bool stop = false;
    for (std::size_t i = 0; i < listed.size() && !stop; ++i) {
        if (i > 0) {
            // Starts only when the time left covers the mean of the complete candidates.
            const double left = budget_seconds - (clock() - began);
            if (complete == 0 || left < complete_seconds / static_cast<double>(complete)) break;
        }
        search_candidate c = listed[i];
        const double candidate_began = clock();
        double loss_sum = 0.0;
        for (const fold& f : row_folds) {
            const double left = budget_seconds - (clock() - began);
            if (left <= 0.0) {
                c.cut_short = true;
                break;
            }
            model_settings s = start;
            s.hidden = c.hidden;
            s.learning_rate = c.learning_rate;
            s.weight_decay = c.weight_decay;
            s.ensemble = 1;
            s.refit = false;  // the fold's held-out rows score it; a refit would train on them
            s.clock = clock;
            s.time_budget_seconds = left;
            s.on_epoch = nullptr;
            s.on_batch = nullptr;
            fitted_model<T> m = fit_model<T>(t, preparation, f.train, f.test, s);
            if (m.outcome.reason == stop_reason::time_budget || m.outcome.reason == stop_reason::cancelled) {
                c.cut_short = true;
                break;
            }
            if (!std::isfinite(m.network_validation_loss)) {
                loss_sum = std::numeric_limits<double>::infinity();
                break;
            }
            loss_sum += m.network_validation_loss;
            c.fold_losses.push_back(m.network_validation_loss);
            ++c.folds_completed;
        }
        c.seconds = clock() - candidate_began;
        if (std::isinf(loss_sum))
            c.mean_fold_loss = loss_sum;
        else if (c.folds_completed > 0)
            c.mean_fold_loss = loss_sum / static_cast<double>(c.folds_completed);
        if (c.cut_short) {
            stop = true;
        } else if (c.folds_completed == folds) {
            complete_seconds += c.seconds;
            ++complete;
        }
        result.candidates.push_back(std::move(c));
    }
    result.seconds = clock() - began;

    result.chosen_index = choose_search_candidate(result.candidates, folds);
    for (std::size_t i = 0; i < result.candidates.size(); ++i) {
        const search_candidate& c = result.candidates[i];
        const search_candidate& low = result.candidates[result.lowest_index];
        const bool whole = !c.cut_short && c.folds_completed == folds && std::isfinite(c.mean_fold_loss);
        const bool low_whole = !low.cut_short && low.folds_completed == folds && std::isfinite(low.mean_fold_loss);
        if (whole && (!low_whole || c.mean_fold_loss < low.mean_fold_loss)) result.lowest_index = i;
    }
    result.chosen = start;
    const search_candidate& chosen = result.candidates[result.chosen_index];
    result.chosen.hidden = chosen.hidden;
    result.chosen.learning_rate = chosen.learning_rate;
    result.chosen.weight_decay = chosen.weight_decay;
    return result;
}

}  // namespace detail

/// As below, over folds the caller made (row indices of `t`): rolling-origin
/// folds for rows ordered in time, group folds for rows of many machines, so
/// that no fold trains on rows later than, or from the machine of, the rows
/// it is scored on (prep/split.hpp). Each fold needs training and held-out
/// rows; at least 2 folds. The starting widths follow the rows of the
/// largest fold.
template <class T>
settings_search_result search_settings(const table& t, const plan& preparation, const std::vector<fold>& row_folds, const model_settings& start,
                                       double budget_seconds, std::size_t max_candidates = 0) {
    TENON_REQUIRE_SCALAR(T);
    std::size_t rows = 0;
    for (const fold& f : row_folds) rows = std::max(rows, f.train.size() + f.test.size());
    return detail::search_over_folds<T>(t, preparation, row_folds, start, budget_seconds, max_candidates, rows);
}

/// Searches hidden widths and depths, learning rates and weight decays for
/// `start`, by `folds`-fold cross-validation on `train_rows` alone, within
/// `budget_seconds` of wall-clock time, and returns the settings with the
/// lowest mean fold loss among those that completed every fold, when they
/// beat the start by more than the folds' noise.
///
/// - The candidates: `start`'s own settings first, then the grid of
///   settings_search_grid() (less any point equal to the start, and less
///   the decays when start.update has none) in an order shuffled from
///   start.seed; at most `max_candidates` in all (0: no limit
///   but the budget).
/// - The folds: random folds of `train_rows` drawn from start.seed
///   (stratified by class for classification when every class has at least
///   `folds` rows). Each fold runs fit_model with the candidate's settings
///   and ensemble 1, the fold's rows as validation; its plan is measured on
///   the fold's other rows. Every candidate sees the same folds and seed.
/// - The budget, by start.clock (steady_clock when empty): the first
///   candidate always starts; a later one starts only when the time left is
///   at least the mean time of the complete candidates so far, and each
///   fold trains with the time left as its time_budget_seconds, so the
///   search ends within one optimizer step of the budget. A candidate cut
///   short is recorded and ends the search.
/// - The choice: choose_search_candidate (the lowest mean fold loss, when it
///   beats the start by more than the noise; else the start).
/// The host's observers (on_epoch, on_batch) are not called during the
/// search; its cancel flag is honoured. Not for a team.
template <class T>
settings_search_result search_settings(const table& t, const plan& preparation, const std::vector<std::size_t>& train_rows,
                                       const model_settings& start, double budget_seconds, std::size_t folds = 3, std::size_t max_candidates = 0) {
    TENON_REQUIRE_SCALAR(T);
    (void)detail::check_search_start<T>(start, budget_seconds, folds, train_rows.size());

    // The folds, over positions in train_rows.
    std::vector<std::size_t> rows = train_rows;
    std::vector<fold> by_position;
    const std::uint64_t fold_seed = start.seed ^ 0x5EA5C4F01D5ull;
    const measured_plan measured = preparation.measure(t, train_rows);
    if (!measured.has_target()) raise(codes::train_option_invalid, "search_settings: the plan has no target column");
    if (measured.target_type() == target_kind::classification) {
        // The class of every training row with a target (rows without one are dropped by fit_model anyway).
        const prepared_rows<T> prepared = measured.template apply<T>(t, train_rows);
        rows = prepared.rows;
        std::vector<std::size_t> per_class(measured.class_count(), 0);
        for (auto c : prepared.classes) ++per_class[c];
        bool stratify = true;
        for (auto n : per_class) stratify = stratify && (n == 0 || n >= folds);
        if (rows.size() < folds)
            raise(codes::train_option_invalid,
                  "search_settings: " + std::to_string(rows.size()) + " training rows with a target, fewer than the " + std::to_string(folds) +
                      " folds");
        by_position = stratify ? stratified_k_folds(prepared.classes, folds, fold_seed) : k_folds(rows.size(), folds, fold_seed);
    } else {
        if (rows.size() < folds)
            raise(codes::train_option_invalid,
                  "search_settings: " + std::to_string(rows.size()) + " training rows, fewer than the " + std::to_string(folds) + " folds");
        by_position = k_folds(rows.size(), folds, fold_seed);
    }
    std::vector<fold> row_folds(by_position.size());
    for (std::size_t f = 0; f < by_position.size(); ++f) {
        for (auto p : by_position[f].train) row_folds[f].train.push_back(rows[p]);
        for (auto p : by_position[f].test) row_folds[f].test.push_back(rows[p]);
    }

    return detail::search_over_folds<T>(t, preparation, row_folds, start, budget_seconds, max_candidates, train_rows.size());
}

TENON_NAMESPACE_END

// The compiled-once mode (core/compiled_once.hpp).
#if defined(TENON_DETAIL_TRAIN_INSTANCE)
TENON_NAMESPACE_BEGIN
#define TENON_DETAIL_SEARCH_INSTANCES(T)                                                                                                             \
    TENON_DETAIL_TRAIN_INSTANCE settings_search_result search_settings<T>(const table&, const plan&, const std::vector<fold>&,                       \
                                                                          const model_settings&, double, std::size_t);                               \
    TENON_DETAIL_TRAIN_INSTANCE settings_search_result search_settings<T>(const table&, const plan&, const std::vector<std::size_t>&,                \
                                                                          const model_settings&, double, std::size_t, std::size_t);
TENON_DETAIL_SEARCH_INSTANCES(float)
TENON_DETAIL_SEARCH_INSTANCES(double)
#undef TENON_DETAIL_SEARCH_INSTANCES
TENON_NAMESPACE_END
#endif
