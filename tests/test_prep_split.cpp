// Tests of prep/split.hpp: partitions, determinism, shares, and every error.
#include <doctest/doctest.h>

#include <algorithm>
#include <cmath>
#include <limits>
#include <set>
#include <string>
#include <vector>

#include <tenon/prep/split.hpp>

#include "prep_test_support.hpp"

using prep_test::error_code_of;

namespace {
// True when the subsets are disjoint and together hold exactly 0..n-1.
bool is_partition(std::size_t n, std::initializer_list<const std::vector<std::size_t>*> parts) {
    std::vector<int> seen(n, 0);
    for (auto* p : parts)
        for (auto r : *p) {
            if (r >= n) return false;
            ++seen[r];
        }
    return std::all_of(seen.begin(), seen.end(), [](int s) { return s == 1; });
}

std::vector<std::uint32_t> labels_with_counts(std::initializer_list<std::size_t> counts) {
    std::vector<std::uint32_t> labels;
    std::uint32_t c = 0;
    for (auto n : counts) {
        for (std::size_t i = 0; i < n; ++i) labels.push_back(c);
        ++c;
    }
    // Interleave deterministically so classes are not in blocks.
    std::vector<std::uint32_t> mixed(labels.size());
    for (std::size_t i = 0; i < labels.size(); ++i) mixed[(i * 7919) % labels.size()] = labels[i];
    return mixed;
}
}  // namespace

TEST_CASE("random holdout: a seeded, deterministic partition with rounded sizes") {
    auto a = tenon::random_holdout(1000, {0.7, 0.2, 0.1}, 42);
    auto b = tenon::random_holdout(1000, {0.7, 0.2, 0.1}, 42);
    auto c = tenon::random_holdout(1000, {0.7, 0.2, 0.1}, 43);
    CHECK(a.train.size() == 700);
    CHECK(a.validation.size() == 200);
    CHECK(a.test.size() == 100);
    CHECK(is_partition(1000, {&a.train, &a.validation, &a.test}));
    CHECK(a.test == b.test);
    CHECK(a.test != c.test);
    CHECK(std::is_sorted(a.train.begin(), a.train.end()));
    auto no_validation = tenon::random_holdout(10, {0.8, 0.0, 0.2}, 1);
    CHECK(no_validation.validation.empty());
    CHECK(no_validation.test.size() == 2);
}

TEST_CASE("stratified holdout keeps each class's share within one row per class per subset") {
    const std::vector<std::size_t> counts{50, 31, 7, 12};
    auto labels = labels_with_counts({50, 31, 7, 12});
    const tenon::split_fractions f{0.6, 0.25, 0.15};
    auto s = tenon::stratified_holdout(labels, f, 5);
    CHECK(is_partition(labels.size(), {&s.train, &s.validation, &s.test}));
    auto count_in = [&](const std::vector<std::size_t>& rows, std::uint32_t c) {
        return static_cast<double>(std::count_if(rows.begin(), rows.end(), [&](std::size_t r) { return labels[r] == c; }));
    };
    for (std::uint32_t c = 0; c < counts.size(); ++c) {
        const double n = static_cast<double>(counts[c]);
        CHECK(std::abs(count_in(s.train, c) - n * f.train) <= 1.0);
        CHECK(std::abs(count_in(s.validation, c) - n * f.validation) <= 1.0);
        CHECK(std::abs(count_in(s.test, c) - n * f.test) <= 1.0);
    }
    CHECK(tenon::stratified_holdout(labels, f, 5).test == s.test);
}

