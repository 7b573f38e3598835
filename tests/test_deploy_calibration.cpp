// Tests of calibration in deployment: section CALB of the model file (round
// trip, checks, version-1 files without it) and the predictor's bands,
// temperature-scaled probabilities and class-set bits.
#include <doctest/doctest.h>

#include <algorithm>
#include <cmath>
#include <limits>
#include <string>
#include <vector>

#include <tenon/deploy/model_file.hpp>
#include <tenon/deploy/predictor.hpp>
#include <tenon/train/calibration.hpp>

#include "deploy_test_support.hpp"

using deploy_test::pump_table;
using deploy_test::range;
using deploy_test::same_bits;

namespace {

template <class T>
struct calibrated {
    tenon::table table = pump_table(240, 21);
    std::vector<std::size_t> train = range(0, 160), validation = range(160, 200), test = range(200, 240);
    tenon::fitted_model<T> fitted;
    tenon::model_file<T> file;

    // One network by default; `members` > 1 for a seed ensemble.
    explicit calibrated(bool classify, std::size_t members = 1)
        : fitted(
              tenon::fit_model<T>(table, classify ? deploy_test::condition_plan() : deploy_test::power_plan(), train, validation, settings(members))),
          file(tenon::make_model_file(fitted, table, train, settings(members))) {
        file.calibration = tenon::calibrate_model(fitted, table, validation, 0.8);
    }

    static tenon::model_settings settings(std::size_t members) {
        tenon::model_settings s = deploy_test::small_settings();
        s.ensemble = members;
        return s;
    }
};

std::string code_of(const std::vector<std::uint8_t>& bytes) {
    try {
        tenon::model_file_from_bytes<float>(bytes);
    } catch (const tenon::error& e) {
        return e.code();
    }
    return "loaded";
}

}  // namespace

TEST_CASE_TEMPLATE("section CALB round-trips both kinds of calibration exactly", T, float, double) {
    for (const bool classify : {false, true}) {
        calibrated<T> c(classify);
        const auto back = tenon::model_file_from_bytes<T>(tenon::model_file_to_bytes(c.file));
        CHECK(back.format_version == 2);
        REQUIRE(back.calibration);
        CHECK(back.calibration->interval.has_value() == !classify);
        CHECK(back.calibration->classes.has_value() == classify);
        if (classify) {
            CHECK(back.calibration->classes->temperature == c.file.calibration->classes->temperature);
            CHECK(back.calibration->classes->set_threshold == c.file.calibration->classes->set_threshold);
            CHECK(back.calibration->classes->rows == 40);
            CHECK(back.calibration->classes->coverage == 0.8);
        } else {
            CHECK(back.calibration->interval->half_width == c.file.calibration->interval->half_width);
            CHECK(back.calibration->interval->rows == 40);
            CHECK_FALSE(back.calibration->interval->has_spread);
        }
        const auto summary = tenon::inspect_model_bytes(tenon::model_file_to_bytes(c.file));
        REQUIRE(summary.calibration);
        CHECK(summary.calibration->classes.has_value() == classify);
    }
}

TEST_CASE("a file without calibration has no section CALB; the version-1 fixture carries none") {
    calibrated<float> c(false);
    c.file.calibration.reset();
    const auto bytes = tenon::model_file_to_bytes(c.file);
    CHECK_FALSE(tenon::model_file_from_bytes<float>(bytes).calibration);
    CHECK_FALSE(tenon::inspect_model_bytes(bytes).calibration);
    const std::string path = std::string(TENON_SOURCE_DIR) + "/tests/fixtures/deploy/pump_v1_float.tnm";
    const auto old = tenon::load_model_file<float>(path);
    CHECK(old.format_version == 1);
    CHECK_FALSE(old.calibration);
    tenon::predictor<float> p(old, 4);
    CHECK_FALSE(p.interval());
    CHECK_FALSE(p.class_sets());
}

