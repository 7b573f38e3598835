// Split-conformal coverage on an open dataset: Seattle's daily weather
// 2012-2015 (seattle-weather.csv of the Vega datasets, Debian package
// python3-vega-datasets), regressing the day's maximum temperature on the
// date, the minimum temperature, precipitation, wind and the weather kind.
//
// Source: Lei et al. 2018, Theorem 2.2 (each random split covers r / (n + 1)).
// The mean coverage over the seeds must lie within 3.66 standard errors of
// r / (n + 1). The splits and the tolerance's derivation: docs/design/tests.md.
#include <doctest/doctest.h>

#include <cmath>
#include <filesystem>
#include <string>
#include <vector>

#include <tenon/prep/csv.hpp>
#include <tenon/train/calibration.hpp>

namespace {

const char* const seattle_weather = "/usr/lib/python3/dist-packages/vega_datasets/_data/seattle-weather.csv";

}  // namespace

TEST_CASE("split-conformal bands cover r / (n + 1) of Seattle's daily maxima over 30 random splits") {
    REQUIRE_MESSAGE(std::filesystem::exists(seattle_weather), "install the Debian package python3-vega-datasets (cmake/deps.sh)");
    const tenon::table t = tenon::read_csv_file(seattle_weather);
    REQUIRE(t.row_count() == 1461);
    tenon::plan p;
    p.set_target("temp_max", tenon::target_kind::regression);
    tenon::model_settings s;
    s.hidden = {16};
    s.epochs = 20;
    s.batch_size = 32;
    s.learning_rate = 0.01;
    const std::size_t seeds = 30;
    std::vector<double> coverage;
    std::size_t n = 0;
    double width = 0.0;
    for (std::size_t seed = 1; seed <= seeds; ++seed) {
        const auto split = tenon::random_holdout(t.row_count(), {0.5, 0.25, 0.25}, seed);
        s.seed = seed;
        // No early stopping: the calibration rows are not used to choose the epoch.
        auto model = tenon::fit_model<float>(t, p, split.train, {}, s);
        const auto c = tenon::calibrate_model(model, t, split.validation, 0.9);
        const auto scores = tenon::score_calibration(model, c, t, split.test);
        coverage.push_back(scores.interval_coverage);
        width += scores.interval_mean_width;
        n = split.validation.size();
    }
    double mean = 0.0, squares = 0.0;
    for (double v : coverage) mean += v;
    mean /= static_cast<double>(seeds);
    for (double v : coverage) squares += (v - mean) * (v - mean);
    const double standard_error = std::sqrt(squares / static_cast<double>(seeds - 1) / static_cast<double>(seeds));
    const double nominal = std::ceil(static_cast<double>(n + 1) * 0.9) / static_cast<double>(n + 1);
    MESSAGE("mean coverage " << mean << " over " << seeds << " splits (expected " << nominal << ", standard error " << standard_error
                             << "), mean band width " << width / static_cast<double>(seeds) << " C");
    CHECK(std::abs(mean - nominal) <= 3.66 * standard_error);
    CHECK(standard_error > 0.0);
}
