// tenon: initial values for weights.
//
// Glorot (Glorot & Bengio 2010, eq. 12 and 16: Var = 2 / (fan_in + fan_out)),
// He (He et al. 2015, eq. 10: Var = 2 / fan_in) and LeCun (LeCun et al. 1998,
// section 4.6: Var = 1 / fan_in), each drawn from a uniform distribution on
// [-a, a] with a = sqrt(3 Var) or an untruncated normal (init_distribution).
// Every scheme draws from a tenon::random_engine through tenon's own
// distributions, so a seed gives the same weights with every standard library
// and compiler. Full citations: docs/design/randomness.md.
#pragma once

#include <cmath>
#include <cstddef>
#include <cstdint>
#include <string>

#include "tenon/core/enum_text.hpp"
#include "tenon/core/matrix.hpp"
#include "tenon/core/random.hpp"

TENON_NAMESPACE_BEGIN

/// The method: which variance the weights aim for (see above).
enum class init_scheme : std::uint8_t {
    zeros,
    constant,
    glorot,
    he,
    lecun,
};

/// The distribution a method draws from: uniform on [-a, a] or an
/// untruncated normal, both of the method's variance.
enum class init_distribution : std::uint8_t {
    uniform,
    normal,
};

/// A method, its distribution and its constant (used by init_scheme::constant
/// only). The default is Glorot's normalized initialization, which the paper
/// states in its uniform form (Glorot & Bengio 2010, eq. 16).
struct initializer {
    init_scheme scheme = init_scheme::glorot;
    init_distribution distribution = init_distribution::uniform;
    double value = 0.0;

    constexpr initializer() noexcept = default;
    constexpr initializer(init_scheme s, init_distribution d = init_distribution::uniform, double v = 0.0) noexcept
        : scheme(s), distribution(d), value(v) {}
};

inline const char* to_string(init_scheme s) noexcept {
    switch (s) {
    case init_scheme::zeros: return "zeros";
    case init_scheme::constant: return "constant";
    case init_scheme::glorot: return "glorot";
    case init_scheme::he: return "he";
    case init_scheme::lecun: return "lecun";
    }
    return "unknown";
}
/// The former spelling of to_string(init_scheme).
inline const char* init_scheme_name(init_scheme v) noexcept { return to_string(v); }

inline const char* to_string(init_distribution d) noexcept {
    switch (d) {
    case init_distribution::uniform: return "uniform";
    case init_distribution::normal: return "normal";
    }
    return "unknown";
}
/// The former spelling of to_string(init_distribution).
inline const char* init_distribution_name(init_distribution d) noexcept { return to_string(d); }

/// The method with the given name; raises model.record.unknown_kind otherwise.
inline init_scheme parse_init_scheme(const std::string& name) {
    init_scheme v{};
    if (!enum_from_text(name, v))
        raise(codes::model_record_unknown_kind, "initializer '" + name + "' is not known (" + enum_choices<init_scheme>() + ")");
    return v;
}

/// The distribution with the given name; raises model.record.unknown_kind otherwise.
inline init_distribution parse_init_distribution(const std::string& name) {
    init_distribution v{};
    if (!enum_from_text(name, v))
        raise(codes::model_record_unknown_kind, "initializer distribution '" + name + "' is not known (" + enum_choices<init_distribution>() + ")");
    return v;
}

/// The initializer a method name and distribution name give (model files
/// store no initializer, so no earlier spelling needs reading).
inline initializer parse_initializer(const std::string& name, const std::string& distribution = "uniform") {
    return initializer{parse_init_scheme(name), parse_init_distribution(distribution), 0.0};
}

/// The variance a method aims for, given the fan-in and fan-out of the
/// weight matrix (0 for zeros and constant).
inline double init_variance(init_scheme s, std::size_t fan_in, std::size_t fan_out) noexcept {
    const double in = static_cast<double>(fan_in), out = static_cast<double>(fan_out);
    switch (s) {
    case init_scheme::glorot: return in + out > 0 ? 2.0 / (in + out) : 0.0;
    case init_scheme::he: return in > 0 ? 2.0 / in : 0.0;
    case init_scheme::lecun: return in > 0 ? 1.0 / in : 0.0;
    default: return 0.0;
    }
}

/// Fills `m` by the given method and distribution. fan_in and fan_out are those of the weight
/// matrix (inputs x outputs for a dense layer); the values are drawn in
/// row-major order, one engine draw (uniform) or one normal per element.
template <class T>
void initialize(matrix<T>& m, const initializer& init, std::size_t fan_in, std::size_t fan_out, random_engine& engine) {
    T* p = m.data();
    const std::size_t n = m.size();
    const double variance = init_variance(init.scheme, fan_in, fan_out);
    switch (init.scheme) {
    case init_scheme::zeros:
        for (std::size_t k = 0; k < n; ++k) p[k] = T(0);
        return;
    case init_scheme::constant:
        for (std::size_t k = 0; k < n; ++k) p[k] = static_cast<T>(init.value);
        return;
    case init_scheme::glorot:
    case init_scheme::he:
    case init_scheme::lecun: break;
    }
    if (init.distribution == init_distribution::uniform) {
        // Drawn in double and rounded once, so float and double weights
        // come from the same stream of numbers.
        const double a = std::sqrt(3.0 * variance);
        for (std::size_t k = 0; k < n; ++k) p[k] = static_cast<T>(engine.uniform<double>(-a, a));
    } else {
        const double stddev = std::sqrt(variance);
        for (std::size_t k = 0; k < n; ++k) p[k] = static_cast<T>(engine.normal<double>(0.0, stddev));
    }
}

TENON_NAMESPACE_END
