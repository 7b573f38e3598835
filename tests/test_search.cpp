// Tests of the budgeted settings search (train/search.hpp) and of decoupled
// weight decay in fit_model. Budgets run on a fake clock that advances a
// fixed step at every reading, so the times, and with them the record, are
// the same on every run and machine; nothing sleeps and nothing is timed.
#include <doctest/doctest.h>

#include <cmath>
#include <limits>
#include <memory>
#include <sstream>
#include <string>
#include <vector>

#include <tenon/prep/csv.hpp>
#include <tenon/train/search.hpp>

#include "pump_log.hpp"

namespace {

// The pump log (pump_log.hpp) without its condition column. Rows not in
// `keep` are left out, or, with `poison_dropped`, kept with an empty head
// cell (missing), which strict steps refuse to read.
tenon::table pump_table(std::size_t n, std::uint64_t seed, const std::vector<bool>& keep = {}, bool poison_dropped = false) {
    tenon::random_engine rng(seed);
    std::ostringstream csv;
    csv << "flow,head,fluid,power\n";
    for (std::size_t i = 0; i < n; ++i) {
        const pump_log::reading r = pump_log::draw(rng);
        const bool kept = keep.empty() || keep[i];
        if (!kept && !poison_dropped) continue;
        csv << r.flow << ",";
        if (kept) csv << r.head;  // a dropped row, when kept in the table, has no head
        csv << "," << r.fluid_name() << "," << r.power << "\n";
    }
    std::istringstream in(csv.str());
    return tenon::read_csv(in, {}, "pump.csv");
}

// A reading clock: `step` seconds later at every reading, and `jump` more
// once the time passes `jump_after` (a machine suddenly slowed down).
struct fake_clock {
    double now = 0.0, step = 0.001, jump_after = -1.0, jump = 0.0;
    std::size_t readings = 0, readings_after_jump = 0;
    bool jumped = false;
};

std::function<double()> reading(const std::shared_ptr<fake_clock>& c) {
    return [c] {
        ++c->readings;
        if (c->jumped) ++c->readings_after_jump;
        c->now += c->step;
        if (!c->jumped && c->jump_after >= 0.0 && c->now > c->jump_after) {
            c->now += c->jump;
            c->jumped = true;
        }
        return c->now;
    };
}

tenon::model_settings quick_settings(std::uint64_t seed) {
    tenon::model_settings s;
    s.epochs = 12;  // each fold ends at the epoch limit: a few milliseconds
    s.seed = seed;
    return s;
}

tenon::plan power_plan(bool strict = false) {
    tenon::plan p;
    p.set_target("power", tenon::target_kind::regression);
    if (strict) p.set_default_steps(tenon::strict_feature_steps());
    return p;
}

std::vector<std::size_t> first_rows(std::size_t n) {
    std::vector<std::size_t> rows(n);
    for (std::size_t i = 0; i < n; ++i) rows[i] = i;
    return rows;
}

void check_same(const tenon::settings_search_result& a, const tenon::settings_search_result& b) {
    REQUIRE(a.candidates.size() == b.candidates.size());
    CHECK(a.chosen_index == b.chosen_index);
    CHECK(a.seconds == b.seconds);
    for (std::size_t i = 0; i < a.candidates.size(); ++i) {
        CAPTURE(i);
        CHECK(a.candidates[i].hidden == b.candidates[i].hidden);
        CHECK(a.candidates[i].learning_rate == b.candidates[i].learning_rate);
        CHECK(a.candidates[i].weight_decay == b.candidates[i].weight_decay);
        CHECK(a.candidates[i].mean_fold_loss == b.candidates[i].mean_fold_loss);
        CHECK(a.candidates[i].folds_completed == b.candidates[i].folds_completed);
        CHECK(a.candidates[i].cut_short == b.candidates[i].cut_short);
        CHECK(a.candidates[i].seconds == b.candidates[i].seconds);
    }
}

}  // namespace

TEST_CASE("the search grid holds 108 distinct points of widths, halving depths, rates and decays") {
    const auto grid = tenon::settings_search_grid();
    CHECK(grid.size() == 108);
    CHECK(grid.front().hidden == std::vector<std::size_t>{16});
    CHECK(grid.back().hidden == std::vector<std::size_t>{128, 64, 32});
    for (std::size_t i = 0; i < grid.size(); ++i)
        for (std::size_t j = i + 1; j < grid.size(); ++j) {
            const bool same =
                grid[i].hidden == grid[j].hidden && grid[i].learning_rate == grid[j].learning_rate && grid[i].weight_decay == grid[j].weight_decay;
            CHECK_FALSE(same);
        }
}

