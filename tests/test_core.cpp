// Tests of core/: errors and their registry, shapes, the random engine, gemm.
#include <doctest/doctest.h>

#include <algorithm>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <cstring>
#include <limits>
#include <numeric>
#include <set>
#include <string>
#include <vector>

#include <tenon/core/small_dense.hpp>
#include <tenon/tenon.hpp>

#include "chi_square.hpp"

namespace {

// Runs f, which must throw tenon::error, and returns the error.
template <class F>
tenon::error expect_error(F&& f) {
    try {
        f();
    } catch (const tenon::error& e) {
        return e;
    }
    FAIL("expected a tenon::error, nothing was thrown");
    return tenon::error("none", "none");
}

bool contains(const std::string& text, const std::string& part) { return text.find(part) != std::string::npos; }

// Multiplicative inverse of an odd number modulo 2^64 by Newton's iteration
// x <- x (2 - a x), which doubles the number of correct low bits per step
// (Dumas 2012, "On Newton-Raphson iteration for multiplicative inverses modulo
// prime powers"); a is its own inverse modulo 8, so 5 steps give 96 > 64 bits.
std::uint64_t inverse_mod_2_64(std::uint64_t a) {
    std::uint64_t x = a;
    for (int i = 0; i < 5; ++i) x *= 2 - a * x;
    return x;
}

std::uint64_t rotr(std::uint64_t x, int k) { return (x >> k) | (x << (64 - k)); }

// An engine state whose next xoshiro256** output is `output`: the output is
// rotl(s1 * 5, 7) * 9 (Blackman & Vigna 2021, section 4.2), so s1 follows by
// undoing the multiplication by 9, the rotation and the multiplication by 5.
tenon::random_state state_giving(std::uint64_t output) {
    tenon::random_state s;
    s.words = {1, rotr(output * inverse_mod_2_64(9), 7) * inverse_mod_2_64(5), 3, 4};
    return s;
}

}  // namespace

TEST_CASE("version macros and the inline namespace agree") {
    CHECK(std::string(tenon::version_string()) ==
          std::to_string(TENON_VERSION_MAJOR) + "." + std::to_string(TENON_VERSION_MINOR) + "." + std::to_string(TENON_VERSION_PATCH));
    CHECK(tenon::version_number() == TENON_VERSION_MAJOR * 10000 + TENON_VERSION_MINOR * 100 + TENON_VERSION_PATCH);
    // The inline namespace is reachable by its own name too (this line
    // compiles only if TENON_ABI_NAMESPACE names the namespace tenon:: opens).
    CHECK(std::string(tenon::TENON_ABI_NAMESPACE::version_string()) == TENON_VERSION_STRING);
}

TEST_CASE("error codes are unique and well-formed") {
    std::set<std::string> seen;
    for (auto* e = tenon::error_registry_begin(); e != tenon::error_registry_end(); ++e) {
        const std::string code = e->code;
        CHECK_MESSAGE(seen.insert(code).second, "duplicate code " << code);
        CHECK_MESSAGE(code.find('.') != std::string::npos, "code without an area: " << code);
        CHECK(std::strlen(e->meaning) > 0);
    }
    CHECK(seen.count("core.shape.mismatch") == 1);
    CHECK(seen.count("core.argument.invalid") == 1);
    CHECK(seen.count("autodiff.non_finite") == 1);
}

TEST_CASE("tenon::error carries its code and prefixes what() with it") {
    const tenon::error e = expect_error([] { tenon::raise(tenon::codes::core_argument_invalid, "widget 3: bad"); });
    CHECK(e.code() == "core.argument.invalid");
    CHECK(std::string(e.what()) == "[core.argument.invalid] widget 3: bad");
}

TEST_CASE("a tenon::error message stays on one line whatever it quotes: control characters are escaped") {
    // A cell holding CR, LF, NUL, a tab, ESC and DEL, as a CSV field may.
    const std::string cell = std::string("a\r\nb") + '\0' + "c\td\x1b" + '\x7f' + "\xc3\xa9";
    const tenon::error e = expect_error([&] { tenon::raise(tenon::codes::core_argument_invalid, "cell '" + cell + "'"); });
    const std::string what = e.what();
    CHECK(what == "[core.argument.invalid] cell 'a\\r\\nb\\0c\\td\\x1b\\x7f\xc3\xa9'");  // UTF-8 (é) kept
    CHECK(std::none_of(what.begin(), what.end(), [](char c) { return static_cast<unsigned char>(c) < 0x20 || c == 0x7f; }));
    CHECK(tenon::escape_control_characters("plain text") == "plain text");
}

// ---------------------------------------------------------------------------
// shapes and matrices

TEST_CASE_TEMPLATE("make_matrix fills row-major and rejects ragged rows", T, float, double) {
    const auto m = tenon::make_matrix<T>({{T(1), T(2), T(3)}, {T(4), T(5), T(6)}});
    CHECK(tenon::shape_of(m) == tenon::shape2{2, 3});
    CHECK(m(1, 0) == T(4));
    CHECK(m.data()[5] == T(6));

    const tenon::error e = expect_error([] { tenon::make_matrix<T>({{T(1), T(2)}, {T(3)}}); });
    CHECK(e.code() == "core.shape.mismatch");
    CHECK(contains(e.what(), "row 1"));
    CHECK(contains(e.what(), "expected 2 values, got 1"));
}