TEST_CASE("k-fold and stratified k-fold: every row tested once, balanced folds") {
    auto folds = tenon::k_folds(23, 5, 9);
    REQUIRE(folds.size() == 5);
    std::vector<std::size_t> all_tests;
    for (const auto& f : folds) {
        CHECK((f.test.size() == 4 || f.test.size() == 5));
        CHECK(is_partition(23, {&f.train, &f.test}));
        all_tests.insert(all_tests.end(), f.test.begin(), f.test.end());
    }
    std::sort(all_tests.begin(), all_tests.end());
    std::vector<std::size_t> expected(23);
    for (std::size_t i = 0; i < 23; ++i) expected[i] = i;
    CHECK(all_tests == expected);

    auto labels = labels_with_counts({20, 9, 6});
    auto sf = tenon::stratified_k_folds(labels, 3, 2);
    for (const auto& f : sf) {
        CHECK(is_partition(labels.size(), {&f.train, &f.test}));
        for (std::uint32_t c = 0; c < 3; ++c) {
            const double share = (c == 0 ? 20.0 : c == 1 ? 9.0 : 6.0) / 3.0;
            const auto got = std::count_if(f.test.begin(), f.test.end(), [&](std::size_t r) { return labels[r] == c; });
            CHECK(std::abs(static_cast<double>(got) - share) <= 1.0);
        }
    }
}

TEST_CASE("chronological holdout: the test rows are the latest, no shuffling") {
    const std::vector<double> times{5, 1, 9, 3, 7, 2, 8, 0, 6, 4};
    auto s = tenon::chronological_holdout(times, {0.6, 0.2, 0.2});
    CHECK(s.test == std::vector<std::size_t>{2, 6});  // times 9, 8
    CHECK(s.validation == std::vector<std::size_t>{4, 8});  // times 7, 6
    CHECK(s.train.size() == 6);
    for (auto r : s.train) CHECK(times[r] < 6);
}

TEST_CASE("rolling-origin folds walk forward in time") {
    std::vector<double> times(10);
    for (std::size_t i = 0; i < 10; ++i) times[i] = static_cast<double>(9 - i);  // latest first in the table
    auto folds = tenon::rolling_origin_folds(times, 3, 2);
    REQUIRE(folds.size() == 3);
    CHECK(folds[0].train.size() == 4);
    CHECK(folds[1].train.size() == 6);
    CHECK(folds[2].train.size() == 8);
    CHECK(folds[2].test == std::vector<std::size_t>{0, 1});  // times 9, 8: the latest
    for (const auto& f : folds) {
        double latest_train = -1, earliest_test = 100;
        for (auto r : f.train) latest_train = std::max(latest_train, times[r]);
        for (auto r : f.test) earliest_test = std::min(earliest_test, times[r]);
        CHECK(latest_train < earliest_test);
        CHECK(f.test.size() == 2);
    }
}

TEST_CASE("grouped holdout and group k-fold keep every group in one subset") {
    std::vector<std::uint32_t> groups;
    for (std::uint32_t g = 0; g < 12; ++g)
        for (std::uint32_t k = 0; k <= g % 4; ++k) groups.push_back(g);  // groups of 1 to 4 rows
    auto s = tenon::grouped_holdout(groups, {0.6, 0.2, 0.2}, 3);
    CHECK(is_partition(groups.size(), {&s.train, &s.validation, &s.test}));
    auto group_set = [&](const std::vector<std::size_t>& rows) {
        std::set<std::uint32_t> g;
        for (auto r : rows) g.insert(groups[r]);
        return g;
    };
    auto tr = group_set(s.train), va = group_set(s.validation), te = group_set(s.test);
    for (auto g : te) CHECK((tr.count(g) == 0 && va.count(g) == 0));
    for (auto g : va) CHECK(tr.count(g) == 0);
    CHECK(!s.validation.empty());
    CHECK(!s.test.empty());

    auto folds = tenon::group_k_folds(groups, 4, 8);
    REQUIRE(folds.size() == 4);
    for (const auto& f : folds) {
        CHECK(is_partition(groups.size(), {&f.train, &f.test}));
        auto in_test = group_set(f.test), in_train = group_set(f.train);
        for (auto g : in_test) CHECK(in_train.count(g) == 0);
        CHECK(f.test.size() >= 6);  // 30 rows, greedy balance: 7 or 8 rows per fold
        CHECK(f.test.size() <= 9);
    }
}

