// tenon: the seeded random engine and tenon's own distributions.
//
// The standard library's distributions are implementation-defined (the same
// seed gives other numbers with libstdc++ and libc++), so tenon draws all its
// randomness (weights, shuffles, dropout masks, splits) from this engine and
// these distributions, specified bit for bit: xoshiro256** (Blackman & Vigna
// 2021) seeded by SplitMix64 (Steele, Lea & Flood 2014), top-bit uniform
// reals, bounded integers (Lemire 2019), polar normals (Marsaglia & Bray
// 1964), Fisher-Yates shuffles (Durstenfeld 1964). Full citations and how far
// results agree across platforms: docs/design/randomness.md.
#pragma once

#include <array>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <type_traits>
#include <utility>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {
// The 128-bit product a * b as its high and low 64-bit halves; from four
// 32-bit partial products where the compiler has no 128-bit integer (32-bit
// targets such as armhf). Both give the same bits.
inline std::uint64_t multiply_wide(std::uint64_t a, std::uint64_t b, std::uint64_t& high) noexcept {
#if defined(__SIZEOF_INT128__)
    __extension__ typedef unsigned __int128 uint128;
    const uint128 m = static_cast<uint128>(a) * b;
    high = static_cast<std::uint64_t>(m >> 64);
    return static_cast<std::uint64_t>(m);
#else
    const std::uint64_t a_low = a & 0xFFFFFFFFu, a_high = a >> 32, b_low = b & 0xFFFFFFFFu, b_high = b >> 32;
    const std::uint64_t low_low = a_low * b_low, high_low = a_high * b_low, low_high = a_low * b_high;
    const std::uint64_t middle = (low_low >> 32) + (high_low & 0xFFFFFFFFu) + (low_high & 0xFFFFFFFFu);
    high = a_high * b_high + (high_low >> 32) + (low_high >> 32) + (middle >> 32);
    return (middle << 32) | (low_low & 0xFFFFFFFFu);
#endif
}
}  // namespace detail

/// Complete state of a random_engine, for saving and resuming exactly.
struct random_state {
    std::array<std::uint64_t, 4> words{};
    double spare_normal = 0.0;
    bool has_spare_normal = false;
};

class random_engine {
public:
    /// Seeds the engine; different `stream` values give independent sequences
    /// for the same seed (used to give each consumer its own engine).
    explicit random_engine(std::uint64_t seed = 0, std::uint64_t stream = 0) noexcept { reseed(seed, stream); }

    void reseed(std::uint64_t seed, std::uint64_t stream = 0) noexcept {
        std::uint64_t x = seed ^ (stream * 0xD1B54A32D192ED03ull);
        for (auto& w : state_.words) w = splitmix64(x);
        state_.has_spare_normal = false;
        state_.spare_normal = 0.0;
    }

    /// Next 64 random bits (xoshiro256**).
    std::uint64_t next_u64() noexcept {
        auto& s = state_.words;
        const std::uint64_t result = rotl(s[1] * 5, 7) * 9;
        const std::uint64_t t = s[1] << 17;
        s[2] ^= s[0];
        s[3] ^= s[1];
        s[1] ^= s[2];
        s[0] ^= s[3];
        s[2] ^= t;
        s[3] = rotl(s[3], 45);
        return result;
    }

    /// Uniform in [0, 1).
    template <class T = double>
    T uniform01() noexcept {
        if constexpr (std::is_same_v<T, float>) {
            return static_cast<float>(next_u64() >> 40) * 0x1.0p-24f;
        } else {
            return static_cast<double>(next_u64() >> 11) * 0x1.0p-53;
        }
    }

    /// Uniform in [low, high) for low < high.
    template <class T = double>
    T uniform(T low, T high) noexcept {
        const T r = low + (high - low) * uniform01<T>();
        // u < 1, but low + (high - low) u can still round up to high (for
        // [1, 2) and u = 1 - 2^-53 the sum is a tie that rounds to even, 2);
        // the largest value below high keeps the bound open.
        return (r < high || !(low < high)) ? r : std::nextafter(high, low);
    }

    /// Uniform integer in [0, n); n must be positive.
    std::uint64_t below(std::uint64_t n) {
        if (n == 0) raise(codes::core_argument_invalid, "random_engine::below: the bound must be positive, got 0");
        // Lemire (2019), algorithm 5.
        std::uint64_t high = 0;
        std::uint64_t low = detail::multiply_wide(next_u64(), n, high);
        if (low < n) {
            const std::uint64_t threshold = (0 - n) % n;
            while (low < threshold) low = detail::multiply_wide(next_u64(), n, high);
        }
        return high;
    }

    /// Standard normal scaled to the given mean and standard deviation.
    template <class T = double>
    T normal(T mean = T(0), T stddev = T(1)) noexcept {
        return static_cast<T>(static_cast<double>(mean) + static_cast<double>(stddev) * standard_normal());
    }

    /// Shuffles [first, last) in place (random-access iterators).
    template <class It>
    void shuffle(It first, It last) {
        const auto n = static_cast<std::uint64_t>(last - first);
        for (std::uint64_t i = n; i > 1; --i) {
            const std::uint64_t j = below(i);
            using std::swap;
            swap(first[static_cast<std::ptrdiff_t>(i - 1)], first[static_cast<std::ptrdiff_t>(j)]);
        }
    }

    const random_state& state() const noexcept { return state_; }
    void set_state(const random_state& s) noexcept { state_ = s; }

private:
    static std::uint64_t rotl(std::uint64_t x, int k) noexcept { return (x << k) | (x >> (64 - k)); }

    static std::uint64_t splitmix64(std::uint64_t& x) noexcept {
        std::uint64_t z = (x += 0x9E3779B97F4A7C15ull);
        z = (z ^ (z >> 30)) * 0xBF58476D1CE4E5B9ull;
        z = (z ^ (z >> 27)) * 0x94D049BB133111EBull;
        return z ^ (z >> 31);
    }

    double standard_normal() noexcept {
        if (state_.has_spare_normal) {
            state_.has_spare_normal = false;
            return state_.spare_normal;
        }
        double u, v, s;
        do {
            u = 2.0 * uniform01<double>() - 1.0;
            v = 2.0 * uniform01<double>() - 1.0;
            s = u * u + v * v;
        } while (s >= 1.0 || s == 0.0);
        const double factor = std::sqrt(-2.0 * std::log(s) / s);
        state_.spare_normal = v * factor;
        state_.has_spare_normal = true;
        return u * factor;
    }

    random_state state_;
};

TENON_NAMESPACE_END