TEST_CASE("require_shape names the operand and both shapes") {
    CHECK_NOTHROW(tenon::require_shape({2, 3}, {2, 3}, "x"));
    const tenon::error e = expect_error([] { tenon::require_shape({4, 5}, {2, 3}, "pump sensor batch"); });
    CHECK(e.code() == "core.shape.mismatch");
    CHECK(contains(e.what(), "pump sensor batch"));
    CHECK(contains(e.what(), "expected shape 2x3"));
    CHECK(contains(e.what(), "got 4x5"));
}

TEST_CASE_TEMPLATE("ensure_shape keeps the buffer when the shape holds; copy_into reuses it", T, float, double) {
    tenon::matrix<T> m({3, 4});
    const T* before = m.data();
    tenon::ensure_shape(m, {3, 4});
    CHECK(m.data() == before);
    tenon::ensure_shape(m, {2, 5});
    CHECK(tenon::shape_of(m) == tenon::shape2{2, 5});

    const auto src = tenon::make_matrix<T>({{T(1), T(2)}, {T(3), T(4)}});
    tenon::matrix<T> dst({2, 2});
    const T* dst_buffer = dst.data();
    tenon::copy_into(dst, src);
    CHECK(dst.data() == dst_buffer);
    CHECK(dst(1, 1) == T(4));
    CHECK(tenon::to_string(tenon::shape2{7, 1}) == "7x1");
    CHECK(tenon::shape2{2, 3}.size() == 6);
    CHECK(tenon::shape2{2, 3} != tenon::shape2{3, 2});
}

// ---------------------------------------------------------------------------
// random_engine. Expected values were computed with an independent Python
// implementation of SplitMix64 (Steele, Lea & Flood 2014, fig. 3) and
// xoshiro256** (Blackman & Vigna 2021, fig. 1 / the authors' reference C code)
// written for this test from the published algorithms, not from tenon's code:
// tests/tools/random_reference.py (run `python3 tests/tools/random_reference.py`;
// it prints each value and fails if one differs; ctest runs it as
// tenon_random_reference when python3 is installed).

TEST_CASE("SplitMix64 seeding matches the reference value for state 0") {
    // SplitMix64's first output from state 0 is 0xE220A8397B1DCDAF (from
    // memory; confirmed by the independent Python implementation). Seed 0 and
    // stream 0 start SplitMix64 at 0, so it is the engine's first state word.
    const tenon::random_engine rng(0);
    CHECK(rng.state().words[0] == 0xE220A8397B1DCDAFull);
    CHECK(rng.state().words[1] == 0x6E789E6AA1B965F4ull);
    CHECK(rng.state().words[2] == 0x06C45D188009454Full);
    CHECK(rng.state().words[3] == 0xF88BB8A8724C81ECull);
}

TEST_CASE("random_engine is bit-identical to the reference for fixed seeds and streams") {
    tenon::random_engine a(0);
    CHECK(a.next_u64() == 0x99EC5F36CB75F2B4ull);
    CHECK(a.next_u64() == 0xBF6E1F784956452Aull);
    CHECK(a.next_u64() == 0x1A5F849D4933E6E0ull);
    CHECK(a.next_u64() == 0x6AA594F1262D2D2Cull);

    tenon::random_engine b(42);
    CHECK(b.next_u64() == 0x15780B2E0C2EC716ull);
    CHECK(b.next_u64() == 0x6104D9866D113A7Eull);

    tenon::random_engine c(42, 1);  // another stream of the same seed
    CHECK(c.next_u64() == 0x0030425E2A3DC334ull);
    CHECK(c.next_u64() == 0x057E19F0156C8A6Bull);

    tenon::random_engine d(2024);
    CHECK(d.uniform01<double>() == 0.055792889110163335);
    CHECK(d.uniform01<double>() == 0.782103772866755);
    tenon::random_engine e(2024);
    CHECK(e.uniform01<float>() == 936049.0f * 0x1.0p-24f);
    CHECK(e.uniform01<float>() == 13121523.0f * 0x1.0p-24f);

    tenon::random_engine f(7);
    const std::uint64_t expected_below_10[] = {7, 2, 8, 9, 9, 8, 0, 1, 4, 1};
    for (std::uint64_t v : expected_below_10) CHECK(f.below(10) == v);
    tenon::random_engine g(7);
    CHECK(g.below(3ull << 62) == 9692516303121356995ull);
    CHECK(g.below(3ull << 62) == 3856539442751087005ull);

    // reseed() returns to the start of a sequence.
    a.reseed(0);
    CHECK(a.next_u64() == 0x99EC5F36CB75F2B4ull);
}

TEST_CASE_TEMPLATE("uniform01 stays in [0, 1), even for the largest draw", T, float, double) {
    tenon::random_engine rng(11);
    double total = 0.0;
    const int draws = 100000;
    for (int i = 0; i < draws; ++i) {
        const T u = rng.uniform01<T>();
        REQUIRE(u >= T(0));
        REQUIRE(u < T(1));
        total += static_cast<double>(u);
    }
    // Mean of U(0,1) is 1/2 with standard deviation sqrt(1/12 / n) ~ 0.0009;
    // 0.005 is more than five standard deviations.
    CHECK(std::abs(total / draws - 0.5) < 0.005);

    // All-ones output bits: the largest value below 1.
    rng.set_state(state_giving(~std::uint64_t(0)));
    const T top = rng.uniform01<T>();
    CHECK(top < T(1));
    CHECK(top == std::nextafter(T(1), T(0)));
    rng.set_state(state_giving(0));
    CHECK(rng.uniform01<T>() == T(0));
}