TEST_CASE("the search chooses the lowest complete candidate only when it beats the start by more than the folds' noise") {
    const auto candidate = [](std::vector<double> losses, bool cut_short = false) {
        tenon::search_candidate c;
        c.fold_losses = losses;
        c.folds_completed = losses.size();
        c.cut_short = cut_short;
        double sum = 0.0;
        for (double l : losses) sum += l;
        c.mean_fold_loss = losses.empty() ? std::nan("") : sum / static_cast<double>(losses.size());
        return c;
    };
    // Lower on every fold by about the same amount: a clear gain.
    CHECK(tenon::choose_search_candidate({candidate({0.30, 0.40, 0.50}), candidate({0.35, 0.45, 0.55}), candidate({0.20, 0.31, 0.39})}, 3) == 2);
    // Lower on average, but by less than the spread of the fold differences
    // (-0.09, +0.06, -0.06: mean -0.03, standard error 0.046): the start stays.
    CHECK(tenon::choose_search_candidate({candidate({0.30, 0.40, 0.50}), candidate({0.21, 0.46, 0.44})}, 3) == 0);
    // A cut-short candidate is not chosen over complete ones, however low its folds.
    CHECK(tenon::choose_search_candidate({candidate({0.30, 0.40, 0.50}), candidate({0.01, 0.01}, true), candidate({0.20, 0.30, 0.40})}, 3) == 2);
    CHECK(tenon::choose_search_candidate({candidate({0.30, 0.40, 0.50}), candidate({0.01, 0.01, 0.01}, true)}, 3) == 0);
    // The start cut short: the lowest complete one; none complete: the start.
    CHECK(tenon::choose_search_candidate({candidate({0.30}, true)}, 3) == 0);
    CHECK(tenon::choose_search_candidate({candidate({0.30, 0.40}, true), candidate({0.5, 0.5, 0.5})}, 3) == 1);
    // A fold without a finite loss makes a candidate's mean infinite: never chosen.
    auto diverged = candidate({0.1, 0.1, 0.1});
    diverged.mean_fold_loss = std::numeric_limits<double>::infinity();
    CHECK(tenon::choose_search_candidate({candidate({0.30, 0.40, 0.50}), diverged}, 3) == 0);
}

TEST_CASE("the same seed gives the same search record and choice; another seed another order") {
    const auto t = pump_table(300, 1);
    const auto rows = first_rows(240);
    const auto run = [&](std::uint64_t seed) {
        auto c = std::make_shared<fake_clock>();
        auto s = quick_settings(seed);
        s.clock = reading(c);
        return tenon::search_settings<float>(t, power_plan(), rows, s, 1e6, 3, 4);
    };
    const auto a = run(5), b = run(5), other = run(6);
    check_same(a, b);
    REQUIRE(a.candidates.size() == 4);
    CHECK(a.candidates_listed == 4);
    // The defaults first, then the seeded grid (the defaults' grid point left out).
    const tenon::model_settings defaults;
    const std::vector<std::size_t> default_widths{64, 32};  // hidden_widths under 8,192 training rows
    CHECK(a.candidates[0].hidden == default_widths);
    CHECK(a.candidates[0].learning_rate == defaults.learning_rate);
    CHECK(a.candidates[0].weight_decay == 0.0);
    bool order_differs = false;
    for (std::size_t i = 1; i < 4; ++i) {
        order_differs = order_differs || a.candidates[i].hidden != other.candidates[i].hidden ||
            a.candidates[i].learning_rate != other.candidates[i].learning_rate || a.candidates[i].weight_decay != other.candidates[i].weight_decay;
        CHECK_FALSE((a.candidates[i].hidden == default_widths && a.candidates[i].learning_rate == defaults.learning_rate &&
                     a.candidates[i].weight_decay == 0.0));
    }
    CHECK(order_differs);
    // Every candidate completed its 3 folds (mean squared error, prepared units).
    for (const auto& c : a.candidates) {
        CHECK(c.folds_completed == 3);
        REQUIRE(c.fold_losses.size() == 3);
        CHECK_FALSE(c.cut_short);
        CHECK(c.mean_fold_loss == doctest::Approx((c.fold_losses[0] + c.fold_losses[1] + c.fold_losses[2]) / 3));
        CHECK(c.mean_fold_loss > 0.0);
        CHECK(c.mean_fold_loss < 1.0);  // z-scored target: below the variance of 1
        CHECK(c.seconds > 0.0);
    }
    CHECK(a.chosen_index == tenon::choose_search_candidate(a.candidates, 3));
    for (const auto& c : a.candidates) CHECK(c.mean_fold_loss >= a.candidates[a.lowest_index].mean_fold_loss);
    CHECK((a.chosen_index == a.lowest_index || a.chosen_index == 0));
    const auto& chosen = a.candidates[a.chosen_index];
    CHECK(a.chosen.hidden == chosen.hidden);
    CHECK(a.chosen.learning_rate == chosen.learning_rate);
    CHECK(a.chosen.weight_decay == chosen.weight_decay);
    CHECK(a.chosen.epochs == 12);  // the rest as given
    CHECK(a.chosen.seed == 5);
}

