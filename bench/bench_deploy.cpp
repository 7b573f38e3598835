// Benchmarks of deploy/: predictor latency for an 8-32-32-1 regression net
// (p50 / p99 / maximum per call) against the tape-based network_outputs of
// the same row, two threads' throughput, loading a model file, one row with
// its calibrated band against one without (issue 20 budget: at most 1.2x),
// and the predictor against plain hand loops (hand_loop.cpp); ratios printed.
// Run: build/<dir>/bench/tenon_bench_deploy (TENON_BENCH_SMOKE=1 shortens the
// throughput runs, for CI). In detail, with figures: docs/performance.md.
#include <benchmark/benchmark.h>

#include <algorithm>
#include <atomic>
#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <functional>
#include <sstream>
#include <stdexcept>
#include <string>
#include <thread>
#include <time.h>
#include <unistd.h>
#include <vector>

#include <tenon/deploy/model_file.hpp>
#include <tenon/deploy/predictor.hpp>
#include <tenon/train/calibration.hpp>
#include <tenon/prep/csv.hpp>

#include "hand_loop.hpp"

namespace {

// An invented press line: eight sensor channels and the resulting force.
struct bench_model {
    tenon::table t;
    tenon::fitted_model<float> fitted;
    tenon::model_file<float> file;
    std::string path;

    static tenon::table make_table() {
        tenon::random_engine rng(1);
        std::ostringstream csv;
        csv << "s0,s1,s2,s3,s4,s5,s6,s7,force\n";
        for (int i = 0; i < 2000; ++i) {
            double sum = 0;
            for (int k = 0; k < 8; ++k) {
                const double v = rng.uniform(-1.0, 1.0);
                sum += (k + 1) * v * v;
                csv << v << ",";
            }
            csv << sum << "\n";
        }
        std::istringstream in(csv.str());
        return tenon::read_csv(in, {}, "press.csv");
    }
    static tenon::model_settings settings(bool single = false) {
        tenon::model_settings s;
        s.hidden = {32, 32};
        s.epochs = 2;
        if (single) {
            s.ensemble = 1;
            s.linear_path = false;
        }
        return s;
    }
    static std::vector<std::size_t> rows(std::size_t a, std::size_t b) {
        std::vector<std::size_t> r;
        for (std::size_t i = a; i < b; ++i) r.push_back(i);
        return r;
    }
    explicit bench_model(bool single = false)
        : t(make_table()), fitted([&] {
              tenon::plan p;
              p.set_target("force", tenon::target_kind::regression);
              return tenon::fit_model<float>(t, p, rows(0, 1600), rows(1600, 2000), settings(single));
          }()),
          file(tenon::make_model_file(fitted, t, rows(0, 1600), settings(single))),
          path("/tmp/tenon_bench_deploy_" + std::string(single ? "single_" : "") + std::to_string(::getpid()) + ".tnm") {
        tenon::save_model_file(path, file);
    }
    ~bench_model() { std::remove(path.c_str()); }
};

bench_model& model() {
    static bench_model m;
    return m;
}

// One 8-32-32-1 network: no ensemble, no linear bypass.
bench_model& single_model() {
    static bench_model m(true);
    return m;
}

// The hand loop's view of a fitted model's networks (weights stay in the model).
struct hand_model {
    std::vector<hand::network> nets;
    hand::units units;
    std::string shape;  // e.g. "5 x (8-32-32-1 + bypass)"