TEST_CASE_TEMPLATE("uniform(low, high) never returns high, even when rounding would reach it", T, float, double) {
    // low + (high - low) * u with u = 1 - 2^-p rounds to high for [1, 2) in
    // round-to-nearest-even; the engine must still honour the open bound.
    tenon::random_engine rng;
    rng.set_state(state_giving(~std::uint64_t(0)));
    const T v = rng.uniform<T>(T(1), T(2));
    CHECK(v < T(2));
    CHECK(v >= T(1));
    rng.set_state(state_giving(~std::uint64_t(0)));
    const T w = rng.uniform<T>(T(-3), T(5));
    CHECK(w < T(5));
    rng.set_state(state_giving(0));
    CHECK(rng.uniform<T>(T(-3), T(5)) == T(-3));
}

TEST_CASE("below(n) is in range and unbiased") {
    tenon::random_engine rng(99);
    CHECK(rng.below(1) == 0);

    // Pearson's chi-square goodness-of-fit over 10 equally likely values
    // (Pearson 1900). 9 degrees of freedom: the 0.1% critical value, computed
    // by tests/chi_square.hpp; chi-square tables give 27.877 (from memory,
    // e.g. the NIST/SEMATECH e-Handbook of Statistical Methods, section
    // 1.3.6.7.4), which the computed value must round to.
    const double critical_9 = chi_square::upper_quantile(9, 0.001);
    CHECK(critical_9 == doctest::Approx(27.877).epsilon(2e-5));
    const std::size_t bins = 10, draws = 200000;
    std::vector<double> counts(bins, 0.0);
    for (std::size_t i = 0; i < draws; ++i) {
        const std::uint64_t v = rng.below(bins);
        REQUIRE(v < bins);
        counts[static_cast<std::size_t>(v)] += 1.0;
    }
    const double expected = static_cast<double>(draws) / static_cast<double>(bins);
    double chi2 = 0.0;
    for (double c : counts) chi2 += (c - expected) * (c - expected) / expected;
    CHECK(chi2 < critical_9);

    // A bound near 2^64 exposes the bias of the modulo method: with
    // n = 3 * 2^62, x mod n puts half of all draws in [0, 2^62). An unbiased
    // method gives each third of [0, n) probability 1/3. Two degrees of
    // freedom: the 0.1% critical value is -2 ln(0.001) = 13.816 (Q(1, z) =
    // e^(-z) in tests/chi_square.hpp).
    const double critical_2 = chi_square::upper_quantile(2, 0.001);
    CHECK(critical_2 == doctest::Approx(-2.0 * std::log(0.001)).epsilon(1e-12));
    const std::uint64_t n = 3ull << 62;
    const std::size_t big_draws = 30000;
    double thirds[3] = {0.0, 0.0, 0.0};
    for (std::size_t i = 0; i < big_draws; ++i) {
        const std::uint64_t v = rng.below(n);
        REQUIRE(v < n);
        thirds[v >> 62] += 1.0;
    }
    const double third = static_cast<double>(big_draws) / 3.0;
    double chi2_thirds = 0.0;
    for (double c : thirds) chi2_thirds += (c - third) * (c - third) / third;
    CHECK(chi2_thirds < critical_2);

    const tenon::error e = expect_error([&] { rng.below(0); });
    CHECK(e.code() == "core.argument.invalid");
    CHECK(contains(e.what(), "got 0"));
}

TEST_CASE_TEMPLATE("normal draws have the requested mean and variance", T, float, double) {
    tenon::random_engine rng(5);
    const int draws = 200000;
    double sum = 0.0, sum_sq = 0.0;
    for (int i = 0; i < draws; ++i) {
        const double x = static_cast<double>(rng.normal<T>(T(3), T(2)));
        sum += x;
        sum_sq += x * x;
    }
    const double mean = sum / draws;
    const double variance = sum_sq / draws - mean * mean;
    // Standard error of the mean: 2 / sqrt(n) ~ 0.0045; of the variance:
    // 4 sqrt(2 / n) ~ 0.013 (normal sampling theory). Tolerances are ~6 of them.
    CHECK(std::abs(mean - 3.0) < 0.03);
    CHECK(std::abs(variance - 4.0) < 0.08);
}

TEST_CASE("shuffle is a deterministic permutation") {
    std::vector<int> a(10);
    std::iota(a.begin(), a.end(), 0);
    tenon::random_engine rng(5);
    rng.shuffle(a.begin(), a.end());
    // From the independent Python implementation (Durstenfeld's form).
    const std::vector<int> expected = {1, 0, 4, 9, 6, 3, 7, 8, 5, 2};
    CHECK(a == expected);

    std::vector<int> big(1000), again(1000);
    std::iota(big.begin(), big.end(), 0);
    std::iota(again.begin(), again.end(), 0);
    tenon::random_engine r1(77), r2(77);
    r1.shuffle(big.begin(), big.end());
    r2.shuffle(again.begin(), again.end());
    CHECK(big == again);
    std::vector<int> sorted = big;
    std::sort(sorted.begin(), sorted.end());
    std::vector<int> identity(1000);
    std::iota(identity.begin(), identity.end(), 0);
    CHECK(sorted == identity);
    CHECK(big != identity);

    std::vector<int> empty;
    rng.shuffle(empty.begin(), empty.end());
    std::vector<int> one = {4};
    rng.shuffle(one.begin(), one.end());
    CHECK(one == std::vector<int>{4});
}