TEST_CASE("a budget that allows only the first candidate returns the defaults") {
    const auto t = pump_table(300, 2);
    const auto rows = first_rows(240);
    auto c = std::make_shared<fake_clock>();
    auto s = quick_settings(3);
    s.clock = reading(c);
    const auto two = tenon::search_settings<float>(t, power_plan(), rows, s, 1e6, 3, 2);
    REQUIRE(two.candidates.size() == 2);
    const double first = two.candidates[0].seconds;

    // After the first candidate half its time is left: the next (estimated at
    // the first's time) does not start.
    c = std::make_shared<fake_clock>();
    s.clock = reading(c);
    const auto one = tenon::search_settings<float>(t, power_plan(), rows, s, 1.5 * first);
    REQUIRE(one.candidates.size() == 1);
    CHECK(one.candidates_listed == 108);  // the defaults' grid point left out
    CHECK(one.chosen_index == 0);
    CHECK(one.candidates[0].folds_completed == 3);
    CHECK_FALSE(one.candidates[0].cut_short);
    CHECK(one.candidates[0].mean_fold_loss == two.candidates[0].mean_fold_loss);  // the budget did not change it
    const tenon::model_settings defaults;
    CHECK(one.chosen.hidden == std::vector<std::size_t>{64, 32});  // hidden_widths under 8,192 training rows
    CHECK(one.chosen.learning_rate == defaults.learning_rate);
    CHECK(one.chosen.weight_decay == defaults.weight_decay);
    CHECK(one.seconds <= 1.5 * first);
}

TEST_CASE("the search stops once the clock passes the budget, and a cut-short candidate is not chosen") {
    const auto t = pump_table(300, 3);
    const auto rows = first_rows(240);
    auto s = quick_settings(4);
    auto probe = std::make_shared<fake_clock>();
    s.clock = reading(probe);
    const auto two = tenon::search_settings<float>(t, power_plan(), rows, s, 1e6, 3, 2);
    REQUIRE(two.candidates.size() == 2);
    const double first = two.candidates[0].seconds, second = two.candidates[1].seconds;
    // Readings of the clock per epoch (a reading per batch, a few per epoch and
    // fold), from the first candidate's 3 folds of 12 epochs.
    const double epoch_readings = first / probe->step / (3 * 12);
    CHECK(epoch_readings < 10.0);

    SUBCASE("the clock jumps past the budget in the middle of the second candidate") {
        auto c = std::make_shared<fake_clock>();
        c->jump_after = first + 0.5 * second;
        c->jump = 1000.0;
        s.clock = reading(c);
        const double budget = 100.0;  // without the jump, dozens of candidates would fit
        const auto r = tenon::search_settings<float>(t, power_plan(), rows, s, budget);
        CHECK(c->jumped);
        REQUIRE(r.candidates.size() == 2);
        CHECK(r.candidates[1].cut_short);
        CHECK(r.candidates[1].folds_completed < 3);
        CHECK(r.chosen_index == 0);  // the only complete candidate
        CHECK_FALSE(r.candidates[0].cut_short);
        CHECK(r.seconds > budget);
        // Training noticed the budget within the batch it was in.
        CHECK(static_cast<double>(c->readings_after_jump) <= epoch_readings);
    }
    SUBCASE("a budget below one candidate's time cuts the first short and keeps the defaults") {
        auto c = std::make_shared<fake_clock>();
        s.clock = reading(c);
        const double budget = 0.5 * first;
        const auto r = tenon::search_settings<float>(t, power_plan(), rows, s, budget);
        REQUIRE(r.candidates.size() == 1);
        CHECK(r.candidates[0].cut_short);
        CHECK(r.candidates[0].folds_completed < 3);
        CHECK(r.chosen_index == 0);
        CHECK(r.chosen.hidden == tenon::hidden_widths(s, rows.size()));  // the start, its widths by the row count
        CHECK(r.seconds >= budget);
        CHECK(r.seconds <= budget + epoch_readings * c->step);  // overran by less than one epoch
    }
}

