// Soak test: reader threads predict while the host swaps predictors, for a
// bounded time, with no failed or mixed prediction and no growth in live
// allocations.
//
// The duration is TENON_SOAK_SECONDS (default 20); sanitizer stages set a
// shorter one. Live allocations are counted, not guessed: by counting global
// allocation functions in an ordinary build, and with the sanitizer
// runtime's own count of allocated bytes (__sanitizer_get_current_allocated_bytes,
// <sanitizer/allocator_interface.h>) when AddressSanitizer or
// ThreadSanitizer replaces the allocation functions. That is why this is an
// executable of its own (tenon_soak_tests, labels "concurrency" and "soak").
#include <doctest/doctest.h>

#include <algorithm>
#include <atomic>
#include <chrono>
#include <cstdlib>
#include <new>
#include <string>
#include <thread>
#include <vector>

#include <tenon/deploy/predictor.hpp>

#include "deploy_test_support.hpp"

#include "sanitizer_build.hpp"

#if defined(TENON_TEST_SANITIZER)
#include <sanitizer/allocator_interface.h>
namespace {
const std::string live_unit = "bytes";
long live_now() { return static_cast<long>(__sanitizer_get_current_allocated_bytes()); }
}  // namespace
#else
#if defined(__GNUC__) && !defined(__clang__)
#pragma GCC diagnostic ignored "-Wmismatched-new-delete"
#endif
namespace {
std::atomic<long> live_allocations{0};
const std::string live_unit = "allocations";
long live_now() { return live_allocations.load(); }
void* counted(std::size_t size) {
    void* p = std::malloc(size ? size : 1);
    if (!p) throw std::bad_alloc();
    live_allocations.fetch_add(1, std::memory_order_relaxed);
    return p;
}
void uncounted(void* p) noexcept {
    if (!p) return;
    live_allocations.fetch_sub(1, std::memory_order_relaxed);
    std::free(p);
}
}  // namespace
void* operator new(std::size_t size) { return counted(size); }
void* operator new[](std::size_t size) { return counted(size); }
void operator delete(void* p) noexcept { uncounted(p); }
void operator delete[](void* p) noexcept { uncounted(p); }
void operator delete(void* p, std::size_t) noexcept { uncounted(p); }
void operator delete[](void* p, std::size_t) noexcept { uncounted(p); }
#endif

namespace {

using namespace deploy_test;

double soak_seconds() {
    const char* text = std::getenv("TENON_SOAK_SECONDS");
    const double s = text ? std::strtod(text, nullptr) : 20.0;
    return s > 0.0 ? s : 20.0;
}

}  // namespace