TEST_CASE("state() and set_state() resume a sequence exactly, including a pending normal") {
    tenon::random_engine rng(123);
    rng.next_u64();
    rng.normal<double>();  // the polar method leaves its second value pending
    REQUIRE(rng.state().has_spare_normal);
    const tenon::random_state saved = rng.state();

    std::vector<double> first;
    for (int i = 0; i < 5; ++i) first.push_back(rng.normal<double>());
    for (int i = 0; i < 5; ++i) first.push_back(rng.uniform01<double>());
    first.push_back(static_cast<double>(rng.below(1000)));

    tenon::random_engine other(999);
    other.set_state(saved);
    std::vector<double> second;
    for (int i = 0; i < 5; ++i) second.push_back(other.normal<double>());
    for (int i = 0; i < 5; ++i) second.push_back(other.uniform01<double>());
    second.push_back(static_cast<double>(other.below(1000)));
    CHECK(first == second);

    // reseed() drops a pending normal, so a fresh seed gives a fresh sequence.
    other.reseed(123);
    CHECK_FALSE(other.state().has_spare_normal);
}

// ---------------------------------------------------------------------------
// gemm against a naive triple loop: C = alpha op(A) op(B) + beta C.

namespace {

template <class T>
std::vector<T> random_buffer(tenon::random_engine& rng, std::size_t n) {
    std::vector<T> v(n);
    for (auto& x : v) x = rng.uniform<T>(T(-1), T(1));
    return v;
}

template <class T>
void naive_gemm(bool ta, bool tb, std::size_t m, std::size_t n, std::size_t k, T alpha, const std::vector<T>& a, std::size_t lda,
                const std::vector<T>& b, std::size_t ldb, T beta, std::vector<T>& c, std::size_t ldc) {
    for (std::size_t i = 0; i < m; ++i) {
        for (std::size_t j = 0; j < n; ++j) {
            double acc = 0.0;
            for (std::size_t p = 0; p < k; ++p) {
                const double aip = static_cast<double>(ta ? a[p * lda + i] : a[i * lda + p]);
                const double bpj = static_cast<double>(tb ? b[j * ldb + p] : b[p * ldb + j]);
                acc += aip * bpj;
            }
            c[i * ldc + j] = static_cast<T>(static_cast<double>(alpha) * acc + static_cast<double>(beta) * static_cast<double>(c[i * ldc + j]));
        }
    }
}

}  // namespace

TEST_CASE_TEMPLATE("gemm matches a naive triple loop for all transpose cases and padded strides", T, float, double) {
    tenon::random_engine rng(31);
    const double tolerance = std::is_same_v<T, float> ? 1e-5 : 1e-13;
    const std::size_t sizes[][3] = {{3, 5, 4}, {1, 1, 1}, {1, 7, 3}, {6, 1, 2}, {4, 3, 1}, {5, 2, 9}};
    for (const auto& sz : sizes) {
        const std::size_t m = sz[0], n = sz[1], k = sz[2];
        for (int mode = 0; mode < 4; ++mode) {
            const bool ta = (mode & 1) != 0, tb = (mode & 2) != 0;
            // Stored shapes, with 2 extra columns of padding in each buffer.
            const std::size_t a_rows = ta ? k : m, a_cols = ta ? m : k;
            const std::size_t b_rows = tb ? n : k, b_cols = tb ? k : n;
            const std::size_t lda = a_cols + 2, ldb = b_cols + 2, ldc = n + 2;
            const auto a = random_buffer<T>(rng, a_rows * lda);
            const auto b = random_buffer<T>(rng, b_rows * ldb);
            const auto c0 = random_buffer<T>(rng, m * ldc);
            for (T beta : {T(0), T(1), T(-0.5)}) {
                const T alpha = T(1.25);
                std::vector<T> c = c0, expected = c0;
                tenon::gemm<T>(ta, tb, m, n, k, alpha, a.data(), lda, b.data(), ldb, beta, c.data(), ldc);
                naive_gemm<T>(ta, tb, m, n, k, alpha, a, lda, b, ldb, beta, expected, ldc);
                for (std::size_t i = 0; i < m; ++i) {
                    for (std::size_t j = 0; j < ldc; ++j) {
                        const std::size_t idx = i * ldc + j;
                        if (j >= n) {
                            CHECK(c[idx] == c0[idx]);  // padding untouched
                        } else {
                            CHECK_MESSAGE(std::abs(static_cast<double>(c[idx] - expected[idx])) <=
                                              tolerance * (1.0 + std::abs(static_cast<double>(expected[idx]))),
                                          "m=" << m << " n=" << n << " k=" << k << " ta=" << ta << " tb=" << tb << " beta=" << beta);
                        }
                    }
                }
            }
        }
    }
}