TEST_CASE("the search reads the training rows only") {
    // A quarter of the rows (validation and test rows) have an empty head
    // cell, and the plan's strict steps refuse a missing cell: reading any
    // of them would fail.
    std::vector<bool> keep(400);
    for (std::size_t i = 0; i < keep.size(); ++i) keep[i] = i % 4 != 0;
    const auto t = pump_table(400, 4, keep, true);
    std::vector<std::size_t> train, held_out;
    for (std::size_t i = 0; i < keep.size(); ++i) (keep[i] ? train : held_out).push_back(i);
    const auto p = power_plan(true);
    CHECK_THROWS_WITH(tenon::fit_model<float>(t, p, train, held_out, quick_settings(1)), doctest::Contains("missing"));

    const auto run = [&](const tenon::table& table, const std::vector<std::size_t>& rows) {
        auto c = std::make_shared<fake_clock>();
        auto s = quick_settings(9);
        s.clock = reading(c);
        return tenon::search_settings<float>(table, p, rows, s, 1e6, 3, 3);
    };
    const auto with_others = run(t, train);
    // The same rows alone in a table of their own give the same record.
    const auto alone = pump_table(400, 4, keep, false);
    REQUIRE(alone.row_count() == train.size());
    check_same(with_others, run(alone, first_rows(train.size())));
    CHECK(with_others.candidates.size() == 3);
}

TEST_CASE("a classification search uses stratified folds and cross-entropy") {
    // An invented cap check: tight when torque x angle is large, three grades.
    tenon::random_engine rng(11);
    std::ostringstream csv;
    csv << "torque,angle,grade\n";
    for (std::size_t i = 0; i < 240; ++i) {
        const double torque = rng.uniform(1.0, 3.0), angle = rng.uniform(200.0, 400.0);
        const double product = torque * angle;
        csv << torque << "," << angle << "," << (product < 450 ? "loose" : product < 750 ? "tight" : "over") << "\n";
    }
    std::istringstream in(csv.str());
    const auto t = tenon::read_csv(in, {}, "caps.csv");
    tenon::plan p;
    p.set_target("grade", tenon::target_kind::classification);
    auto c = std::make_shared<fake_clock>();
    auto s = quick_settings(2);
    s.clock = reading(c);
    const auto r = tenon::search_settings<float>(t, p, first_rows(200), s, 1e6, 4, 3);
    REQUIRE(r.candidates.size() == 3);
    CHECK(r.folds == 4);
    for (const auto& k : r.candidates) {
        CHECK(k.folds_completed == 4);
        CHECK(k.mean_fold_loss > 0.0);
        CHECK(k.mean_fold_loss < std::log(3.0));  // better than guessing the three grades evenly
    }
}

TEST_CASE("the search refuses a bad budget, too few folds, a team and a decay its rule lacks") {
    const auto t = pump_table(60, 5);
    const auto rows = first_rows(50);
    const auto s = quick_settings(1);
    CHECK_THROWS_WITH(tenon::search_settings<float>(t, power_plan(), rows, s, 0.0),
                      doctest::Contains("budget must be a positive number of seconds, got 0"));
    CHECK_THROWS_WITH(tenon::search_settings<float>(t, power_plan(), rows, s, std::nan("")), doctest::Contains("budget must be a positive"));
    CHECK_THROWS_WITH(tenon::search_settings<float>(t, power_plan(), rows, s, 10.0, 1), doctest::Contains("at least 2 folds, got 1"));
    CHECK_THROWS_WITH(tenon::search_settings<float>(t, power_plan(), first_rows(2), s, 10.0, 3),
                      doctest::Contains("2 training rows, fewer than the 3 folds"));
    auto momentum = s;
    momentum.update = tenon::update_kind::momentum;
    momentum.weight_decay = 1e-3;
    CHECK_THROWS_WITH(tenon::search_settings<float>(t, power_plan(), rows, momentum, 10.0),
                      doctest::Contains("weight decay 0.001 needs the adam or adamw update rule; momentum has no decoupled weight decay"));
}

