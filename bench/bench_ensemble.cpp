// The cost of fit_model's seed ensemble and of its plain baselines, per
// epoch, relative to one network's epoch (issue 19), in the same run.
//
// On an invented 2,000-row table with fit_model's default networks: five
// networks on one and two threads, the ridge baseline's fit and the logistic
// baseline's epoch, each paired with one network's epoch right after it; the
// ratio printed is the median of the pairs' ratios.
// Run: build/<dir>/bench/tenon_bench_ensemble (TENON_BENCH_SMOKE=1: 2
// repetitions, for CI). The data, the timing and the figures: docs/performance.md.
#include <benchmark/benchmark.h>

#include <algorithm>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <fstream>
#include <functional>
#include <map>
#include <memory>
#include <string>
#include <thread>
#include <utility>
#include <vector>

#include <time.h>

#include <tenon/core/parallel.hpp>
#include <tenon/layers/network.hpp>
#include <tenon/train/baseline.hpp>
#include <tenon/train/trainer.hpp>
#include <tenon/train/workflow.hpp>

namespace {

bool smoke() {
    const char* s = std::getenv("TENON_BENCH_SMOKE");
    return s != nullptr && *s != '\0' && std::string(s) != "0";
}

constexpr std::size_t total_rows = 2000, training_rows = 1700, inputs = 10, classes = 3, members = 5;
constexpr std::size_t epochs_per_run = 5;

struct task_data {
    tenon::supervised_rows<float> train, validation;
    bool classify = false;
};

// The invented table, as regression (task 0) or classification (task 1).
task_data make_data(bool classify) {
    tenon::random_engine rng(19);
    tenon::matrix<float> x({total_rows, inputs});
    std::vector<double> y(total_rows);
    std::vector<std::size_t> label(total_rows);
    for (std::size_t i = 0; i < total_rows; ++i) {
        for (std::size_t k = 0; k < inputs; ++k) x(i, k) = rng.uniform(-1.7f, 1.7f);
        const auto v = [&](std::size_t k) { return static_cast<double>(x(i, k)); };
        const double a = std::sin(v(0)) + 0.5 * v(1) * v(2) - 0.3 * v(3) + 0.2 * v(4) * v(4);
        const double b = std::cos(v(5)) - 0.4 * v(6) + 0.3 * v(7) * v(8) + 0.1 * v(9);
        y[i] = a + 0.5 * b + rng.normal(0.0, 0.1);
        label[i] = (a > 0.2 ? 1u : 0u) + (b > 0.4 ? 1u : 0u);
    }
    task_data d;
    d.classify = classify;
    for (int part = 0; part < 2; ++part) {
        const std::size_t begin = part == 0 ? 0 : training_rows, end = part == 0 ? training_rows : total_rows;
        tenon::supervised_rows<float>& s = part == 0 ? d.train : d.validation;
        s.features = tenon::matrix<float>({end - begin, inputs});
        for (std::size_t i = begin; i < end; ++i)
            for (std::size_t k = 0; k < inputs; ++k) s.features(i - begin, k) = x(i, k);
        if (classify) {
            s.class_count = classes;
            s.labels.assign(label.begin() + static_cast<std::ptrdiff_t>(begin), label.begin() + static_cast<std::ptrdiff_t>(end));
        } else {
            s.targets = tenon::matrix<float>({end - begin, 1});
            for (std::size_t i = begin; i < end; ++i) s.targets(i - begin, 0) = static_cast<float>(y[i]);
        }
    }
    return d;
}

const task_data& data(bool classify) {
    static const task_data regression = make_data(false), classification = make_data(true);
    return classify ? classification : regression;
}

// fit_model's default network for the task (model_settings' defaults).
tenon::network<float> default_network(bool classify, std::uint64_t seed) {
    return tenon::make_mlp<float>({inputs, 64, 32, classify ? classes : 1}, tenon::activation::relu,
                                  tenon::initializer{tenon::init_scheme::he, tenon::init_distribution::uniform}, seed, tenon::activation::identity,
                                  /*linear_path=*/!classify);
}

// The logistic baseline's network: inputs straight to the class scores.
tenon::network<float> logistic_network(std::uint64_t seed) {
    return tenon::make_mlp<float>({inputs, classes}, tenon::activation::identity,
                                  tenon::initializer{tenon::init_scheme::glorot, tenon::init_distribution::uniform}, seed);
}

tenon::training_options<float> run_options(bool classify, std::uint64_t seed) {
    tenon::training_options<float> o;
    o.epochs = epochs_per_run;
    o.batch_size = 32;
    o.patience = 0;  // no early stopping: every run has its epochs
    o.seed = seed;
    o.loss = classify ? tenon::loss_kind::cross_entropy : tenon::loss_kind::l2;
    return o;
}

// One trainer run of epochs_per_run epochs, as fit_model runs a member.
void train_run(tenon::network<float>& net, const task_data& d, std::uint64_t seed) {
    auto rule = tenon::make_update_rule<float>(tenon::update_kind::adam);
    tenon::constant_rate schedule(1e-3);
    tenon::trainer<float> tr(net, *rule, schedule, run_options(d.classify, seed));
    const tenon::training_outcome out = tr.run(d.train, d.validation);
    benchmark::DoNotOptimize(out.steps);
}

double seconds_of(const std::function<void()>& f) {
    const auto t0 = std::chrono::steady_clock::now();
    f();
    return std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
}

// The calling thread's CPU time in seconds: time spent descheduled (a
// machine shared with other work) is not counted.
double thread_cpu_seconds() {
    timespec t{};
    clock_gettime(CLOCK_THREAD_CPUTIME_ID, &t);
    return static_cast<double>(t.tv_sec) + 1e-9 * static_cast<double>(t.tv_nsec);
}

// Seconds `f` takes: the calling thread's CPU time when all the work runs
// on it, else wall-clock time.
double seconds_of(const std::function<void()>& f, bool on_this_thread) {
    if (!on_this_thread) return seconds_of(f);
    const double t0 = thread_cpu_seconds();
    f();
    return thread_cpu_seconds() - t0;
}

double median(std::vector<double> v) {
    std::sort(v.begin(), v.end());
    return v.empty() ? 0.0 : v[v.size() / 2];
}

// Times `work` (seconds per epoch, or per fit; it returns them, measured
// with seconds_of(..., on_this_thread)) paired with one network's epoch
// after it, timed alike; reports the median of each and of the pairs' ratios.
void paired(benchmark::State& state, bool classify, bool on_this_thread, const std::function<double()>& work) {
    const task_data& d = data(classify);
    tenon::network<float> reference = default_network(classify, 1);
    train_run(reference, d, 1);  // warm up
    std::vector<double> ours, theirs, ratios;
    for (auto _ : state) {
        const double a = work();
        const double b = seconds_of([&] { train_run(reference, d, 1); }, on_this_thread) / epochs_per_run;
        state.SetIterationTime(a);
        ours.push_back(a);
        theirs.push_back(b);
        ratios.push_back(a / b);
    }
    state.counters["ratio"] = median(ratios);
    state.counters["ms"] = median(ours) * 1e3;
    state.counters["one_network_ms"] = median(theirs) * 1e3;
}

int repetitions() { return smoke() ? 2 : 21; }

void one_network_epoch(benchmark::State& state) {
    const bool classify = state.range(0) == 1;
    const task_data& d = data(classify);
    tenon::network<float> net = default_network(classify, 1);
    train_run(net, d, 1);
    std::vector<double> times;
    for (auto _ : state) {
        const double s = seconds_of([&] { train_run(net, d, 1); }, true) / epochs_per_run;
        state.SetIterationTime(s);
        times.push_back(s);
    }
    state.counters["ms"] = median(times) * 1e3;
}

// The ensemble's members train as fit_model's train_members trains them:
// one after the other on the calling thread, or side by side on the pool,
// one member a thread, each with its own update rule and seed.
void ensemble_epoch(benchmark::State& state) {
    const bool classify = state.range(0) == 1;
    const auto threads = static_cast<std::size_t>(state.range(1));
    const task_data& d = data(classify);
    std::vector<tenon::network<float>> nets;
    for (std::size_t k = 0; k < members; ++k) nets.push_back(default_network(classify, 1 + k * 0x9E3779B97F4A7C15ull));
    tenon::thread_pool pool(threads);
    struct context {
        std::vector<tenon::network<float>>* nets;
        const task_data* d;
    } c{&nets, &d};
    const auto all_members = [&] {
        if (threads == 1) {
            for (std::size_t k = 0; k < members; ++k) train_run(nets[k], d, 1 + k);
            return;
        }
        pool.run(
            members,
            [](void* p, std::size_t k) {
                auto* ctx = static_cast<context*>(p);
                train_run((*ctx->nets)[k], *ctx->d, 1 + k);
            },
            &c);
    };
    all_members();  // warm up
    paired(state, classify, threads == 1, [&] { return seconds_of(all_members, threads == 1) / epochs_per_run; });
}

void ridge_baseline_solve(benchmark::State& state) {
    const task_data& d = data(false);
    paired(state, false, true, [&] {
        // One fit takes well under a millisecond: the mean of 20.
        return seconds_of(
                   [&] {
                       for (int i = 0; i < 20; ++i) {
                           const tenon::linear_fit f = tenon::fit_least_squares(d.train.features, d.train.targets);
                           benchmark::DoNotOptimize(f.intercept.data());
                       }
                   },
                   true) /
            20.0;
    });
}

void logistic_baseline_epoch(benchmark::State& state) {
    const task_data& d = data(true);
    tenon::network<float> net = logistic_network(1);
    train_run(net, d, 1);
    paired(state, true, true, [&] { return seconds_of([&] { train_run(net, d, 1); }, true) / epochs_per_run; });
}

// The summary: each paired measurement's ratio to one network's epoch.
class summary_reporter : public benchmark::ConsoleReporter {
public:
    void ReportRuns(const std::vector<Run>& runs) override {
        ConsoleReporter::ReportRuns(runs);
        for (const auto& r : runs) {
            if (r.run_type != Run::RT_Iteration || r.error_occurred) continue;
            const std::string key = r.run_name.function_name + "/" + r.run_name.args;
            for (const auto& c : r.counters) counters_[key + "#" + c.first] = c.second.value;
        }
    }
    void Finalize() override {
        ConsoleReporter::Finalize();
        std::printf("\n== summary: time per epoch / one network's epoch (median of paired runs; %zu training and %zu validation rows,\n"
                    "   %zu inputs, networks %zu-64-32-out; thread CPU time, the 2-thread lines wall-clock time)\n",
                    training_rows, total_rows - training_rows, inputs, inputs);
        for (int task = 0; task < 2; ++task) {
            const std::string t = "task:" + std::to_string(task);
            std::printf("-- %s: one network's epoch %.2f ms\n", task == 0 ? "regression (linear path)" : "classification (3 classes)",
                        counters_[("one_network_epoch/" + t) + "#ms"]);
            line("ensemble of 5, one after the other, 1 thread", "ensemble_epoch/" + t + "/threads:1", "[ideal 5.00]");
            line("ensemble of 5, side by side, 2 threads", "ensemble_epoch/" + t + "/threads:2", "[ideal 3.00 with 2 free cores: 3 rounds]");
            if (task == 0)
                line("ridge baseline, the whole solve (no epochs)", "ridge_baseline_solve/", "");
            else
                line("logistic baseline, one epoch", "logistic_baseline_epoch/", "");
        }
    }

private:
    void line(const char* what, const std::string& key, const char* note) {
        const auto it = counters_.find(key + "#ratio");
        if (it == counters_.end()) return;
        std::printf("   %-46s %8.3f ms   ratio %7.3f %s\n", what, counters_[key + "#ms"], it->second, note);
    }
    std::map<std::string, double> counters_;
};

// Two networks' epochs at once on two threads against one on one thread,
// as two networks' worth of work per time: near 2 when a second core is
// free, near 1 when the two threads share one (a machine shared with other
// work), and then the 2-thread ensemble shows no parallel gain.
double two_thread_scaling() {
    const task_data& d = data(false);
    tenon::network<float> mine = default_network(false, 1), other = default_network(false, 2);
    train_run(mine, d, 1);
    std::vector<double> ratios;
    for (int r = 0; r < (smoke() ? 1 : 5); ++r) {
        const double one = seconds_of([&] { train_run(mine, d, 1); });
        const double two = seconds_of([&] {
            std::thread second([&] { train_run(other, d, 2); });
            train_run(mine, d, 1);
            second.join();
        });
        ratios.push_back(2.0 * one / two);
    }
    return median(ratios);
}

std::string cpu_name() {
    std::ifstream in("/proc/cpuinfo");
    std::string line;
    while (std::getline(in, line))
        if (line.rfind("model name", 0) == 0) return line.substr(line.find(':') + 2);
    return "unknown";
}

}  // namespace