TEST_CASE_TEMPLATE("gemm across its block and tile edges stays within the dot-product rounding bound", T, float, double) {
    // The blocked kernel packs kc = 256 deep, mc = 64 rows and nc = 512
    // columns at a time into 4-row x 32-column tiles; results with fewer
    // than 4 rows or 8 (float) / 4 (double) columns take unpacked loops.
    // These shapes cross each of those edges with sizes that are not
    // multiples of them.
    // Bound: |fl(x.y) - x.y| <= gamma_k |x|.|y|, gamma_k = k u / (1 - k u)
    // (Higham 2002, "Accuracy and Stability of Numerical Algorithms", 2nd ed.,
    // section 3.1, eq. 3.5), whatever the summation order; two more rounding
    // steps for alpha and beta give gamma_{k+2}.
    tenon::random_engine rng(47);
    const double unit_roundoff = static_cast<double>(std::numeric_limits<T>::epsilon()) / 2.0;
    const std::size_t sizes[][3] = {{13, 21, 35}, {70, 9, 7}, {5, 530, 3}, {6, 10, 300}, {3, 40, 20}, {20, 3, 20}, {1, 9, 17}, {68, 516, 2}};
    for (const auto& sz : sizes) {
        const std::size_t m = sz[0], n = sz[1], k = sz[2];
        const double gamma = static_cast<double>(k + 2) * unit_roundoff / (1.0 - static_cast<double>(k + 2) * unit_roundoff);
        for (int mode = 0; mode < 4; ++mode) {
            const bool ta = (mode & 1) != 0, tb = (mode & 2) != 0;
            const std::size_t a_rows = ta ? k : m, a_cols = ta ? m : k;
            const std::size_t b_rows = tb ? n : k, b_cols = tb ? k : n;
            const std::size_t lda = a_cols + 1, ldb = b_cols + 3, ldc = n + 1;
            const auto a = random_buffer<T>(rng, a_rows * lda);
            const auto b = random_buffer<T>(rng, b_rows * ldb);
            const auto c0 = random_buffer<T>(rng, m * ldc);
            const T alpha = T(-0.75), beta = T(0.5);
            std::vector<T> c = c0, expected = c0;
            tenon::gemm<T>(ta, tb, m, n, k, alpha, a.data(), lda, b.data(), ldb, beta, c.data(), ldc);
            naive_gemm<T>(ta, tb, m, n, k, alpha, a, lda, b, ldb, beta, expected, ldc);
            std::size_t outside = 0, padding_changed = 0;
            for (std::size_t i = 0; i < m; ++i) {
                for (std::size_t j = 0; j < ldc; ++j) {
                    const std::size_t idx = i * ldc + j;
                    if (j >= n) {
                        padding_changed += c[idx] != c0[idx];
                        continue;
                    }
                    double magnitude = 0.0;  // |alpha| |a_i|.|b_j| + |beta c0|
                    for (std::size_t p = 0; p < k; ++p) {
                        magnitude += std::abs(static_cast<double>(ta ? a[p * lda + i] : a[i * lda + p]) *
                                              static_cast<double>(tb ? b[j * ldb + p] : b[p * ldb + j]));
                    }
                    magnitude = std::abs(static_cast<double>(alpha)) * magnitude + std::abs(static_cast<double>(beta * c0[idx]));
                    // + one rounding of the double reference to T
                    const double bound = gamma * magnitude + unit_roundoff * std::abs(static_cast<double>(expected[idx]));
                    outside += std::abs(static_cast<double>(c[idx]) - static_cast<double>(expected[idx])) > bound;
                }
            }
            CHECK_MESSAGE(outside == 0, "m=" << m << " n=" << n << " k=" << k << " ta=" << ta << " tb=" << tb);
            CHECK_MESSAGE(padding_changed == 0, "m=" << m << " n=" << n << " k=" << k << " ta=" << ta << " tb=" << tb);
        }
    }
}

TEST_CASE_TEMPLATE("gemm with beta = 0 ignores NaN and infinity already in C", T, float, double) {
    const auto a = tenon::make_matrix<T>({{T(1), T(2)}, {T(3), T(4)}});
    const auto b = tenon::make_matrix<T>({{T(5), T(6)}, {T(7), T(8)}});
    tenon::matrix<T> c({2, 2});
    c.fill(std::numeric_limits<T>::quiet_NaN());
    c(1, 1) = std::numeric_limits<T>::infinity();
    tenon::gemm<T>(false, false, 2, 2, 2, T(1), a.data(), 2, b.data(), 2, T(0), c.data(), 2);
    // [1 2; 3 4] [5 6; 7 8] = [19 22; 43 50]
    CHECK(c(0, 0) == T(19));
    CHECK(c(0, 1) == T(22));
    CHECK(c(1, 0) == T(43));
    CHECK(c(1, 1) == T(50));

    // k = 0: the product is empty, so C becomes beta C (here zero, not NaN).
    c.fill(std::numeric_limits<T>::quiet_NaN());
    tenon::gemm<T>(false, false, 2, 2, 0, T(1), a.data(), 1, b.data(), 2, T(0), c.data(), 2);
    for (std::size_t i = 0; i < 4; ++i) CHECK(c.data()[i] == T(0));
}

