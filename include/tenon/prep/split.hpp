// tenon: split policies: holdouts and k folds, random, stratified by class,
// chronological (walk-forward) or by group. Each returns row indices (sorted
// ascending within a subset), is seeded and deterministic (tenon's engine,
// the same numbers on every platform), and raises a clear error for a request
// it cannot meet instead of returning an empty or lopsided subset. The list
// of policies: docs/design/prep.md.
#pragma once

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <numeric>
#include <string>
#include <vector>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"
#include "tenon/core/random.hpp"

TENON_NAMESPACE_BEGIN

struct split_fractions {
    double train = 0.8;
    double validation = 0.1;
    double test = 0.1;
};

struct holdout_split {
    std::vector<std::size_t> train, validation, test;
};

struct fold {
    std::vector<std::size_t> train, test;
};

namespace detail {

inline void check_fractions(const split_fractions& f) {
    const double parts[3] = {f.train, f.validation, f.test};
    for (double p : parts)
        if (!(p >= 0.0 && p <= 1.0))
            raise(codes::prep_split_fractions,
                  "split fractions must each lie in [0, 1], got train " + std::to_string(f.train) + ", validation " + std::to_string(f.validation) +
                      ", test " + std::to_string(f.test));
    const double sum = f.train + f.validation + f.test;
    if (std::abs(sum - 1.0) > 1e-9)
        raise(codes::prep_split_fractions,
              "split fractions must sum to 1, got " + std::to_string(f.train) + " + " + std::to_string(f.validation) + " + " +
                  std::to_string(f.test) + " = " + std::to_string(sum));
    if (f.train <= 0.0) raise(codes::prep_split_fractions, "the train fraction must be positive");
}

inline std::size_t rounded_share(std::size_t n, double fraction) { return static_cast<std::size_t>(std::llround(static_cast<double>(n) * fraction)); }

inline void check_not_empty(const holdout_split& s, const split_fractions& f, const char* policy) {
    auto check = [&](const std::vector<std::size_t>& rows, double fraction, const char* name) {
        if (fraction > 0.0 && rows.empty())
            raise(codes::prep_split_empty_subset,
                  std::string(policy) + ": the " + name + " subset (fraction " + std::to_string(fraction) + ") would receive no rows");
    };
    check(s.train, f.train, "train");
    check(s.validation, f.validation, "validation");
    check(s.test, f.test, "test");
}

inline void sort_subsets(holdout_split& s) {
    std::sort(s.train.begin(), s.train.end());
    std::sort(s.validation.begin(), s.validation.end());
    std::sort(s.test.begin(), s.test.end());
}

// Deals the given (already ordered) rows: the first n_test to test, the next
// n_validation to validation, the rest to train.
inline void deal(const std::vector<std::size_t>& rows, std::size_t n_validation, std::size_t n_test, holdout_split& s) {
    for (std::size_t k = 0; k < rows.size(); ++k) {
        if (k < n_test)
            s.test.push_back(rows[k]);
        else if (k < n_test + n_validation)
            s.validation.push_back(rows[k]);
        else
            s.train.push_back(rows[k]);
    }
}

inline void check_fold_count(std::size_t k, std::size_t n, const char* policy) {
    if (k < 2) raise(codes::core_argument_invalid, std::string(policy) + ": at least 2 folds are needed, got " + std::to_string(k));
    if (n < k)
        raise(codes::prep_split_empty_subset,
              std::string(policy) + ": " + std::to_string(k) + " folds of " + std::to_string(n) + " rows would leave a fold empty");
}

inline std::vector<fold> folds_from_assignment(const std::vector<std::size_t>& fold_of_row, std::size_t k) {
    std::vector<fold> folds(k);
    for (std::size_t i = 0; i < fold_of_row.size(); ++i)
        for (std::size_t f = 0; f < k; ++f) (fold_of_row[i] == f ? folds[f].test : folds[f].train).push_back(i);
    return folds;
}

inline std::vector<std::vector<std::size_t>> rows_by_label(const std::vector<std::uint32_t>& labels) {
    std::vector<std::vector<std::size_t>> by;
    for (std::size_t i = 0; i < labels.size(); ++i) {
        if (labels[i] >= by.size()) by.resize(std::size_t(labels[i]) + 1);
        by[labels[i]].push_back(i);
    }
    return by;
}

}  // namespace detail

