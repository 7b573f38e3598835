// tenon: what a model file's section CALB holds (a conformal band for a
// regression value, or a temperature and a class-set threshold for a
// classifier) and how a served prediction reads its band or set from it.
// Fitting these on held-out rows is train/calibration.hpp's job.
#pragma once

#include <cstddef>
#include <cstdint>
#include <optional>

#include "tenon/version.hpp"

TENON_NAMESPACE_BEGIN

/// Nominal coverage when none is given (common practice for soft sensors).
inline constexpr double default_coverage = 0.90;

/// A regression band: prediction +- half_width, or, given a per-row spread
/// (the ensemble members' standard deviation in the target's units),
/// prediction +- spread_quantile * (spread + spread_floor).
struct interval_calibration {
    double coverage = default_coverage;  // nominal, 1 - alpha
    std::uint64_t rows = 0;  // calibration rows
    /// Conformal quantile of |y - prediction|; +infinity when the rows are
    /// too few for the coverage (conformal_rank exceeds them).
    double half_width = 0.0;
    /// The normalized variant, present when the calibration rows had spreads.
    bool has_spread = false;
    double spread_quantile = 0.0;  // conformal quantile of |y - prediction| / (spread + spread_floor)
    double spread_floor = 0.0;  // keeps a row of zero spread from getting a zero-width band
};

/// Temperature scaling and conformal class sets.
struct class_calibration {
    double coverage = default_coverage;
    std::uint64_t rows = 0;
    double temperature = 1.0;  // probabilities are softmax(logits / temperature)
    /// Conformal quantile of 1 - p(true class) under the temperature; a class
    /// joins a row's set when 1 - p <= set_threshold (the most probable
    /// class always does). +infinity: every class.
    double set_threshold = 1.0;
};

/// What a model file's section CALB holds: one of the two, by target kind.
struct model_calibration {
    std::optional<interval_calibration> interval;
    std::optional<class_calibration> classes;
};

/// The bounds of `rows` predictions (the hot path: no allocation). With a
/// spread (rows values, the target's units) and a normalized calibration,
/// the band scales with it; otherwise it is prediction +- half_width.
template <class T>
void interval_bounds(const interval_calibration& c, const T* predicted, const T* spread, std::size_t rows, T* low, T* high) noexcept {
    if (spread && c.has_spread) {
        const T q = static_cast<T>(c.spread_quantile), floor = static_cast<T>(c.spread_floor);
        for (std::size_t i = 0; i < rows; ++i) {
            const T h = q * (spread[i] + floor);
            low[i] = predicted[i] - h;
            high[i] = predicted[i] + h;
        }
        return;
    }
    const T h = static_cast<T>(c.half_width);
    for (std::size_t i = 0; i < rows; ++i) {
        low[i] = predicted[i] - h;
        high[i] = predicted[i] + h;
    }
}

/// 64-bit words per row of a class set of `classes` classes.
inline std::size_t class_set_words(std::size_t classes) noexcept { return (classes + 63) / 64; }

/// Marks each row's set in `words` (rows x class_set_words(classes), bit k
/// of word k / 64 for class k): the classes with 1 - p <= set_threshold and
/// the most probable class (no allocation).
template <class T>
void class_set_bits(const class_calibration& c, const T* probabilities, std::size_t rows, std::size_t classes, std::uint64_t* words) noexcept {
    const std::size_t w = class_set_words(classes);
    const bool every = !(c.set_threshold < 1.0);
    const T least = static_cast<T>(1.0 - c.set_threshold);
    for (std::size_t i = 0; i < rows; ++i) {
        const T* p = probabilities + i * classes;
        std::uint64_t* out = words + i * w;
        for (std::size_t k = 0; k < w; ++k) out[k] = 0;
        std::size_t best = 0;
        for (std::size_t k = 0; k < classes; ++k) {
            if (p[k] > p[best]) best = k;
            if (every || p[k] >= least) out[k / 64] |= std::uint64_t(1) << (k % 64);
        }
        out[best / 64] |= std::uint64_t(1) << (best % 64);
    }
}

TENON_NAMESPACE_END