TEST_CASE_TEMPLATE("thin products give the plain loop's bits on every vector width", T, float, double) {
    // A product thinner than a register tile (a single row to predict, a few
    // rows) runs the unpacked row loop, vectorized at run time on x86; each
    // element must still be the plain loop's sum of rounded products, added
    // in order, so the result does not depend on the CPU. Column counts
    // cover every vector tail of both widths.
    tenon::random_engine rng(41);
    const auto plain = [](bool ta, std::size_t m, std::size_t n, std::size_t k, T alpha, const std::vector<T>& a, std::size_t lda,
                          const std::vector<T>& b, std::size_t ldb, std::vector<T>& c, std::size_t ldc) {
        for (std::size_t i = 0; i < m; ++i)
            for (std::size_t p = 0; p < k; ++p) {
                const T s = alpha * (ta ? a[p * lda + i] : a[i * lda + p]);
                for (std::size_t j = 0; j < n; ++j) c[i * ldc + j] += s * b[p * ldb + j];
            }
    };
    const auto filled = [&](std::size_t size) {
        std::vector<T> v(size);
        for (auto& x : v) x = rng.normal(T(0), T(1));
        return v;
    };
    for (const std::size_t n : std::vector<std::size_t>{8, 15, 16, 17, 31, 32, 33, 47, 64, 65, 100, 129, 200}) {
        for (const std::size_t k : std::vector<std::size_t>{1, 7, 32}) {
            for (const std::size_t m : std::vector<std::size_t>{1, 3}) {
                for (const bool ta : {false, true}) {
                    if (n < tenon::detail::thin_columns<T>) continue;
                    CAPTURE(n);
                    CAPTURE(k);
                    CAPTURE(m);
                    CAPTURE(ta);
                    const std::size_t lda = (ta ? m : k) + 1, ldb = n + 2, ldc = n + 3;
                    const auto a = filled((ta ? k : m) * lda), b = filled(k * ldb), c0 = filled(m * ldc);
                    const T alpha = T(-0.625);
                    std::vector<T> expected = c0, c = c0;
                    plain(ta, m, n, k, alpha, a, lda, b, ldb, expected, ldc);
                    tenon::gemm<T>(ta, false, m, n, k, alpha, a.data(), lda, b.data(), ldb, T(1), c.data(), ldc);
                    CHECK(std::memcmp(c.data(), expected.data(), c.size() * sizeof(T)) == 0);
#if TENON_SIMD_X86
                    // Both vector versions directly (gemm takes the widest).
                    const T* ai = a.data();
                    const std::size_t a_step = ta ? lda : 1;
                    if (tenon::cpu_has_avx512f()) {
                        std::vector<T> row(c0.begin(), c0.begin() + static_cast<std::ptrdiff_t>(n));
                        tenon::detail::combine_rows_avx512(ai, a_step, alpha, b.data(), ldb, k, row.data(), n);
                        CHECK(std::memcmp(row.data(), expected.data(), n * sizeof(T)) == 0);
                    }
                    if (tenon::cpu_has_avx2_fma()) {
                        std::vector<T> row(c0.begin(), c0.begin() + static_cast<std::ptrdiff_t>(n));
                        tenon::detail::combine_rows_avx2(ai, a_step, alpha, b.data(), ldb, k, row.data(), n);
                        CHECK(std::memcmp(row.data(), expected.data(), n * sizeof(T)) == 0);
                    }
#elif TENON_SIMD_NEON64
                    std::vector<T> row(c0.begin(), c0.begin() + static_cast<std::ptrdiff_t>(n));
                    tenon::detail::combine_rows_neon(a.data(), ta ? lda : 1, alpha, b.data(), ldb, k, row.data(), n);
                    CHECK(std::memcmp(row.data(), expected.data(), n * sizeof(T)) == 0);
#endif
                }
            }
        }
    }
}

TEST_CASE_TEMPLATE("small dense layers give gemm's sum with the finish applied in order, on every version", T, float, double) {
    // core/small_dense.hpp: y = finish(x W) must be gemm's x W, then + bias,
    // zero if tiny, relu, addend + y, zero if tiny, each rounded on its own.
    // Where gemm takes the unpacked loops (few rows, or few columns) the sum
    // must also be the plain loop's (or split_dot's) in order, never fused:
    // a kernel that used a fused multiply-add or summed in another order
    // would differ from `plain` in the last bits of some of these values.
    tenon::random_engine rng(43);
    const auto filled = [&](std::size_t size, T scale) {
        std::vector<T> v(size);
        for (auto& x : v) x = rng.normal(T(0), T(1)) * scale;
        return v;
    };
    const auto tiny = [](T v) { return std::abs(v) < std::numeric_limits<T>::min() ? T(0) : v; };
    // The plain loop of gemm_unpacked (n >= thin_columns) or its split_dot (n < thin_columns).
    const auto plain = [&](std::size_t rows, std::size_t n, std::size_t k, const std::vector<T>& x, const std::vector<T>& w) {
        std::vector<T> y(rows * n, T(0));
        for (std::size_t i = 0; i < rows; ++i)
            for (std::size_t j = 0; j < n; ++j) {
                T c = T(0);
                if (n >= tenon::detail::thin_columns<T>) {
                    for (std::size_t p = 0; p < k; ++p) c += x[i * k + p] * w[p * n + j];
                } else {
                    T partial[8] = {};
                    std::size_t p = 0;
                    for (; p + 8 <= k; p += 8)
                        for (std::size_t q = 0; q < 8; ++q) partial[q] += x[i * k + p + q] * w[(p + q) * n + j];
                    for (; p < k; ++p) partial[0] += x[i * k + p] * w[p * n + j];
                    T sum = T(0);
                    for (T q : partial) sum += q;
                    c += sum;
                }
                y[i * n + j] = c;
            }
        return y;
    };
    std::vector<tenon::detail::small_dense_version> versions;
    for (auto v : {tenon::detail::small_dense_version::portable, tenon::detail::small_dense_version::avx2, tenon::detail::small_dense_version::avx512,
                   tenon::detail::small_dense_version::neon})
        if (tenon::detail::small_dense_version_available(v)) versions.push_back(v);
    const T small_scale = std::sqrt(std::numeric_limits<T>::min());  // products near the smallest normal
    for (const std::size_t n : std::vector<std::size_t>{1, 3, 7, 8, 15, 16, 17, 32, 33, 48, 64, 65}) {
        for (const std::size_t k : std::vector<std::size_t>{1, 7, 8, 32, 33}) {
            for (const int variant : {0, 1, 2}) {
                CAPTURE(n);
                CAPTURE(k);
                CAPTURE(variant);
                // 0: bias and relu; 1: addend, no bias; 2: sums near the subnormal range, relu.
                const T scale = variant == 2 ? small_scale : T(1);
                const std::size_t most = 64;
                const auto x = filled(most * k, scale), w = filled(k * n, scale), bias = filled(n, T(1)), addend = filled(most * n, T(1));
                std::vector<T> wt(n * k);
                for (std::size_t j = 0; j < n; ++j)
                    for (std::size_t p = 0; p < k; ++p) wt[j * k + p] = w[p * n + j];
                tenon::detail::dense_finish<T> f;
                f.bias = variant == 0 ? bias.data() : nullptr;
                f.relu = variant != 1;
                f.addend = variant == 1 ? addend.data() : nullptr;
                const auto finished = [&](std::vector<T> y, std::size_t rows) {
                    for (std::size_t i = 0; i < rows; ++i)
                        for (std::size_t j = 0; j < n; ++j) {
                            T v = y[i * n + j];
                            if (f.bias) v = v + f.bias[j];
                            v = tiny(v);
                            if (f.relu) v = v > T(0) ? v : T(0);
                            if (f.addend) v = tiny(f.addend[i * n + j] + v);
                            y[i * n + j] = v;
                        }
                    return y;
                };
                for (const std::size_t rows : std::vector<std::size_t>{1, 3, 4, 8, 9, 64}) {
                    CAPTURE(rows);
                    // gemm's own sum is the reference for any row count.
                    std::vector<T> sum(rows * n, T(7));
                    tenon::gemm<T>(false, false, rows, n, k, T(1), x.data(), k, w.data(), n, T(0), sum.data(), n);
                    const auto expected = finished(sum, rows);
                    std::vector<T> y(rows * n, T(-3));
                    tenon::detail::dense_rows<T>(rows, k, n, x.data(), w.data(), wt.data(), f, y.data());
                    CHECK(std::memcmp(y.data(), expected.data(), y.size() * sizeof(T)) == 0);
                    if (rows >= tenon::detail::always_thin_rows<T> && n >= tenon::detail::thin_columns<T>) continue;
                    // The unpacked loops: the plain order, on every version.
                    const auto in_order = finished(plain(rows, n, k, x, w), rows);
                    CHECK(std::memcmp(expected.data(), in_order.data(), y.size() * sizeof(T)) == 0);
                    for (const auto version : versions) {
                        CAPTURE(static_cast<int>(version));
                        std::vector<T> z(rows * n, T(-3));
                        tenon::detail::small_dense<T>(rows, k, n, x.data(), w.data(), wt.data(), f, z.data(), version);
                        CHECK(std::memcmp(z.data(), in_order.data(), z.size() * sizeof(T)) == 0);
                        // A one-row call's kernel fixed by width (the predictor's row program).
                        const auto kernel = tenon::detail::fixed_row_kernel<T>(n, version);
                        if (rows != 1 || kernel == nullptr) continue;
                        std::vector<T> one(n, T(-3));
                        kernel(x.data(), n == 1 ? wt.data() : w.data(), k, f.bias, f.relu, f.addend, one.data());
                        CHECK(std::memcmp(one.data(), in_order.data(), one.size() * sizeof(T)) == 0);
                    }
                }
            }
        }
    }
}