/// Shuffled holdout of n rows: round(n * test) test rows, round(n *
/// validation) validation rows, the rest train.
inline holdout_split random_holdout(std::size_t n, const split_fractions& fractions, std::uint64_t seed) {
    detail::check_fractions(fractions);
    std::vector<std::size_t> rows(n);
    std::iota(rows.begin(), rows.end(), std::size_t(0));
    random_engine rng(seed);
    rng.shuffle(rows.begin(), rows.end());
    holdout_split s;
    const std::size_t n_test = detail::rounded_share(n, fractions.test);
    const std::size_t n_validation = std::min(n - std::min(n, n_test), detail::rounded_share(n, fractions.validation));
    detail::deal(rows, n_validation, n_test, s);
    detail::check_not_empty(s, fractions, "random holdout");
    detail::sort_subsets(s);
    return s;
}

/// Holdout that keeps every class's share: class c with n_c rows puts
/// round(n_c * test) rows in test and round(n_c * validation) in validation,
/// so each count is within one row of n_c times its fraction. `labels[i]` is
/// the class index of row i. Each class needs at least one row per non-empty
/// subset.
inline holdout_split stratified_holdout(const std::vector<std::uint32_t>& labels, const split_fractions& fractions, std::uint64_t seed) {
    detail::check_fractions(fractions);
    const std::size_t needed = std::size_t(fractions.train > 0) + (fractions.validation > 0) + (fractions.test > 0);
    const auto by = detail::rows_by_label(labels);
    random_engine rng(seed);
    holdout_split s;
    for (std::size_t c = 0; c < by.size(); ++c) {
        auto rows = by[c];
        if (rows.empty()) continue;  // a label value no row carries
        if (rows.size() < needed)
            raise(codes::prep_split_class_too_small,
                  "stratified holdout: class " + std::to_string(c) + " has " + std::to_string(rows.size()) + " rows, fewer than the " +
                      std::to_string(needed) + " non-empty subsets");
        rng.shuffle(rows.begin(), rows.end());
        const std::size_t n_test = detail::rounded_share(rows.size(), fractions.test);
        const std::size_t n_validation =
            std::min(rows.size() - std::min(rows.size(), n_test), detail::rounded_share(rows.size(), fractions.validation));
        detail::deal(rows, n_validation, n_test, s);
    }
    detail::check_not_empty(s, fractions, "stratified holdout");
    detail::sort_subsets(s);
    return s;
}

/// k folds of n shuffled rows; fold sizes differ by at most one.
inline std::vector<fold> k_folds(std::size_t n, std::size_t k, std::uint64_t seed) {
    detail::check_fold_count(k, n, "k-fold");
    std::vector<std::size_t> rows(n);
    std::iota(rows.begin(), rows.end(), std::size_t(0));
    random_engine rng(seed);
    rng.shuffle(rows.begin(), rows.end());
    std::vector<std::size_t> fold_of_row(n);
    for (std::size_t p = 0; p < n; ++p) fold_of_row[rows[p]] = p % k;
    return detail::folds_from_assignment(fold_of_row, k);
}

/// k folds that keep every class's share: each class's shuffled rows are dealt
/// round-robin over the folds (continuing where the previous class stopped,
/// so fold sizes stay within one row). Every class needs at least k rows.
inline std::vector<fold> stratified_k_folds(const std::vector<std::uint32_t>& labels, std::size_t k, std::uint64_t seed) {
    detail::check_fold_count(k, labels.size(), "stratified k-fold");
    const auto by = detail::rows_by_label(labels);
    random_engine rng(seed);
    std::vector<std::size_t> fold_of_row(labels.size());
    std::size_t next = 0;
    for (std::size_t c = 0; c < by.size(); ++c) {
        auto rows = by[c];
        if (rows.empty()) continue;
        if (rows.size() < k)
            raise(codes::prep_split_class_too_small,
                  "stratified k-fold: class " + std::to_string(c) + " has " + std::to_string(rows.size()) + " rows, fewer than the " +
                      std::to_string(k) + " folds");
        rng.shuffle(rows.begin(), rows.end());
        for (auto r : rows) fold_of_row[r] = next++ % k;
    }
    return detail::folds_from_assignment(fold_of_row, k);
}