BENCHMARK(one_network_epoch)->ArgNames({"task"})->Arg(0)->Arg(1)->Iterations(repetitions())->UseManualTime()->Unit(benchmark::kMillisecond);
BENCHMARK(ensemble_epoch)
    ->ArgNames({"task", "threads"})
    ->ArgsProduct({{0, 1}, {1, 2}})
    ->Iterations(repetitions())
    ->UseManualTime()
    ->Unit(benchmark::kMillisecond);
BENCHMARK(ridge_baseline_solve)->Iterations(repetitions())->UseManualTime()->Unit(benchmark::kMicrosecond);
BENCHMARK(logistic_baseline_epoch)->Iterations(repetitions())->UseManualTime()->Unit(benchmark::kMillisecond);

int main(int argc, char** argv) {
    benchmark::Initialize(&argc, argv);
    std::printf("CPU: %s (%u hardware threads)%s\n", cpu_name().c_str(), std::thread::hardware_concurrency(),
                smoke() ? "; smoke run (TENON_BENCH_SMOKE): 2 repetitions, the numbers mean little" : "");
    std::printf("second thread: two networks' epochs at once / one, at the start: %.2f (2.00: a free second core)\n", two_thread_scaling());
    summary_reporter reporter;
    benchmark::RunSpecifiedBenchmarks(&reporter);
    std::printf("-- second thread: two networks' epochs at once / one, at the end: %.2f; near 1 means the two threads shared one\n"
                "   core during the run (other work on the machine), and the 2-thread ensemble above could not run side by side\n",
                two_thread_scaling());
    benchmark::Shutdown();
    return 0;
}