TEST_CASE("a calibration with values out of range is refused as malformed") {
    calibrated<float> c(true);
    auto bad = c.file;
    bad.calibration->classes->temperature = 0.0;
    CHECK(code_of(tenon::model_file_to_bytes(bad)) == "deploy.model.malformed");
    bad = c.file;
    bad.calibration->classes->coverage = 1.0;
    CHECK(code_of(tenon::model_file_to_bytes(bad)) == "deploy.model.malformed");
    bad = c.file;
    bad.calibration->classes->set_threshold = std::numeric_limits<double>::quiet_NaN();
    CHECK(code_of(tenon::model_file_to_bytes(bad)) == "deploy.model.malformed");
    CHECK_THROWS_WITH_AS(tenon::model_file_from_bytes<float>(tenon::model_file_to_bytes(bad)), doctest::Contains("set threshold"), tenon::error);
    // An infinite band (too few rows for the coverage) is stored and read back.
    calibrated<float> r(false);
    r.file.calibration->interval->half_width = std::numeric_limits<double>::infinity();
    CHECK(std::isinf(tenon::model_file_from_bytes<float>(tenon::model_file_to_bytes(r.file)).calibration->interval->half_width));
}

TEST_CASE_TEMPLATE("the predictor's band is the prediction plus and minus the calibrated half width", T, float, double) {
    calibrated<T> c(false);
    tenon::predictor<T> calibrated_predictor(c.file, 64);
    auto plain_file = c.file;
    plain_file.calibration.reset();
    tenon::predictor<T> plain(plain_file, 64);
    const auto features = c.fitted.plan.template apply<T>(c.table, c.test).features;
    const auto v = calibrated_predictor.predict_prepared(features.data(), c.test.size());
    const auto u = plain.predict_prepared(features.data(), c.test.size());
    REQUIRE(v.has_interval());
    CHECK_FALSE(u.has_interval());
    CHECK_FALSE(v.has_class_sets());
    const T h = static_cast<T>(c.file.calibration->interval->half_width);
    for (std::size_t i = 0; i < v.rows; ++i) {
        CHECK(same_bits(v.at(i, 0), u.at(i, 0)));  // the value itself is unchanged
        CHECK(same_bits(v.low_at(i, 0), static_cast<T>(v.at(i, 0) - h)));
        CHECK(same_bits(v.high_at(i, 0), static_cast<T>(v.at(i, 0) + h)));
    }
    // The library's scores of the band on the same rows agree with the predictor's.
    const auto scores = tenon::score_calibration(c.fitted, *c.file.calibration, c.table, c.test);
    CHECK(scores.interval_mean_width == doctest::Approx(2.0 * static_cast<double>(h)).epsilon(1e-5));
}

TEST_CASE_TEMPLATE("the predictor's probabilities are temperature-scaled and its class sets follow the threshold", T, float, double) {
    calibrated<T> c(true);
    tenon::predictor<T> p(c.file, 64);
    REQUIRE(p.class_sets());
    const auto features = c.fitted.plan.template apply<T>(c.table, c.test).features;
    const auto v = p.predict_prepared(features.data(), c.test.size());
    REQUIRE(v.has_class_sets());
    CHECK_FALSE(v.has_interval());
    const double temperature = c.file.calibration->classes->temperature;
    const auto expected = tenon::tempered_softmax_rows(tenon::network_outputs(c.fitted.net, features), temperature);
    std::vector<std::uint64_t> bits(c.test.size() * tenon::class_set_words(v.width));
    tenon::class_set_bits(*c.file.calibration->classes, expected.data(), c.test.size(), v.width, bits.data());
    for (std::size_t i = 0; i < v.rows; ++i) {
        std::size_t members = 0;
        for (std::size_t k = 0; k < v.width; ++k) {
            CHECK(same_bits(v.at(i, k), expected.data()[i * v.width + k]));
            CHECK(v.in_set(i, k) == (((bits[i] >> k) & 1u) == 1u));
            if (v.in_set(i, k)) {
                ++members;
                // Sadinle et al. 2019: class k joins when 1 - p_k <= threshold (or it is the best).
                CHECK((1.0 - static_cast<double>(v.at(i, k)) <= c.file.calibration->classes->set_threshold + 1e-6 || k == v.best_class(i)));
            }
        }
        CHECK(v.in_set(i, v.best_class(i)));
        CHECK(v.set_size(i) == members);
    }
}