namespace detail {
inline std::vector<std::size_t> time_order(const std::vector<double>& times, const char* policy) {
    for (std::size_t i = 0; i < times.size(); ++i)
        if (std::isnan(times[i])) raise(codes::prep_split_missing_time, std::string(policy) + ": row " + std::to_string(i) + " has no time");
    std::vector<std::size_t> rows(times.size());
    std::iota(rows.begin(), rows.end(), std::size_t(0));
    std::stable_sort(rows.begin(), rows.end(), [&](std::size_t a, std::size_t b) { return times[a] < times[b]; });
    return rows;
}
}  // namespace detail

/// Chronological holdout: rows ordered by `times` (ties keep their row order),
/// no shuffling; the latest round(n * test) rows are the test subset, the
/// round(n * validation) rows before them validation, the earliest train.
/// A missing time (NaN) raises prep.split.missing_time.
inline holdout_split chronological_holdout(const std::vector<double>& times, const split_fractions& fractions) {
    detail::check_fractions(fractions);
    auto rows = detail::time_order(times, "chronological holdout");
    std::reverse(rows.begin(), rows.end());  // latest first, so deal() gives test the latest rows
    const std::size_t n = rows.size();
    const std::size_t n_test = detail::rounded_share(n, fractions.test);
    const std::size_t n_validation = std::min(n - std::min(n, n_test), detail::rounded_share(n, fractions.validation));
    holdout_split s;
    detail::deal(rows, n_validation, n_test, s);
    detail::check_not_empty(s, fractions, "chronological holdout");
    detail::sort_subsets(s);
    return s;
}

/// Rolling-origin (walk-forward) folds over rows ordered by time (Tashman
/// 2000, "Out-of-sample tests of forecasting accuracy", Int. J. Forecasting
/// 16, section 3): fold f (0-based) tests on the `horizon` rows after the
/// origin n - (folds - f) * horizon and trains on every earlier row, so the
/// last fold tests on the latest rows. Indices are row numbers of `times`.
inline std::vector<fold> rolling_origin_folds(const std::vector<double>& times, std::size_t folds, std::size_t horizon) {
    if (folds < 1 || horizon < 1)
        raise(codes::core_argument_invalid,
              "rolling-origin folds: need at least 1 fold and a horizon of at least 1 row, got " + std::to_string(folds) + " folds, horizon " +
                  std::to_string(horizon));
    const auto rows = detail::time_order(times, "rolling-origin folds");
    const std::size_t n = rows.size();
    if (n <= folds * horizon)
        raise(codes::prep_split_empty_subset,
              "rolling-origin folds: " + std::to_string(folds) + " folds with a horizon of " + std::to_string(horizon) + " rows need more than " +
                  std::to_string(folds * horizon) + " rows, got " + std::to_string(n) + " (the first fold would have no training rows)");
    std::vector<fold> out(folds);
    for (std::size_t f = 0; f < folds; ++f) {
        const std::size_t origin = n - (folds - f) * horizon;
        out[f].train.assign(rows.begin(), rows.begin() + static_cast<std::ptrdiff_t>(origin));
        out[f].test.assign(rows.begin() + static_cast<std::ptrdiff_t>(origin), rows.begin() + static_cast<std::ptrdiff_t>(origin + horizon));
        std::sort(out[f].train.begin(), out[f].train.end());
        std::sort(out[f].test.begin(), out[f].test.end());
    }
    return out;
}