TEST_CASE("impossible split requests are clear errors") {
    std::string message;
    CHECK(error_code_of([] { tenon::random_holdout(10, {0.5, 0.3, 0.3}, 1); }, &message) == "prep.split.fractions");
    CHECK(message == "[prep.split.fractions] split fractions must sum to 1, got 0.500000 + 0.300000 + 0.300000 = 1.100000");
    CHECK(error_code_of([] { tenon::random_holdout(10, {1.2, -0.2, 0.0}, 1); }, &message) == "prep.split.fractions");
    CHECK(message ==
          "[prep.split.fractions] split fractions must each lie in [0, 1], got train 1.200000, validation "
          "-0.200000, test 0.000000");
    CHECK(error_code_of([] { tenon::random_holdout(10, {0.0, 0.5, 0.5}, 1); }, &message) == "prep.split.fractions");
    CHECK(message == "[prep.split.fractions] the train fraction must be positive");

    CHECK(error_code_of([] { tenon::random_holdout(3, {0.8, 0.1, 0.1}, 1); }, &message) == "prep.split.empty_subset");
    CHECK(message == "[prep.split.empty_subset] random holdout: the validation subset (fraction 0.100000) would receive no rows");

    const auto labels = labels_with_counts({10, 2});
    CHECK(error_code_of([&] { tenon::stratified_k_folds(labels, 3, 1); }, &message) == "prep.split.class_too_small");
    CHECK(message == "[prep.split.class_too_small] stratified k-fold: class 1 has 2 rows, fewer than the 3 folds");
    CHECK(error_code_of(
              [&] {
                  tenon::stratified_holdout(labels_with_counts({10, 2}), {0.6, 0.2, 0.2}, 1);
              },
              &message) == "prep.split.class_too_small");
    CHECK(message == "[prep.split.class_too_small] stratified holdout: class 1 has 2 rows, fewer than the 3 non-empty subsets");

    const std::vector<std::uint32_t> one_group(8, 0);
    CHECK(error_code_of([&] { tenon::grouped_holdout(one_group, {0.8, 0.0, 0.2}, 1); }, &message) == "prep.split.single_group");
    CHECK(message == "[prep.split.single_group] grouped holdout: 1 group(s) cannot fill 2 subsets with whole groups");
    CHECK(error_code_of([&] { tenon::group_k_folds(one_group, 2, 1); }, &message) == "prep.split.single_group");
    CHECK(message == "[prep.split.single_group] group k-fold: 1 group(s) cannot fill 2 folds with whole groups");

    CHECK(error_code_of([] { tenon::k_folds(3, 5, 1); }, &message) == "prep.split.empty_subset");
    CHECK(message == "[prep.split.empty_subset] k-fold: 5 folds of 3 rows would leave a fold empty");
    CHECK(error_code_of([] { tenon::k_folds(10, 1, 1); }, &message) == "core.argument.invalid");
    CHECK(message == "[core.argument.invalid] k-fold: at least 2 folds are needed, got 1");

    const std::vector<double> with_gap{1, std::numeric_limits<double>::quiet_NaN(), 3};
    CHECK(error_code_of([&] { tenon::chronological_holdout(with_gap, {0.5, 0.0, 0.5}); }, &message) == "prep.split.missing_time");
    CHECK(message == "[prep.split.missing_time] chronological holdout: row 1 has no time");
    CHECK(error_code_of([] { tenon::rolling_origin_folds({1, 2, 3, 4}, 2, 2); }, &message) == "prep.split.empty_subset");
    CHECK(message ==
          "[prep.split.empty_subset] rolling-origin folds: 2 folds with a horizon of 2 rows need more than 4 "
          "rows, got 4 (the first fold would have no training rows)");
}