TEST_CASE_TEMPLATE("an ensemble's band scales with its members' spread, and its tempered mean gives the class sets", T, float, double) {
    // Regression: the normalized band, prediction +- q * (spread + floor)
    // (train/calibration.hpp), with the spread the members' sample standard
    // deviation the predictor reports.
    calibrated<T> r(false, 3);
    REQUIRE(r.file.calibration->interval->has_spread);
    tenon::predictor<T> rp(r.file, 64);
    const auto rf = r.fitted.plan.template apply<T>(r.table, r.test).features;
    const auto v = rp.predict_prepared(rf.data(), r.test.size());
    REQUIRE(v.members == 3);
    REQUIRE(v.has_interval());
    const T q = static_cast<T>(r.file.calibration->interval->spread_quantile);
    const T floor = static_cast<T>(r.file.calibration->interval->spread_floor);
    double widest = 0.0, narrowest = std::numeric_limits<double>::infinity();
    for (std::size_t i = 0; i < v.rows; ++i) {
        const T h = q * (v.spread[i] + floor);
        CHECK(same_bits(v.low_at(i, 0), static_cast<T>(v.at(i, 0) - h)));
        CHECK(same_bits(v.high_at(i, 0), static_cast<T>(v.at(i, 0) + h)));
        widest = std::max(widest, static_cast<double>(v.high_at(i, 0) - v.low_at(i, 0)));
        narrowest = std::min(narrowest, static_cast<double>(v.high_at(i, 0) - v.low_at(i, 0)));
    }
    CHECK(widest > narrowest);  // the band is not one width for every row
    // The library scores the same band (its spread is computed in double).
    const auto scores = tenon::score_calibration(r.fitted, *r.file.calibration, r.table, r.test);
    double width = 0.0;
    for (std::size_t i = 0; i < v.rows; ++i) width += static_cast<double>(v.high_at(i, 0) - v.low_at(i, 0));
    CHECK(scores.interval_mean_width == doctest::Approx(width / static_cast<double>(v.rows)).epsilon(1e-4));

    // Classification: softmax(log(mean probability) / temperature), the
    // library's and the predictor's, bit for bit.
    calibrated<T> c(true, 3);
    tenon::predictor<T> cp(c.file, 64);
    const tenon::prepared_rows<T> rows = c.fitted.plan.template apply<T>(c.table, c.test);
    const auto u = cp.predict_prepared(rows.features.data(), c.test.size());
    REQUIRE(u.members == 3);
    REQUIRE(u.has_class_sets());
    const auto logits = tenon::detail::ensemble_outputs(c.fitted, rows).outputs;
    const auto expected = tenon::tempered_softmax_rows(logits, c.file.calibration->classes->temperature);
    for (std::size_t i = 0; i < u.rows; ++i) {
        for (std::size_t k = 0; k < u.width; ++k) CHECK(same_bits(u.at(i, k), expected.data()[i * u.width + k]));
        CHECK(u.in_set(i, u.best_class(i)));
    }
}

TEST_CASE("a calibration of the other target kind is not used") {
    calibrated<float> c(true);
    tenon::interval_calibration band;
    band.half_width = 1.0;
    c.file.calibration->interval = band;  // a band on a classifier
    tenon::predictor<float> p(c.file, 4);
    CHECK_FALSE(p.interval());
    CHECK(p.class_sets());
}
