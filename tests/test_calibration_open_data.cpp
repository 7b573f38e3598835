// Split-conformal coverage on an open dataset: Seattle's daily weather
// 2012-2015 (seattle-weather.csv of the Vega datasets, Debian package
// python3-vega-datasets), regressing the day's maximum temperature on the
// date, the minimum temperature, precipitation, wind and the weather kind.
//
// Each seed splits the 1461 rows at random into training (half),
// calibration and test (a quarter each), fits a small network, calibrates a
// band on the calibration rows and measures its coverage on the test rows.
// Given the dataset, a uniformly random split makes calibration and test
// rows exchangeable, so each seed's expected coverage is exactly r / (n + 1),
// r = ceil((n + 1) 0.9), for continuous scores (Lei et al. 2018, Theorem
// 2.2), and the seeds' coverages are independent and identically
// distributed. The test accepts a mean within 3.66 standard errors (the
// two-sided 99.9% point of Student's t with 29 degrees of freedom, from
// memory) of r / (n + 1).
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