    static void walk(tenon::layer<float>& l, hand::network& n) {
        if (auto* d = dynamic_cast<tenon::dense<float>*>(&l)) {
            hand::layer h;
            h.weights = d->weights().value().data();
            h.bias = d->has_bias() ? d->bias().value().data() : nullptr;
            h.inputs = d->inputs();
            h.outputs = d->outputs();
            n.layers.push_back(h);
        } else if (auto* a = dynamic_cast<tenon::activation_layer<float>*>(&l)) {
            if (a->function() == tenon::activation::relu)
                n.layers.back().relu = true;
            else if (a->function() != tenon::activation::identity)
                throw std::runtime_error("hand loop: only relu activations");
        } else if (auto* b = dynamic_cast<tenon::linear_bypass<float>*>(&l)) {
            n.bypass = b->linear_weights().value().data();
            for (std::size_t i = 0; i < b->layer_count(); ++i) walk(b->layer_at(i), n);
        } else if (!dynamic_cast<tenon::dropout<float>*>(&l)) {
            throw std::runtime_error("hand loop: unexpected layer " + std::string(l.kind()));
        }
    }
    explicit hand_model(tenon::fitted_model<float>& f) {
        std::vector<tenon::network<float>*> all{&f.net};
        for (auto& m : f.members) all.push_back(&m);
        for (auto* net : all) {
            hand::network n;
            for (std::size_t i = 0; i < net->layer_count(); ++i) walk(net->layer_at(i), n);
            nets.push_back(n);
        }
        const auto& s = f.plan.target_scaling();
        units = {s.center, s.spread, s.low, s.high};
        shape = std::to_string(nets.size()) + " x (" + std::to_string(nets[0].layers[0].inputs);
        for (const auto& l : nets[0].layers) shape += "-" + std::to_string(l.outputs);
        shape += nets[0].bypass ? " + bypass)" : ")";
    }
    float one_row(const float* x, float* spread) const {
        float scratch[128];
        return hand::one_row(nets.data(), nets.size(), units, x, scratch, spread);
    }
};

hand_model& hand_of(bench_model& m) {
    static hand_model ensemble(model().fitted), single(single_model().fitted);
    return &m == &model() ? ensemble : single;
}

const std::vector<std::string>& raw_row() {
    static const std::vector<std::string> cells = {"0.1", "-0.5", "0.25", "0.9", "-0.3", "0.0", "0.7", "-0.8"};
    return cells;
}

// Times each iteration separately and reports p50, p99 and the maximum.
template <class F>
void timed_loop(benchmark::State& state, F&& call) {
    std::vector<double> ns;
    ns.reserve(1 << 20);
    for (auto _ : state) {
        const auto t0 = std::chrono::steady_clock::now();
        call();
        const auto t1 = std::chrono::steady_clock::now();
        if (ns.size() < ns.capacity()) ns.push_back(std::chrono::duration<double, std::nano>(t1 - t0).count());
    }
    std::sort(ns.begin(), ns.end());
    if (ns.empty()) return;
    state.counters["p50_ns"] = ns[ns.size() / 2];
    state.counters["p99_ns"] = ns[std::min(ns.size() - 1, ns.size() * 99 / 100)];
    state.counters["max_ns"] = ns.back();
}

void predictor_one_prepared_row(benchmark::State& state) {
    tenon::predictor<float> p(model().file, 64);
    std::vector<float> row(8, 0.25f);
    tenon::prediction_view<float> out;
    timed_loop(state, [&] {
        p.try_predict_prepared(row.data(), 1, out);
        benchmark::DoNotOptimize(out.values[0]);
    });
}

void hand_loop_one_row(benchmark::State& state) {
    const hand_model& h = hand_of(model());
    std::vector<float> row(8, 0.25f);
    float spread = 0;
    timed_loop(state, [&] {
        const float y = h.one_row(row.data(), &spread);
        benchmark::DoNotOptimize(y);
        benchmark::DoNotOptimize(spread);
    });
}

void predictor_one_prepared_row_single_network(benchmark::State& state) {
    tenon::predictor<float> p(single_model().file, 64);
    std::vector<float> row(8, 0.25f);
    tenon::prediction_view<float> out;
    timed_loop(state, [&] {
        p.try_predict_prepared(row.data(), 1, out);
        benchmark::DoNotOptimize(out.values[0]);
    });
}

void hand_loop_one_row_single_network(benchmark::State& state) {
    const hand_model& h = hand_of(single_model());
    std::vector<float> row(8, 0.25f);
    float spread = 0;
    timed_loop(state, [&] {
        const float y = h.one_row(row.data(), &spread);
        benchmark::DoNotOptimize(y);
    });
}

void reference_tape_one_prepared_row(benchmark::State& state) {
    tenon::matrix<float> row({1, 8});
    row.fill(0.25f);
    timed_loop(state, [&] {
        const auto y = tenon::network_outputs(model().fitted.net, row);
        benchmark::DoNotOptimize(y.data()[0]);
    });
}

void predictor_one_named_row(benchmark::State& state) {
    tenon::predictor<float> p(model().file, 64);
    const auto& cells = raw_row();
    const tenon::named_value named[8] = {{"s0", cells[0]}, {"s1", cells[1]}, {"s2", cells[2]}, {"s3", cells[3]},
                                         {"s4", cells[4]}, {"s5", cells[5]}, {"s6", cells[6]}, {"s7", cells[7]}};
    tenon::prediction_view<float> out;
    timed_loop(state, [&] {
        p.try_predict_named(named, 8, out);
        benchmark::DoNotOptimize(out.values[0]);
    });
}

void predictor_64_prepared_rows(benchmark::State& state) {
    tenon::predictor<float> p(model().file, 64);
    std::vector<float> rows(64 * 8);
    tenon::random_engine rng(2);
    for (auto& v : rows) v = rng.uniform(-1.0f, 1.0f);
    tenon::prediction_view<float> out;
    timed_loop(state, [&] {
        p.try_predict_prepared(rows.data(), 64, out);
        benchmark::DoNotOptimize(out.values[63]);
    });
    state.SetItemsProcessed(state.iterations() * 64);
}

void predictor_64_raw_rows(benchmark::State& state) {
    tenon::predictor<float> p(model().file, 64);
    std::vector<std::string_view> cells;
    for (int i = 0; i < 64; ++i)
        for (const auto& c : raw_row()) cells.push_back(c);
    tenon::prediction_view<float> out;
    timed_loop(state, [&] {
        p.try_predict_cells(cells.data(), 64, out);
        benchmark::DoNotOptimize(out.values[63]);
    });
    state.SetItemsProcessed(state.iterations() * 64);
}

// The same model with a split-conformal band calibrated on its validation rows.
const tenon::model_file<float>& calibrated_file() {
    static const tenon::model_file<float> file = [] {
        tenon::model_file<float> f = model().file;
        f.calibration = tenon::calibrate_model(model().fitted, model().t, bench_model::rows(1600, 2000), 0.9);
        return f;
    }();
    return file;
}

void predictor_one_prepared_row_with_band(benchmark::State& state) {
    tenon::predictor<float> p(calibrated_file(), 64);
    std::vector<float> row(8, 0.25f);
    tenon::prediction_view<float> out;
    timed_loop(state, [&] {
        p.try_predict_prepared(row.data(), 1, out);
        benchmark::DoNotOptimize(out.high[0]);
    });
}

// Median over `rounds` of the mean time of `calls` one-row calls, in ns.
double median_call_ns(tenon::predictor<float>& p, int rounds, int calls) {
    std::vector<float> row(8, 0.25f);
    tenon::prediction_view<float> out;
    std::vector<double> means;
    for (int r = 0; r < rounds; ++r) {
        const auto t0 = std::chrono::steady_clock::now();
        for (int c = 0; c < calls; ++c) {
            p.try_predict_prepared(row.data(), 1, out);
            benchmark::DoNotOptimize(out.values[0]);
        }
        const auto t1 = std::chrono::steady_clock::now();
        means.push_back(std::chrono::duration<double, std::nano>(t1 - t0).count() / calls);
    }
    std::sort(means.begin(), means.end());
    return means[means.size() / 2];
}

void predictor_one_subnormal_row(benchmark::State& state) {
    tenon::predictor<float> p(model().file, 64);
    std::vector<float> row(8, 1e-40f);
    tenon::prediction_view<float> out;
    timed_loop(state, [&] {
        p.try_predict_prepared(row.data(), 1, out);
        benchmark::DoNotOptimize(out.values[0]);
    });
}

void load_model_and_build_predictor(benchmark::State& state) {
    const std::string& path = model().path;
    timed_loop(state, [&] {
        tenon::predictor<float> p(tenon::load_model_file<float>(path), 64);
        benchmark::DoNotOptimize(p.output_count());
    });
}

// Each thread builds its own predictor before the timed loop starts.
void predictor_threads(benchmark::State& state) {
    tenon::predictor<float> p(model().file, 64);
    std::vector<float> row(8, 0.25f);
    tenon::prediction_view<float> out;
    for (auto _ : state) {
        p.try_predict_prepared(row.data(), 1, out);
        benchmark::DoNotOptimize(out.values[0]);
    }
    state.SetItemsProcessed(state.iterations());
}

// Calls per second of `threads` threads for `seconds`, each with its own copy.
double throughput(int threads, double seconds) {
    tenon::predictor<float> base(model().file, 64);
    std::atomic<bool> go{false}, stop{false};
    std::vector<std::uint64_t> calls(static_cast<std::size_t>(threads), 0);
    std::vector<std::thread> pool;
    for (int k = 0; k < threads; ++k)
        pool.emplace_back([&, k, copy = base]() mutable {
            copy.warm_up();
            std::vector<float> row(8, 0.25f);
            tenon::prediction_view<float> out;
            while (!go.load()) std::this_thread::yield();
            std::uint64_t n = 0;
            while (!stop.load(std::memory_order_relaxed)) {
                copy.try_predict_prepared(row.data(), 1, out);
                benchmark::DoNotOptimize(out.values[0]);
                ++n;
            }
            calls[static_cast<std::size_t>(k)] = n;
        });
    go = true;
    std::this_thread::sleep_for(std::chrono::duration<double>(seconds));
    stop = true;
    for (auto& th : pool) th.join();
    std::uint64_t total = 0;
    for (auto c : calls) total += c;
    return static_cast<double>(total) / seconds;
}

// The calling thread's CPU time in ns (time it spends descheduled on a
// shared machine is not counted).
double thread_cpu_ns() {
    timespec t{};
    clock_gettime(CLOCK_THREAD_CPUTIME_ID, &t);
    return static_cast<double>(t.tv_sec) * 1e9 + static_cast<double>(t.tv_nsec);
}

// CPU time per call (ns) of each function in each of `rounds` interleaved
// rounds of `calls` calls each: times[f][r].
std::vector<std::vector<double>> interleaved_ns(const std::vector<std::function<void()>>& fs, int rounds, int calls) {
    std::vector<std::vector<double>> ns(fs.size());
    for (int r = 0; r < rounds; ++r)
        for (std::size_t f = 0; f < fs.size(); ++f) {
            const double t0 = thread_cpu_ns();
            for (int c = 0; c < calls; ++c) fs[f]();
            ns[f].push_back((thread_cpu_ns() - t0) / calls);
        }
    return ns;
}

double median_of(std::vector<double> v) {
    std::sort(v.begin(), v.end());
    return v[v.size() / 2];
}

// The ratio a / b taken within each round (a slower spell of the machine
// hits both sides of one round alike), summarised as its median and the
// first and third quartiles over the rounds: "1.02 (0.97-1.06)".
std::string round_ratio(const std::vector<double>& a, const std::vector<double>& b, double scale_a = 1.0, double scale_b = 1.0) {
    std::vector<double> r;
    for (std::size_t k = 0; k < a.size() && k < b.size(); ++k) r.push_back(a[k] * scale_a / (b[k] * scale_b));
    std::sort(r.begin(), r.end());
    char text[64];
    std::snprintf(text, sizeof text, "%.2f (quartiles %.2f-%.2f)", r[r.size() / 2], r[r.size() / 4], r[(3 * r.size()) / 4]);
    return text;
}

// The predictor against the hand loop on one row of `m`: the summary line.
void compare_with_hand_loop(bench_model& m, int rounds) {
    const hand_model& h = hand_of(m);
    tenon::predictor<float> p(m.file, 64);
    tenon::prediction_view<float> out;
    // The two compute the same values (the hand loop's compiler may fuse
    // multiplies and adds, so they agree within rounding).
    tenon::random_engine rng(3);
    std::vector<float> row(8);
    double largest = 0;
    for (int r = 0; r < 100; ++r) {
        for (auto& v : row) v = rng.uniform(-1.0f, 1.0f);
        p.try_predict_prepared(row.data(), 1, out);
        float spread = 0;
        const float y = h.one_row(row.data(), &spread);
        largest = std::max(largest, std::abs(static_cast<double>(y) - out.values[0]) / std::max(1.0, std::abs(static_cast<double>(y))));
    }
    std::fill(row.begin(), row.end(), 0.25f);
    // Third: the host holds a flush_subnormals_scope around its serving
    // loop, so a call does not save and restore the mode itself.
    const auto ns = interleaved_ns({[&] {
                                        p.try_predict_prepared(row.data(), 1, out);
                                        benchmark::DoNotOptimize(out.values[0]);
                                    },
                                    [&] {
                                        float spread = 0;
                                        const float y = h.one_row(row.data(), &spread);
                                        benchmark::DoNotOptimize(y);
                                        benchmark::DoNotOptimize(spread);
                                    },
                                    [&] {
                                        const tenon::flush_subnormals_scope held;
                                        for (int k = 0; k < 16; ++k) {
                                            p.try_predict_prepared(row.data(), 1, out);
                                            benchmark::DoNotOptimize(out.values[0]);
                                        }
                                    }},
                                   rounds, 20000);
    const double predictor_ns = median_of(ns[0]), hand_ns = median_of(ns[1]), held = median_of(ns[2]) / 16;
    std::printf("one prepared row, %s: predictor %.1f ns, hand loop (-O3 -march=native) %.1f ns, ratio %s (target at most 1.00); "
                "in a held flush_subnormals_scope %.1f ns, ratio %s; largest relative difference of the values %.1e\n",
                h.shape.c_str(), predictor_ns, hand_ns, round_ratio(ns[0], ns[1]).c_str(), held, round_ratio(ns[2], ns[1], 1.0 / 16).c_str(),
                largest);
}

// 64 rows in one call against 64 one-row calls: the summary line; then the
// same two inside a held flush_subnormals_scope.
void compare_batch(int rounds) {
    tenon::predictor<float> p(model().file, 64);
    std::vector<float> rows(64 * 8);
    tenon::random_engine rng(2);
    for (auto& v : rows) v = rng.uniform(-1.0f, 1.0f);
    tenon::prediction_view<float> out;
    const auto batch = [&] {
        p.try_predict_prepared(rows.data(), 64, out);
        benchmark::DoNotOptimize(out.values[63]);
    };
    const auto singles = [&] {
        for (std::size_t i = 0; i < 64; ++i) {
            p.try_predict_prepared(rows.data() + i * 8, 1, out);
            benchmark::DoNotOptimize(out.values[0]);
        }
    };
    const auto ns = interleaved_ns({batch, singles,
                                    [&] {
                                        const tenon::flush_subnormals_scope held;
                                        batch();
                                    },
                                    [&] {
                                        const tenon::flush_subnormals_scope held;
                                        singles();
                                    }},
                                   rounds, 500);
    std::printf("64 prepared rows, %s: one call %.0f ns (%.1f ns a row), 64 one-row calls %.0f ns, throughput ratio %s (target at least 3.00); "
                "in a held flush_subnormals_scope %.0f and %.0f ns, ratio %s\n",
                hand_of(model()).shape.c_str(), median_of(ns[0]), median_of(ns[0]) / 64, median_of(ns[1]), round_ratio(ns[1], ns[0]).c_str(),
                median_of(ns[2]), median_of(ns[3]), round_ratio(ns[3], ns[2]).c_str());
}

}  // namespace

