#!/usr/bin/env python3
"""Independent reference for the expected values of tenon's random engine
(tests/test_core.cpp, "SplitMix64 seeding ..." and "random_engine is
bit-identical ...").

Written from the published algorithms, not from tenon's C++:
  - SplitMix64: Steele, Lea & Flood, "Fast splittable pseudorandom number
    generators", OOPSLA 2014, fig. 3 (the constants of its final version, as
    in Vigna's splitmix64.c);
  - xoshiro256**: Blackman & Vigna, "Scrambled linear pseudorandom number
    generators", ACM TOMS 47(4), 2021, fig. 1 / the authors' xoshiro256starstar.c;
  - bounded integers: Lemire, "Fast random integer generation in an
    interval", ACM TOMACS 29(1), 2019, algorithm 5;
  - uniform reals: the top 53 (double) or 24 (float) bits times 2^-53 / 2^-24.
tenon's own convention (include/tenon/core/random.hpp): the four state words
are four SplitMix64 outputs starting from seed XOR (stream * 0xD1B54A32D192ED03)
mod 2^64.

Run (python3 only, no packages):
    python3 tests/tools/random_reference.py
It prints every expected value the tests use, in the tests' notation, and
exits with status 1 if any differs from the values written below (which are
the ones in tests/test_core.cpp).
"""
import sys

MASK = (1 << 64) - 1


def splitmix64(x):
    """One SplitMix64 step: returns (new state, output)."""
    x = (x + 0x9E3779B97F4A7C15) & MASK
    z = x
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & MASK
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & MASK
    return x, z ^ (z >> 31)


def rotl(x, k):
    return ((x << k) | (x >> (64 - k))) & MASK


class Xoshiro256StarStar:
    def __init__(self, seed, stream=0):
        x = (seed ^ ((stream * 0xD1B54A32D192ED03) & MASK)) & MASK
        self.s = []
        for _ in range(4):
            x, out = splitmix64(x)
            self.s.append(out)

    def next_u64(self):
        s = self.s
        result = (rotl((s[1] * 5) & MASK, 7) * 9) & MASK
        t = (s[1] << 17) & MASK
        s[2] ^= s[0]
        s[3] ^= s[1]
        s[1] ^= s[2]
        s[0] ^= s[3]
        s[2] ^= t
        s[3] = rotl(s[3], 45)
        return result

    def uniform01_double(self):
        # (x >> 11) * 2^-53 is exact in a Python float (an IEEE double).
        return (self.next_u64() >> 11) * 2.0 ** -53

    def uniform01_float_numerator(self):
        # The float is numerator * 2^-24; the numerator has 24 bits, exact.
        return self.next_u64() >> 40

    def below(self, n):
        # Lemire (2019), algorithm 5.
        m = self.next_u64() * n
        low = m & MASK
        if low < n:
            threshold = (-n % (1 << 64)) % n
            while low < threshold:
                m = self.next_u64() * n
                low = m & MASK
        return m >> 64


def main():
    checks = []

    def expect(what, got, want, as_hex=True):
        ok = got == want
        checks.append(ok)
        shown = f"0x{got:016X}" if as_hex and isinstance(got, int) else repr(got)
        print(f"{'ok ' if ok else 'BAD'} {what}: {shown}")

    _, first = splitmix64(0)
    expect("SplitMix64 first output from state 0", first, 0xE220A8397B1DCDAF)

    r = Xoshiro256StarStar(0)
    for i, want in enumerate([0xE220A8397B1DCDAF, 0x6E789E6AA1B965F4, 0x06C45D188009454F, 0xF88BB8A8724C81EC]):
        expect(f"seed 0: state word {i}", r.s[i], want)
    for want in [0x99EC5F36CB75F2B4, 0xBF6E1F784956452A, 0x1A5F849D4933E6E0, 0x6AA594F1262D2D2C]:
        expect("seed 0: next_u64", r.next_u64(), want)

    r = Xoshiro256StarStar(42)
    for want in [0x15780B2E0C2EC716, 0x6104D9866D113A7E]:
        expect("seed 42: next_u64", r.next_u64(), want)
    r = Xoshiro256StarStar(42, 1)
    for want in [0x0030425E2A3DC334, 0x057E19F0156C8A6B]:
        expect("seed 42, stream 1: next_u64", r.next_u64(), want)

    r = Xoshiro256StarStar(2024)
    for want in [0.055792889110163335, 0.782103772866755]:
        expect("seed 2024: uniform01<double>", r.uniform01_double(), want)
    r = Xoshiro256StarStar(2024)
    for want in [936049, 13121523]:
        expect("seed 2024: uniform01<float> = n * 2^-24, n", r.uniform01_float_numerator(), want, as_hex=False)

    r = Xoshiro256StarStar(7)
    expect("seed 7: below(10) x 10", [r.below(10) for _ in range(10)], [7, 2, 8, 9, 9, 8, 0, 1, 4, 1])
    r = Xoshiro256StarStar(7)
    for want in [9692516303121356995, 3856539442751087005]:
        expect("seed 7: below(3 << 62)", r.below(3 << 62), want, as_hex=False)

    print(f"{sum(checks)} of {len(checks)} values reproduced")
    return 0 if all(checks) else 1


if __name__ == "__main__":
    sys.exit(main())