TEST_CASE("soak: threads predict while the host swaps predictors; no failure, no growth in live allocations") {
    const auto t = pump_table(200, 41);
    auto narrow = small_settings(1), wide = small_settings(2);
    wide.hidden = {24, 12};  // other buffer sizes, so every swap reallocates the readers' buffers
    auto first = tenon::fit_model<float>(t, condition_plan(), range(0, 150), range(150, 200), narrow);
    auto second = tenon::fit_model<float>(t, condition_plan(), range(0, 150), range(150, 200), wide);
    const tenon::predictor<float> p1(first, 8), p2(second, 8);
    const std::string_view rows[2][3] = {{"64", "21.5", "glycol"}, {"110", "8", "brine"}};
    float expected[2][2][3];  // [model][row][class]
    {
        tenon::predictor<float> probe = p1;
        for (int m = 0; m < 2; ++m) {
            if (m == 1) probe = p2;
            const auto out = probe.predict_cells(&rows[0][0], 2);
            for (int r = 0; r < 2; ++r)
                for (int k = 0; k < 3; ++k) expected[m][r][k] = out.at(static_cast<std::size_t>(r), static_cast<std::size_t>(k));
        }
    }
    REQUIRE_FALSE(same_bits(expected[0][0][0], expected[1][0][0]));

    // Live allocations a reader's predictor copy holds: the slack a sample
    // may exceed the first quarter's peak by (every reader mid-refresh).
    long per_copy = 0;
    {
        const long before = live_now();
        const tenon::predictor<float> copy = p2;
        per_copy = live_now() - before;
    }
    REQUIRE(per_copy > 0);

    tenon::predictor_holder<float> holder(p1);
    const int reader_count = 3;
    const double seconds = soak_seconds();
    const auto read_once = [&] {
        tenon::predictor<float> local = holder.get(8);
        tenon::prediction_view<float> out;
        for (int k = 0; k < 100; ++k) (void)local.try_predict_cells(&rows[0][0], 2, out);
    };
    // Warm-up: threads that predict once and end, so what the C++ runtime
    // and a sanitizer keep per thread after its first use (and reuse for the
    // next threads) is in place before the first count.
    for (int round = 0; round < 2; ++round) {
        std::vector<std::thread> warm;
        for (int k = 0; k < reader_count; ++k) warm.emplace_back(read_once);
        for (auto& w : warm) w.join();
    }
    // The test's own containers get their memory before the first count.
    std::vector<std::thread> readers;
    readers.reserve(reader_count);
    std::vector<long> samples;
    samples.reserve(static_cast<std::size_t>(seconds * 25.0) + 64);
    const long live_start = live_now();
    std::atomic<bool> stop{false};
    std::atomic<long> calls{0}, failures{0}, refreshes{0};
    for (int k = 0; k < reader_count; ++k)
        readers.emplace_back([&] {
            tenon::predictor<float> local = holder.get(8);
            tenon::prediction_view<float> out;
            while (!stop.load(std::memory_order_relaxed)) {
                if (holder.refresh(local)) refreshes.fetch_add(1, std::memory_order_relaxed);
                if (!local.try_predict_cells(&rows[0][0], 2, out).ok()) {
                    failures.fetch_add(1);
                    continue;
                }
                // Both rows from one model, to the last bit: never a mix.
                bool whole = false;
                for (int m = 0; m < 2 && !whole; ++m) {
                    bool same = true;
                    for (int r = 0; r < 2; ++r)
                        for (int c = 0; c < 3; ++c)
                            same = same && same_bits(out.at(static_cast<std::size_t>(r), static_cast<std::size_t>(c)), expected[m][r][c]);
                    whole = same;
                }
                if (!whole) failures.fetch_add(1);
                calls.fetch_add(1, std::memory_order_relaxed);
            }
        });

    // The host: swap every millisecond, sample the live count every 50 ms.
    long swaps = 0;
    const auto start = std::chrono::steady_clock::now();
    auto next_sample = start;
    while (std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count() < seconds) {
        holder.store(++swaps % 2 ? p2 : p1);
        std::this_thread::sleep_for(std::chrono::milliseconds(1));
        if (std::chrono::steady_clock::now() >= next_sample && samples.size() < samples.capacity()) {
            samples.push_back(live_now());
            next_sample += std::chrono::milliseconds(50);
        }
    }
    stop = true;
    for (auto& r : readers) r.join();
    holder.store(p1);  // as at the start
    const long live_end = live_now();

    REQUIRE(samples.size() >= 8);
    const std::size_t quarter = samples.size() / 4;
    const long early_peak = *std::max_element(samples.begin(), samples.begin() + static_cast<std::ptrdiff_t>(quarter));
    const long late_peak = *std::max_element(samples.end() - static_cast<std::ptrdiff_t>(quarter), samples.end());
    MESSAGE("soak " << seconds << " s: " << swaps << " swaps, " << refreshes.load() << " refreshes, " << calls.load() << " calls by " << reader_count
                    << " readers; live " << live_unit << " at start " << live_start << ", end " << live_end << ", peak of first quarter "
                    << early_peak << ", of last quarter " << late_peak << " (one predictor copy: " << per_copy << ")");
    CHECK(failures.load() == 0);
    CHECK(calls.load() > 0);
    CHECK(refreshes.load() > 0);
    CHECK(swaps > 100);
    CHECK(late_peak <= early_peak + reader_count * per_copy);
    CHECK(live_end == live_start);
}