TEST_CASE_TEMPLATE("a group of small dense products gives each product's bits in the plain order, on every version", T, float, double) {
    // dense_group (core/small_dense.hpp) runs several products side by side:
    // up to four rows of the row loop in one loop over k, and split_dot for
    // several (row, column) pairs with their partial sums transposed. Each
    // value must still be the plain loop's (n >= thin_columns) or
    // split_dot's (n < thin_columns) in order, each product and sum rounded
    // on its own: a kernel that fused a multiply and an add, or added the
    // partial sums in another order, would differ in the last bits of some
    // of these values (`fused` below checks that such a kernel would).
    tenon::random_engine rng(45);
    const auto filled = [&](std::size_t size, T scale) {
        std::vector<T> v(size);
        for (auto& x : v) x = rng.normal(T(0), T(1)) * scale;
        return v;
    };
    const auto tiny = [](T v) { return std::abs(v) < std::numeric_limits<T>::min() ? T(0) : v; };
    // One output of one row: the row loop or split_dot, or (fused) the same
    // terms with fused multiply-adds.
    const auto plain = [](const T* x, const T* w, std::size_t stride, std::size_t k, bool thin, bool fused) {
        T c = T(0);
        if (!thin) {
            for (std::size_t p = 0; p < k; ++p) c = fused ? std::fma(x[p], w[p * stride], c) : c + x[p] * w[p * stride];
            return c;
        }
        T partial[8] = {};
        std::size_t p = 0;
        for (; p + 8 <= k; p += 8)
            for (std::size_t q = 0; q < 8; ++q)
                partial[q] = fused ? std::fma(x[p + q], w[(p + q) * stride], partial[q]) : partial[q] + x[p + q] * w[(p + q) * stride];
        for (; p < k; ++p) partial[0] = fused ? std::fma(x[p], w[p * stride], partial[0]) : partial[0] + x[p] * w[p * stride];
        T sum = T(0);
        for (T q : partial) sum += q;
        return c + sum;
    };
    std::vector<tenon::detail::small_dense_version> versions;
    for (auto v : {tenon::detail::small_dense_version::portable, tenon::detail::small_dense_version::avx2, tenon::detail::small_dense_version::avx512,
                   tenon::detail::small_dense_version::neon})
        if (tenon::detail::small_dense_version_available(v)) versions.push_back(v);
    const T small_scale = std::sqrt(std::numeric_limits<T>::min());
    std::size_t fused_differs = 0;
    for (const std::size_t n : std::vector<std::size_t>{1, 3, 7, 8, 16, 17, 32, 33, 65}) {
        for (const std::size_t k : std::vector<std::size_t>{1, 8, 9, 32, 33}) {
            for (const std::size_t count : std::vector<std::size_t>{1, 2, 3, 5, 8}) {
                for (const std::size_t rows : std::vector<std::size_t>{1, 2, 9, 37}) {
                    const int variant = static_cast<int>((n + k + count + rows) % 3);
                    CAPTURE(n);
                    CAPTURE(k);
                    CAPTURE(count);
                    CAPTURE(rows);
                    CAPTURE(variant);
                    // 0: bias and relu; 1: addend, no bias; 2: sums near the subnormal range, relu.
                    const T scale = variant == 2 ? small_scale : T(1);
                    std::vector<std::vector<T>> x, w, wt, bias, addend;
                    std::vector<std::vector<T>> expected, y;
                    const bool thin = n < tenon::detail::thin_columns<T>;
                    for (std::size_t g = 0; g < count; ++g) {
                        x.push_back(filled(rows * k, scale));
                        w.push_back(filled(k * n, scale));
                        bias.push_back(filled(n, T(1)));
                        addend.push_back(filled(rows * n, T(1)));
                        wt.emplace_back(n * k);
                        for (std::size_t j = 0; j < n; ++j)
                            for (std::size_t p = 0; p < k; ++p) wt[g][j * k + p] = w[g][p * n + j];
                        std::vector<T> e(rows * n);
                        for (std::size_t i = 0; i < rows; ++i)
                            for (std::size_t j = 0; j < n; ++j) {
                                const T* xi = x[g].data() + i * k;
                                T v = thin ? plain(xi, wt[g].data() + j * k, 1, k, true, false) : plain(xi, w[g].data() + j, n, k, false, false);
                                const T f = thin ? plain(xi, wt[g].data() + j * k, 1, k, true, true) : plain(xi, w[g].data() + j, n, k, false, true);
                                fused_differs += std::memcmp(&v, &f, sizeof(T)) != 0;
                                if (variant == 0) v = v + bias[g][j];
                                v = tiny(v);
                                if (variant != 1) v = v > T(0) ? v : T(0);
                                if (variant == 1) v = tiny(addend[g][i * n + j] + v);
                                e[i * n + j] = v;
                            }
                        expected.push_back(e);
                    }
                    for (const auto version : versions) {
                        CAPTURE(static_cast<int>(version));
                        std::vector<const T*> xs, ws, wts, biases, addends;
                        std::vector<T*> ys;
                        bool relus[8];
                        y.assign(count, std::vector<T>(rows * n, T(-3)));
                        for (std::size_t g = 0; g < count; ++g) {
                            xs.push_back(x[g].data());
                            ws.push_back(w[g].data());
                            wts.push_back(wt[g].data());
                            biases.push_back(variant == 0 ? bias[g].data() : nullptr);
                            relus[g] = variant != 1;
                            addends.push_back(variant == 1 ? addend[g].data() : nullptr);
                            ys.push_back(y[g].data());
                        }
                        const tenon::detail::dense_group_args<T> args{xs.data(), ws.data(),      wts.data(), biases.data(),
                                                                      relus,     addends.data(), ys.data()};
                        tenon::detail::dense_group<T>(rows, count, args, k, n, version);
                        for (std::size_t g = 0; g < count; ++g) CHECK(std::memcmp(y[g].data(), expected[g].data(), rows * n * sizeof(T)) == 0);
                    }
                }
            }
        }
    }
    CHECK(fused_differs > 0);  // the comparison can tell a fused kernel apart
}