BENCHMARK(reference_tape_one_prepared_row);
BENCHMARK(predictor_one_prepared_row);
BENCHMARK(hand_loop_one_row);
BENCHMARK(predictor_one_prepared_row_single_network);
BENCHMARK(hand_loop_one_row_single_network);
BENCHMARK(predictor_one_prepared_row_with_band);
BENCHMARK(predictor_one_subnormal_row);
BENCHMARK(predictor_one_named_row);
BENCHMARK(predictor_64_prepared_rows);
BENCHMARK(predictor_64_raw_rows);
BENCHMARK(load_model_and_build_predictor);
BENCHMARK(predictor_threads)->Threads(1)->Threads(2)->UseRealTime();

int main(int argc, char** argv) {
    benchmark::Initialize(&argc, argv);
    benchmark::RunSpecifiedBenchmarks();
    benchmark::Shutdown();
    const char* smoke = std::getenv("TENON_BENCH_SMOKE");
    const double seconds = smoke != nullptr && *smoke != '\0' && std::string(smoke) != "0" ? 0.05 : 1.0;
    const double one = throughput(1, seconds), two = throughput(2, seconds);
    std::printf(
        "throughput, one prepared row per call: 1 thread %.0f calls/s, 2 threads %.0f calls/s, ratio %.2f (ideal 2.00; %u hardware threads)\n", one,
        two, two / one, std::thread::hardware_concurrency());
    std::printf("model file: %zu bytes\n", tenon::model_file_to_bytes(model().file).size());
    // Interleaved rounds, so a slower spell of the machine hits both alike.
    tenon::predictor<float> plain(model().file, 64), banded(calibrated_file(), 64);
    const int rounds = smoke != nullptr && *smoke != '\0' && std::string(smoke) != "0" ? 5 : 51;
    std::vector<double> plain_ns, banded_ns;
    for (int r = 0; r < rounds; ++r) {
        plain_ns.push_back(median_call_ns(plain, 1, 20000));
        banded_ns.push_back(median_call_ns(banded, 1, 20000));
    }
    std::sort(plain_ns.begin(), plain_ns.end());
    std::sort(banded_ns.begin(), banded_ns.end());
    const double a = plain_ns[plain_ns.size() / 2], b = banded_ns[banded_ns.size() / 2];
    std::printf("one prepared row: %.1f ns, with its band %.1f ns, ratio %.3f (budget 1.20)\n", a, b, b / a);
    compare_with_hand_loop(model(), rounds);
    compare_with_hand_loop(single_model(), rounds);
    compare_batch(rounds);
    return 0;
}