TEST_CASE("a search over the caller's folds reads their rows only and matches the same folds drawn by the search") {
    // Walk-forward folds (prep/split.hpp) over the first 240 rows, read as
    // times in row order; the last 60 rows have an empty head cell, which the
    // strict plan refuses: reading any of them would fail.
    std::vector<bool> keep(300);
    for (std::size_t i = 0; i < keep.size(); ++i) keep[i] = i < 240;
    const auto t = pump_table(300, 8, keep, true);
    std::vector<double> times(240);
    for (std::size_t i = 0; i < times.size(); ++i) times[i] = static_cast<double>(i);
    const std::vector<tenon::fold> walk = tenon::rolling_origin_folds(times, 3, 60);
    const auto run = [&](const auto& folds_or_rows, auto... more) {
        auto c = std::make_shared<fake_clock>();
        auto s = quick_settings(9);
        s.clock = reading(c);
        return tenon::search_settings<float>(t, power_plan(true), folds_or_rows, s, 1e6, more...);
    };
    const auto r = run(walk, std::size_t(3));
    CHECK(r.folds == 3);
    REQUIRE(r.candidates.size() == 3);
    for (const auto& k : r.candidates) CHECK(k.folds_completed == 3);

    // The random folds the search draws for these rows (k_folds from the
    // seed it documents), given explicitly: the same record.
    const auto rows = first_rows(240);
    const auto drawn = tenon::k_folds(rows.size(), 3, 9 ^ 0x5EA5C4F01D5ull);
    check_same(run(rows, std::size_t(3), std::size_t(3)), run(drawn, std::size_t(3)));

    // A fold without held-out rows, or a single fold, is refused before training.
    auto empty_test = walk;
    empty_test[1].test.clear();
    CHECK_THROWS_WITH(run(empty_test), doctest::Contains("fold 2 has 120 training and 0 held-out rows; each needs both"));
    CHECK_THROWS_WITH(run(std::vector<tenon::fold>{walk[0]}), doctest::Contains("at least 2 folds, got 1"));
}

TEST_CASE("a search with a rule without decoupled decay tries no decay") {
    const auto t = pump_table(120, 6);
    auto c = std::make_shared<fake_clock>();
    auto s = quick_settings(1);
    s.update = tenon::update_kind::rmsprop;
    s.clock = reading(c);
    const auto r = tenon::search_settings<float>(t, power_plan(), first_rows(100), s, 1e6, 2, 6);
    CHECK(r.candidates_listed == 6);
    for (const auto& k : r.candidates) CHECK(k.weight_decay == 0.0);
}

TEST_CASE("fit_model applies decoupled weight decay with adam and refuses it for a rule without one") {
    CHECK(std::string(tenon::make_update_rule<float>(tenon::update_kind::adam, 1e-3)->kind()) == "adamw");
    CHECK(std::string(tenon::make_update_rule<float>(tenon::update_kind::adam, 0.0)->kind()) == "adam");
    CHECK_THROWS_WITH(tenon::make_update_rule<float>(tenon::update_kind::gradient_descent, 0.01),
                      doctest::Contains("weight decay 0.01 needs the adam or adamw update rule; gd has no decoupled weight decay"));
    CHECK_THROWS_WITH(tenon::make_update_rule<float>(tenon::update_kind::adam, -1.0), doctest::Contains("weight decay -1: must be a finite number"));

    const auto t = pump_table(300, 7);
    std::vector<std::size_t> train, validation;
    for (std::size_t i = 0; i < 300; ++i) (i < 240 ? train : validation).push_back(i);
    auto s = quick_settings(3);
    s.ensemble = 1;
    s.linear_path = false;
    const auto norm = [&](double decay) {
        auto d = s;
        d.weight_decay = decay;
        auto m = tenon::fit_model<float>(t, power_plan(), train, validation, d);
        const auto& w = m.net.find("hidden1.weights").value();
        double sum = 0.0;
        for (std::size_t k = 0; k < w.size(); ++k) sum += static_cast<double>(w.data()[k]) * w.data()[k];
        return std::sqrt(sum);
    };
    // 12 epochs of 8 steps at learning rate 0.001: a decay of 10 shrinks every
    // weight by 1% a step, about 60% over the run, far beyond what the gradients restore.
    const double plain = norm(0.0), decayed = norm(10.0);
    CHECK(decayed < 0.7 * plain);
    auto gd = s;
    gd.update = tenon::update_kind::gradient_descent;
    gd.weight_decay = 1e-3;
    CHECK_THROWS_WITH(tenon::fit_model<float>(t, power_plan(), train, validation, gd), doctest::Contains("gd has no decoupled weight decay"));
}