/// Holdout by groups: `groups[i]` is the group id of row i (dense codes from
/// dense_codes() fit well). The groups are shuffled, then whole groups go to
/// test until it holds at least round(n * test) rows, then to validation
/// likewise, the rest to train. Needs at least as many groups as non-empty
/// subsets.
inline holdout_split grouped_holdout(const std::vector<std::uint32_t>& groups, const split_fractions& fractions, std::uint64_t seed) {
    detail::check_fractions(fractions);
    const auto by = detail::rows_by_label(groups);
    std::vector<std::size_t> ids;
    for (std::size_t g = 0; g < by.size(); ++g)
        if (!by[g].empty()) ids.push_back(g);
    const std::size_t needed = std::size_t(fractions.train > 0) + (fractions.validation > 0) + (fractions.test > 0);
    if (ids.size() < needed)
        raise(codes::prep_split_single_group,
              "grouped holdout: " + std::to_string(ids.size()) + " group(s) cannot fill " + std::to_string(needed) + " subsets with whole groups");
    random_engine rng(seed);
    rng.shuffle(ids.begin(), ids.end());
    const std::size_t n = groups.size();
    const std::size_t want_test = detail::rounded_share(n, fractions.test);
    const std::size_t want_validation = detail::rounded_share(n, fractions.validation);
    holdout_split s;
    std::size_t k = 0;
    // Keep at least one group for each later non-empty subset.
    auto left_for_later = [&](int later) {
        std::size_t r = 0;
        if (later >= 1 && fractions.validation > 0) ++r;
        if (later >= 0) ++r;  // train
        return r;
    };
    while (want_test > 0 && s.test.size() < want_test && ids.size() - k > left_for_later(1)) {
        s.test.insert(s.test.end(), by[ids[k]].begin(), by[ids[k]].end());
        ++k;
    }
    while (want_validation > 0 && s.validation.size() < want_validation && ids.size() - k > left_for_later(0)) {
        s.validation.insert(s.validation.end(), by[ids[k]].begin(), by[ids[k]].end());
        ++k;
    }
    for (; k < ids.size(); ++k) s.train.insert(s.train.end(), by[ids[k]].begin(), by[ids[k]].end());
    detail::check_not_empty(s, fractions, "grouped holdout");
    detail::sort_subsets(s);
    return s;
}

/// k folds of whole groups: groups are shuffled, then taken largest first
/// and each put in the fold with the fewest rows so far (greedy balancing,
/// common practice). Needs at least k groups.
inline std::vector<fold> group_k_folds(const std::vector<std::uint32_t>& groups, std::size_t k, std::uint64_t seed) {
    if (k < 2) raise(codes::core_argument_invalid, "group k-fold: at least 2 folds are needed, got " + std::to_string(k));
    const auto by = detail::rows_by_label(groups);
    std::vector<std::size_t> ids;
    for (std::size_t g = 0; g < by.size(); ++g)
        if (!by[g].empty()) ids.push_back(g);
    if (ids.size() < k)
        raise(codes::prep_split_single_group,
              "group k-fold: " + std::to_string(ids.size()) + " group(s) cannot fill " + std::to_string(k) + " folds with whole groups");
    random_engine rng(seed);
    rng.shuffle(ids.begin(), ids.end());
    std::stable_sort(ids.begin(), ids.end(), [&](std::size_t a, std::size_t b) { return by[a].size() > by[b].size(); });
    std::vector<std::size_t> fold_rows(k, 0), fold_of_group(by.size(), 0);
    for (auto g : ids) {
        const auto target = static_cast<std::size_t>(std::min_element(fold_rows.begin(), fold_rows.end()) - fold_rows.begin());
        fold_of_group[g] = target;
        fold_rows[target] += by[g].size();
    }
    std::vector<std::size_t> fold_of_row(groups.size());
    for (std::size_t i = 0; i < groups.size(); ++i) fold_of_row[i] = fold_of_group[groups[i]];
    return detail::folds_from_assignment(fold_of_row, k);
}

TENON_NAMESPACE_END