TEST_CASE_TEMPLATE("the batch kernel of small dense layers gives the packed product's bits on every path", T, float, double) {
    // dense_rows computes products of at least a tile's rows without packing
    // on the fused paths; each element must stay the packed tile's chain of
    // fused multiply-adds, so compare with gemm on every available path.
    tenon::random_engine rng(44);
    const tenon::kernel_path before = tenon::active_kernel_path();
    for (const auto path : {tenon::kernel_path::portable, tenon::kernel_path::avx2, tenon::kernel_path::avx512, tenon::kernel_path::neon}) {
        if (!tenon::kernel_path_available(path)) continue;
        tenon::set_kernel_path(path);
        CAPTURE(tenon::kernel_path_name(path));
        for (const std::size_t n : std::vector<std::size_t>{8, 16, 17, 32, 40, 64}) {
            for (const std::size_t k : std::vector<std::size_t>{1, 8, 32, 256, 257}) {
                for (const std::size_t rows : std::vector<std::size_t>{8, 13, 64}) {
                    CAPTURE(n);
                    CAPTURE(k);
                    CAPTURE(rows);
                    std::vector<T> x(rows * k), w(k * n), bias(n);
                    for (auto& v : x) v = rng.normal(T(0), T(1));
                    for (auto& v : w) v = rng.normal(T(0), T(1));
                    for (auto& v : bias) v = rng.normal(T(0), T(1));
                    tenon::detail::dense_finish<T> f;
                    f.bias = bias.data();
                    f.relu = true;
                    std::vector<T> expected(rows * n);
                    tenon::gemm<T>(false, false, rows, n, k, T(1), x.data(), k, w.data(), n, T(0), expected.data(), n);
                    tenon::detail::finish_rows(rows, n, f, expected.data());
                    std::vector<T> y(rows * n, T(5));
                    tenon::detail::dense_rows<T>(rows, k, n, x.data(), w.data(), nullptr, f, y.data());
                    CHECK(std::memcmp(y.data(), expected.data(), y.size() * sizeof(T)) == 0);
                }
            }
        }
    }
    tenon::set_kernel_path(before);
}
