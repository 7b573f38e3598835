// tenon against the hardware's limit: every comparison below runs in the same
// process, at the same thread count, and the ratios are printed at the end
// next to the targets of the performance work.
//
// gemm, a training step, a Fashion-MNIST epoch (built-in kernel and BLAS
// backend, directly and through `tenon train`) against OpenBLAS alone, one-row
// prediction latency, and z-scoring against an in-place pass. Run:
//   env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE build/<dir>/bench/tenon_bench_perf
// (TENON_BENCH_SMOKE=1: small slices for CI). What each measures, the options
// and the figures: docs/performance.md.
#include <benchmark/benchmark.h>

#include <algorithm>
#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <map>
#include <memory>
#include <sstream>
#include <string>
#include <thread>
#include <vector>

#include <cblas.h>

#include "tool.hpp"  // examples/cli: the tool (library tenon_tool), run in process

#include <tenon/core/gemm.hpp>
#include <tenon/core/parallel.hpp>
#include <tenon/deploy/predictor.hpp>
#include <tenon/layers/network.hpp>
#include <tenon/losses/classification.hpp>
#include <tenon/prep/csv.hpp>
#include <tenon/prep/idx_gzip.hpp>
#include <tenon/prep/scaling.hpp>
#include <tenon/prep/split.hpp>
#include <tenon/train/trainer.hpp>
#include <tenon/train/workflow.hpp>
#include <tenon/update/rules.hpp>
#include <tenon/update/schedules.hpp>

extern "C" void openblas_set_num_threads(int);
extern "C" char* openblas_get_config(void);

#ifndef TENON_BENCH_FLAGS
#define TENON_BENCH_FLAGS "(unknown)"
#endif

namespace {

// TENON_BENCH_SMOKE=1: every benchmark runs briefly on small data (CI).
bool smoke() {
    static const bool on = [] {
        const char* v = std::getenv("TENON_BENCH_SMOKE");
        return v != nullptr && std::string(v) != "0" && !std::string(v).empty();
    }();
    return on;
}

// ---------------------------------------------------------------------------
// Shared set-up.

tenon::thread_pool& pool(std::size_t threads) {
    static std::map<std::size_t, std::unique_ptr<tenon::thread_pool>> pools;
    auto& p = pools[threads];
    if (!p) p = std::make_unique<tenon::thread_pool>(threads);
    return *p;
}

// 0 = the best built-in path, 1 = the BLAS backend.
tenon::kernel_path path_of(std::int64_t arg) { return arg == 0 ? tenon::best_builtin_kernel_path() : tenon::kernel_path::blas; }

// One matrix product of the 784-256-128-10 step at batch 128.
struct product {
    bool transpose_a, transpose_b;
    int m, n, k;
    const char* role;
};
constexpr int batch = 128;
const product step_products[8] = {
    {false, false, batch, 256, 784, "forward 1"}, {false, false, batch, 128, 256, "forward 2"}, {false, false, batch, 10, 128, "forward 3"},
    {true, false, 784, 256, batch, "weights 1"},  {true, false, 256, 128, batch, "weights 2"},  {true, false, 128, 10, batch, "weights 3"},
    {false, true, batch, 256, 128, "inputs 2"},   {false, true, batch, 128, 10, "inputs 3"},
};

struct product_buffers {
    std::vector<float> a, b, c;
    explicit product_buffers(const product& p)
        : a(static_cast<std::size_t>(p.m) * static_cast<std::size_t>(p.k)), b(static_cast<std::size_t>(p.k) * static_cast<std::size_t>(p.n)),
          c(static_cast<std::size_t>(p.m) * static_cast<std::size_t>(p.n)) {
        tenon::random_engine rng(5);
        for (auto& v : a) v = rng.normal(0.0f, 1.0f);
        for (auto& v : b) v = rng.normal(0.0f, 1.0f);
    }
};

std::vector<product_buffers>& buffers() {
    static std::vector<product_buffers> all = [] {
        std::vector<product_buffers> v;
        for (const auto& p : step_products) v.emplace_back(p);
        return v;
    }();
    return all;
}

void openblas_product(const product& p, product_buffers& x, float beta) {
    const int lda = p.transpose_a ? p.m : p.k, ldb = p.transpose_b ? p.k : p.n;
    cblas_sgemm(CblasRowMajor, p.transpose_a ? CblasTrans : CblasNoTrans, p.transpose_b ? CblasTrans : CblasNoTrans, p.m, p.n, p.k, 1.0f, x.a.data(),
                lda, x.b.data(), ldb, beta, x.c.data(), p.n);
}

void tenon_product(const product& p, product_buffers& x, float beta, tenon::executor* workers) {
    const std::size_t m = static_cast<std::size_t>(p.m), n = static_cast<std::size_t>(p.n), k = static_cast<std::size_t>(p.k);
    tenon::gemm<float>(p.transpose_a, p.transpose_b, m, n, k, 1.0f, x.a.data(), p.transpose_a ? m : k, x.b.data(), p.transpose_b ? k : n, beta,
                       x.c.data(), n, workers);
}

double flops_of(int first, int last) {
    double f = 0.0;
    for (int i = first; i < last; ++i) f += 2.0 * step_products[i].m * step_products[i].n * step_products[i].k;
    return f;
}

// ---------------------------------------------------------------------------
// gemm: args (shape index 0..7, or 8 = all eight; threads).

void gemm_tenon(benchmark::State& state) {
    const int shape = static_cast<int>(state.range(0));
    const std::size_t threads = static_cast<std::size_t>(state.range(1));
    tenon::set_kernel_path(tenon::best_builtin_kernel_path());
    openblas_set_num_threads(1);
    const int first = shape == 8 ? 0 : shape, last = shape == 8 ? 8 : shape + 1;
    for (auto _ : state) {
        for (int i = first; i < last; ++i) tenon_product(step_products[i], buffers()[static_cast<std::size_t>(i)], 0.0f, &pool(threads));
        benchmark::ClobberMemory();
    }
    state.counters["GFLOP/s"] = benchmark::Counter(flops_of(first, last), benchmark::Counter::kIsIterationInvariantRate);
    state.SetLabel(shape == 8 ? "all eight" : step_products[shape].role);
}

void gemm_openblas(benchmark::State& state) {
    const int shape = static_cast<int>(state.range(0));
    openblas_set_num_threads(static_cast<int>(state.range(1)));
    const int first = shape == 8 ? 0 : shape, last = shape == 8 ? 8 : shape + 1;
    for (auto _ : state) {
        for (int i = first; i < last; ++i) openblas_product(step_products[i], buffers()[static_cast<std::size_t>(i)], 0.0f);
        benchmark::ClobberMemory();
    }
    openblas_set_num_threads(1);
    state.counters["GFLOP/s"] = benchmark::Counter(flops_of(first, last), benchmark::Counter::kIsIterationInvariantRate);
    state.SetLabel(shape == 8 ? "all eight" : step_products[shape].role);
}

void gemm_args(benchmark::internal::Benchmark* b) {
    b->ArgNames({"shape", "threads"});
    for (int threads : {1, 2})
        for (int shape = 0; shape <= 8; ++shape) b->Args({shape, threads});
    b->MinTime(0.2)->UseRealTime();
}
BENCHMARK(gemm_tenon)->Apply(gemm_args);
BENCHMARK(gemm_openblas)->Apply(gemm_args);

// ---------------------------------------------------------------------------
// One training step: args (path, threads). As the trainer runs it: the
// products and the update on the pool, the update clearing each gradient
// after use (so the step has no clearing pass of its own).

struct step_fixture {
    tenon::network<float> net =
        tenon::make_mlp<float>({784, 256, 128, 10}, tenon::activation::relu, {tenon::init_scheme::he, tenon::init_distribution::normal}, 1);
    tenon::adam<float> rule;
    tenon::matrix<float> x = tenon::matrix<float>({batch, 784});
    std::vector<std::size_t> labels = std::vector<std::size_t>(batch);
    tenon::tape<float> t;
    step_fixture() {
        tenon::random_engine rng(3);
        for (std::size_t i = 0; i < x.size(); ++i) x.data()[i] = rng.normal(0.0f, 1.0f);
        for (auto& l : labels) l = static_cast<std::size_t>(rng.below(10));
        net.clear_gradients();
        rule.set_clears_gradients(true);
    }
    void step() {
        t.clear();
        const auto y = net.forward(t, t.input(x));
        const auto loss = tenon::cross_entropy_loss(t, y, labels);
        t.backward(loss);
        rule.apply(net.parameters(), 1e-4f);
    }
};

// tenon's pool of the benchmark's size splits the products on both paths;
// with the BLAS backend each band is an OpenBLAS call on one thread (as
// `tenon train --threads N` sets it), so no second set of threads competes
// for the cores. The OpenBLAS references run on the benchmark's thread count.
void use_threads(std::int64_t path) {
    tenon::set_kernel_path(path_of(path));
    openblas_set_num_threads(1);
}

void training_step(benchmark::State& state) {
    use_threads(state.range(0));
    step_fixture f;
    f.t.set_executor(&pool(static_cast<std::size_t>(state.range(1))));
    f.rule.set_executor(&pool(static_cast<std::size_t>(state.range(1))));
    f.step();
    for (auto _ : state) f.step();
    openblas_set_num_threads(1);
    state.SetLabel(tenon::kernel_path_name(tenon::active_kernel_path()));
}
BENCHMARK(training_step)->ArgNames({"path", "threads"})->ArgsProduct({{0, 1}, {1, 2}})->MinTime(0.5)->UseRealTime()->Unit(benchmark::kMicrosecond);

void training_step_openblas_products(benchmark::State& state) {
    openblas_set_num_threads(static_cast<int>(state.range(0)));
    for (auto _ : state) {
        for (std::size_t i = 0; i < 8; ++i) openblas_product(step_products[i], buffers()[i], i < 3 ? 0.0f : 1.0f);
        benchmark::ClobberMemory();
    }
    openblas_set_num_threads(1);
}
BENCHMARK(training_step_openblas_products)->ArgNames({"threads"})->Arg(1)->Arg(2)->MinTime(0.5)->UseRealTime()->Unit(benchmark::kMicrosecond);

// ---------------------------------------------------------------------------
// One Fashion-MNIST epoch (Debian package dataset-fashion-mnist): args (path, threads).

const std::string fashion_folder = "/usr/share/datasets/fashion-mnist/";

struct fashion_data {
    tenon::supervised_rows<float> train, validation;
    fashion_data() {
        const auto labels = tenon::idx_labels(tenon::read_idx_gzip_file(fashion_folder + "train-labels-idx1-ubyte.gz"));
        const auto images = tenon::idx_images<float>(tenon::read_idx_gzip_file(fashion_folder + "train-images-idx3-ubyte.gz"));
        // The dataset test's protocol: a stratified 90% / 10% holdout.
        auto split = tenon::stratified_holdout(labels, {0.9, 0.1, 0.0}, 1708);
        if (smoke()) {
            split.train.resize(std::min<std::size_t>(split.train.size(), 2560));
            split.validation.resize(std::min<std::size_t>(split.validation.size(), 512));
        }
        fill(train, images, labels, split.train);
        fill(validation, images, labels, split.validation);
    }
    static void fill(tenon::supervised_rows<float>& d, const tenon::matrix<float>& images, const std::vector<std::uint32_t>& labels,
                     const std::vector<std::size_t>& rows) {
        d.features = tenon::matrix<float>({rows.size(), 784});
        d.class_count = 10;
        d.labels.resize(rows.size());
        for (std::size_t i = 0; i < rows.size(); ++i) {
            std::memcpy(d.features.data() + i * 784, images.data() + rows[i] * 784, 784 * sizeof(float));
            d.labels[i] = labels[rows[i]];
        }
    }
};

fashion_data& fashion() {
    static fashion_data d;
    return d;
}

// The epoch's products alone in OpenBLAS on `threads` threads, timed once:
// for each of the 422 batches (421 of 128 rows, one of 112) the step's
// eight products, then the three forward products of the validation rows in
// chunks of 512 (as the trainer's validation runs them).
double products_epoch_seconds(int threads) {
    openblas_set_num_threads(threads);
    auto& d = fashion();
    const std::size_t train_rows = d.train.rows(), validation_rows = d.validation.rows();
    const int widths[4] = {784, 256, 128, 10};
    static std::vector<float> x(512 * 784), h1(512 * 256), h2(512 * 128), out(512 * 10), g(512 * 256);
    static std::vector<float> w[3], dw[3];
    for (int l = 0; l < 3; ++l) {
        w[l].assign(static_cast<std::size_t>(widths[l] * widths[l + 1]), 0.01f);
        dw[l].assign(w[l].size(), 0.0f);
    }
    float* acts[4] = {x.data(), h1.data(), h2.data(), out.data()};
    auto run_forward = [&](int rows) {
        for (int l = 0; l < 3; ++l)
            cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, rows, widths[l + 1], widths[l], 1.0f, acts[l], widths[l], w[l].data(),
                        widths[l + 1], 0.0f, acts[l + 1], widths[l + 1]);
    };
    const auto t0 = std::chrono::steady_clock::now();
    for (std::size_t first = 0; first < train_rows; first += batch) {
        const int rows = static_cast<int>(std::min<std::size_t>(batch, train_rows - first));
        run_forward(rows);
        for (int l = 2; l >= 0; --l) {
            // weight gradient X_l^T G_l, then (below the top layer) the input gradient G_l W_l^T
            cblas_sgemm(CblasRowMajor, CblasTrans, CblasNoTrans, widths[l], widths[l + 1], rows, 1.0f, acts[l], widths[l], g.data(), widths[l + 1],
                        1.0f, dw[l].data(), widths[l + 1]);
            if (l > 0)
                cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, rows, widths[l], widths[l + 1], 1.0f, g.data(), widths[l + 1], w[l].data(),
                            widths[l + 1], 1.0f, acts[l], widths[l]);
        }
    }
    for (std::size_t first = 0; first < validation_rows; first += 512)
        run_forward(static_cast<int>(std::min<std::size_t>(512, validation_rows - first)));
    benchmark::ClobberMemory();
    const double seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
    openblas_set_num_threads(1);
    return seconds;
}

// Pairs of (tenon's time, the reference's time) measured back to back. The
// virtual machines this runs on change speed by 20% and more within seconds,
// so each tenon measurement is paired with a reference measurement taken
// right after it, and the ratio reported is the median of the pairs' ratios
// (counter "ratio"); the times reported are the medians of each side.
struct paired_times {
    std::vector<double> ours, reference, ratios;
    void add(double our_seconds, double reference_seconds) {
        ours.push_back(our_seconds);
        reference.push_back(reference_seconds);
        ratios.push_back(our_seconds / reference_seconds);
    }
    static double median(std::vector<double> v) {
        if (v.empty()) return 0.0;
        std::sort(v.begin(), v.end());
        return v.size() % 2 ? v[v.size() / 2] : (v[v.size() / 2 - 1] + v[v.size() / 2]) / 2.0;
    }
    void report(benchmark::State& state) const {
        state.counters["ratio"] = median(ratios);
        state.counters["reference_s"] = median(reference);
        state.counters["ours_s"] = median(ours);
    }
};

// A 32-bit hash of every weight's bits (FNV-1a), exact in a double counter:
// equal hashes at one and two threads mean the same bits.
double weights_hash(tenon::network<float>& net) {
    std::uint32_t h = 2166136261u;
    for (const auto* p : net.parameters()) {
        const auto* bytes = reinterpret_cast<const unsigned char*>(p->value().data());
        for (std::size_t i = 0; i < p->size() * sizeof(float); ++i) h = (h ^ bytes[i]) * 16777619u;
    }
    return static_cast<double>(h);
}

void fashion_epoch(benchmark::State& state) {
    use_threads(state.range(0));
    const int threads = static_cast<int>(state.range(1));
    auto& d = fashion();
    auto net = tenon::make_mlp<float>({784, 256, 128, 10}, tenon::activation::relu, {tenon::init_scheme::he, tenon::init_distribution::normal}, 7);
    tenon::adam<float> rule;
    tenon::constant_rate schedule(1e-3);
    tenon::training_options<float> o;
    o.loss = tenon::loss_kind::cross_entropy;
    o.epochs = 1;
    o.batch_size = batch;
    o.seed = 2017;
    o.workers = &pool(static_cast<std::size_t>(threads));
    tenon::trainer<float> tr(net, rule, schedule, o);
    tr.run(d.train, d.validation);  // warm-up: the first epoch sizes every buffer
    // Then runs of three epochs, each timed as a third of the run: an epoch
    // of a longer run, with the run's own start (checking every input value
    // once, about 3% of an epoch here) shared by its epochs as in training.
    tenon::training_options<float> three = o;
    three.epochs = 3;
    tenon::trainer<float> longer(net, rule, schedule, three);
    paired_times pairs;
    for (auto _ : state) {
        const auto t0 = std::chrono::steady_clock::now();
        longer.run(d.train, d.validation);
        const double epoch = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count() / 3.0;
        state.SetIterationTime(epoch);
        pairs.add(epoch, products_epoch_seconds(threads));
    }
    pairs.report(state);
    state.counters["weights_hash"] = weights_hash(net);
    state.SetLabel(tenon::kernel_path_name(tenon::active_kernel_path()));
}
BENCHMARK(fashion_epoch)->ArgNames({"path", "threads"})->ArgsProduct({{0, 1}, {1, 2}})->Iterations(3)->UseManualTime()->Unit(benchmark::kMillisecond);

// The reference alone, for its time in the table.
void fashion_epoch_openblas_products(benchmark::State& state) {
    for (auto _ : state) state.SetIterationTime(products_epoch_seconds(static_cast<int>(state.range(0))));
}
BENCHMARK(fashion_epoch_openblas_products)->ArgNames({"threads"})->Arg(1)->Arg(2)->Iterations(3)->UseManualTime()->Unit(benchmark::kMillisecond);

// ---------------------------------------------------------------------------
// The same epoch through the command-line tool: `tenon train --threads N` on
// all 70,000 Fashion-MNIST images written as CSV (784 pixel columns and the
// label), split 54,000 / 6,000 / 10,000 (stratified: 5,400 / 600 / 1,000 per
// class) so training and validation match the epoch above, 784-256-128-10 relu,
// Adam 0.001, batch 128, three epochs without early stopping. The time is the
// metrics file's training_seconds (training with validation; reading and
// preparing excluded) divided by the epochs: args (path, threads).

const std::string& fashion_csv() {
    static const std::string path = [] {
        const std::string file =
            (std::filesystem::temp_directory_path() / (smoke() ? "tenon_bench_fashion_smoke.csv" : "tenon_bench_fashion_70000.csv")).string();
        std::string text;
        text.reserve(160u << 20);
        for (int c = 0; c < 784; ++c) text += "p" + std::to_string(c) + ",";
        text += "label\n";
        char cell[32];
        for (const char* part : {"train", "t10k"}) {
            const std::string prefix = fashion_folder + part;
            const auto labels = tenon::idx_labels(tenon::read_idx_gzip_file(prefix + "-labels-idx1-ubyte.gz"));
            const auto images = tenon::idx_images<float>(tenon::read_idx_gzip_file(prefix + "-images-idx3-ubyte.gz"));
            const std::size_t count = smoke() ? std::min<std::size_t>(labels.size(), 2000) : labels.size();
            for (std::size_t i = 0; i < count; ++i) {
                for (std::size_t c = 0; c < 784; ++c) {
                    const int length = std::snprintf(cell, sizeof cell, "%g,", static_cast<double>(images.data()[i * 784 + c]));
                    text.append(cell, static_cast<std::size_t>(length));
                }
                text += "c" + std::to_string(labels[i]) + "\n";
            }
        }
        std::ofstream(file, std::ios::binary) << text;
        return file;
    }();
    return path;
}

double number_after(const std::string& text, const std::string& key) {
    const auto at = text.find("\"" + key + "\"");
    if (at == std::string::npos) return 0.0;
    return std::strtod(text.c_str() + text.find(':', at) + 1, nullptr);
}

void cli_train_epoch(benchmark::State& state) {
    use_threads(state.range(0));
    const std::string metrics = (std::filesystem::temp_directory_path() / "tenon_bench_fashion_metrics.json").string();
    const std::string threads = std::to_string(state.range(1));
    std::vector<std::string> args = {"tenon",           "train", "--data",      fashion_csv(),
                                     "--target",        "label", "--hidden",    "256,128",
                                     "--batch",         "128",   "--epochs",    "3",
                                     "--patience",      "0",     "--fractions", "0.7714285714285714,0.0857142857142857,0.1428571428571429",
                                     "--learning-rate", "0.001", "--threads",   threads,
                                     "--metrics",       metrics};
    std::vector<char*> argv;
    for (auto& a : args) argv.push_back(a.data());
    paired_times pairs;
    for (auto _ : state) {
        std::ostringstream out, err;
        const int status = tenon_cli::run_cli(static_cast<int>(argv.size()), argv.data(), out, err, tenon_cli::cli_environment{});
        if (status != 0) {
            state.SkipWithError(("tenon train failed: " + err.str()).c_str());
            break;
        }
        std::ifstream in(metrics);
        const std::string text((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
        const double epochs = number_after(text, "epochs_run");
        const double epoch = epochs > 0 ? number_after(text, "training_seconds") / epochs : 0.0;
        state.SetIterationTime(epoch);
        pairs.add(epoch, products_epoch_seconds(static_cast<int>(state.range(1))));
    }
    pairs.report(state);
    openblas_set_num_threads(1);
    state.SetLabel(tenon::kernel_path_name(tenon::active_kernel_path()));
}
BENCHMARK(cli_train_epoch)
    ->ArgNames({"path", "threads"})
    ->ArgsProduct({{0, 1}, {1, 2}})
    ->Iterations(3)
    ->UseManualTime()
    ->Unit(benchmark::kMillisecond);

// ---------------------------------------------------------------------------
// Single-row prediction with an 8-32-32-1 network (an invented press line:
// eight sensor channels and the resulting force).

struct small_model {
    tenon::table t;
    tenon::fitted_model<float> fitted;
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
    static std::vector<std::size_t> rows(std::size_t a, std::size_t b) {
        std::vector<std::size_t> r;
        for (std::size_t i = a; i < b; ++i) r.push_back(i);
        return r;
    }
    small_model()
        : t(make_table()), fitted([&] {
              tenon::plan p;
              p.set_target("force", tenon::target_kind::regression);
              tenon::model_settings s;
              s.hidden = {32, 32};
              s.epochs = 2;
              return tenon::fit_model<float>(t, p, rows(0, 1600), rows(1600, 2000), s);
          }()) {}
};

std::map<std::string, double>& latency() {
    static std::map<std::string, double> values;
    return values;
}

void predict_one_prepared_row(benchmark::State& state) {
    static small_model model;
    tenon::set_kernel_path(tenon::best_builtin_kernel_path());
    tenon::predictor<float> p(model.fitted, 1);
    const std::vector<float> row = {0.1f, -0.5f, 0.25f, 0.9f, -0.3f, 0.0f, 0.7f, -0.8f};
    tenon::prediction_view<float> out;
    for (int i = 0; i < 1000; ++i) p.try_predict_prepared(row.data(), 1, out);
    std::vector<double> ns;
    ns.reserve(200000);
    for (auto _ : state) {
        for (int i = 0; i < 200000; ++i) {
            const auto start = std::chrono::steady_clock::now();
            p.try_predict_prepared(row.data(), 1, out);
            benchmark::DoNotOptimize(out);
            ns.push_back(std::chrono::duration<double, std::nano>(std::chrono::steady_clock::now() - start).count());
        }
    }
    // The clock's own cost, measured the same way, is subtracted.
    std::vector<double> empty;
    empty.reserve(200000);
    for (int i = 0; i < 200000; ++i) {
        const auto start = std::chrono::steady_clock::now();
        empty.push_back(std::chrono::duration<double, std::nano>(std::chrono::steady_clock::now() - start).count());
    }
    std::sort(ns.begin(), ns.end());
    std::sort(empty.begin(), empty.end());
    const double clock = empty[empty.size() / 2];
    auto at = [&](double q) { return ns[std::min(ns.size() - 1, static_cast<std::size_t>(q * static_cast<double>(ns.size())))] - clock; };
    latency()["p50"] = at(0.50);
    latency()["p99"] = at(0.99);
    latency()["max"] = ns.back() - clock;
    latency()["clock"] = clock;
    state.counters["p50_ns"] = latency()["p50"];
    state.counters["p99_ns"] = latency()["p99"];
    state.counters["max_ns"] = latency()["max"];
}
BENCHMARK(predict_one_prepared_row)->Iterations(1)->Unit(benchmark::kMillisecond);

// ---------------------------------------------------------------------------
// z-scoring in place vs an in-place pass over the same buffer. Both read
// and write every value of one 12.8 MB buffer once, so they move the same
// bytes; the reference does the least work such a pass can (a sign flip),
// in the widest vectors the CPU has (target_clones picks AVX-512, AVX2 or
// SSE2 at load time, as the transform picks its path at run time). A copy
// into a second buffer would not be like for like: it touches twice the
// memory, and its stores go to lines it has not read.

constexpr std::size_t z_rows = 200000, z_cols = 16;

struct z_fixture {
    tenon::matrix<float> x = tenon::matrix<float>({z_rows, z_cols});
    std::vector<tenon::scaling> scalings;
    z_fixture() {
        tenon::random_engine rng(2);
        for (std::size_t k = 0; k < x.size(); ++k) x.data()[k] = rng.normal(5.0f, 2.0f);
        scalings = tenon::measure_matrix_scalings(x, tenon::scaling_method::z_score);
    }
};
z_fixture& z() {
    static z_fixture f;
    return f;
}

__attribute__((target_clones("avx512f", "avx2", "default"), noinline)) void negate_in_place(float* p, std::size_t n) {
    for (std::size_t i = 0; i < n; ++i) p[i] = -p[i];
}

void z_score_in_place(benchmark::State& state) {
    auto& f = z();
    for (auto _ : state) {
        // Scaling its own output again: the values stay finite and normal
        // (the map x -> (x - 5) / 2 has its fixed point at -5).
        tenon::apply_scalings(f.x, f.scalings);
        benchmark::ClobberMemory();
    }
    state.SetBytesProcessed(static_cast<std::int64_t>(state.iterations() * f.x.size() * sizeof(float)));
}
BENCHMARK(z_score_in_place)->MinTime(0.3)->UseRealTime()->Unit(benchmark::kMicrosecond);

void z_score_in_place_reference(benchmark::State& state) {
    auto& f = z();
    for (auto _ : state) {
        negate_in_place(f.x.data(), f.x.size());
        benchmark::ClobberMemory();
    }
    state.SetBytesProcessed(static_cast<std::int64_t>(state.iterations() * f.x.size() * sizeof(float)));
}
BENCHMARK(z_score_in_place_reference)->MinTime(0.3)->UseRealTime()->Unit(benchmark::kMicrosecond);

// ---------------------------------------------------------------------------
// The summary: ratios against the targets.

class summary_reporter : public benchmark::ConsoleReporter {
public:
    explicit summary_reporter(std::string summary_out) : summary_out_(std::move(summary_out)) {}
    bool failed() const { return failed_; }
    void ReportRuns(const std::vector<Run>& runs) override {
        ConsoleReporter::ReportRuns(runs);
        for (const auto& r : runs) {
            if (r.error_occurred) failed_ = true;
            if (r.run_type != Run::RT_Iteration || r.error_occurred) continue;
            const std::string key = r.run_name.function_name + "/" + r.run_name.args;
            seconds_[key] = r.GetAdjustedRealTime() / unit_per_second(r.time_unit);
            for (const auto& c : r.counters) counters_[key + "#" + c.first] = c.second.value;
        }
    }
    void Finalize() override {
        ConsoleReporter::Finalize();
        std::printf("\n== summary (ratios measured in this run; target in brackets)\n");
        for (int threads : {1, 2}) {
            const std::string th = "threads:" + std::to_string(threads);
            std::printf("-- %d thread(s)\n", threads);
            threads_ = threads;
            for (int shape = 0; shape <= 8; ++shape) {
                const std::string key = "shape:" + std::to_string(shape) + "/" + th;
                ratio("gemm " + std::string(shape == 8 ? "all eight" : step_products[shape].role) + ": OpenBLAS time / built-in time",
                      get("gemm_openblas/" + key), get("gemm_tenon/" + key), shape == 8 ? "[>= 0.6]" : "");
            }
            for (int path = 0; path < 2; ++path) {
                const std::string key = "path:" + std::to_string(path) + "/" + th;
                const char* name = path == 0 ? "built-in" : "BLAS backend";
                ratio(std::string("training step (") + name + ") / its products in OpenBLAS", get("training_step/" + key),
                      get("training_step_openblas_products/" + th), "");
                // Paired measurements (see paired_times): the median ratio.
                paired("Fashion-MNIST epoch (" + std::string(name) + ") / its products in OpenBLAS", "fashion_epoch/" + key,
                       path == 0 ? "[<= 2.0]" : "[<= 1.3]");
                paired("tenon train --threads " + std::to_string(threads) + " (" + name + "): training_seconds per epoch / products",
                       "cli_train_epoch/" + key, path == 0 ? "[<= 2.0]" : "[<= 1.3]");
            }
        }
        threads_ = 0;
        for (int path = 0; path < 2; ++path) {
            const double one = counter("fashion_epoch/path:" + std::to_string(path) + "/threads:1#weights_hash");
            const double two = counter("fashion_epoch/path:" + std::to_string(path) + "/threads:2#weights_hash");
            if (one > 0 && two > 0)
                std::printf("-- %s: the weights after the epochs are %s on 1 and 2 threads\n", path == 0 ? "built-in" : "BLAS backend",
                            one == two ? "the same bits" : "NOT the same bits");
        }
        if (latency()["p50"] > 0) {
            record("prediction p50 ns", latency()["p50"], "[<= 500]");
            record("prediction p99 / p50", latency()["p99"] / latency()["p50"], "[<= 3]");
            std::printf("-- prediction, 8-32-32-1, one prepared row: p50 %.0f ns [<= 500], p99 %.0f ns (%.2f x p50) [<= 3 x], max %.0f ns "
                        "(clock cost %.0f ns subtracted)\n",
                        latency()["p50"], latency()["p99"], latency()["p99"] / latency()["p50"], latency()["max"], latency()["clock"]);
        }
        ratio("z-score in place, bandwidth / an in-place pass's bandwidth", get("z_score_in_place_reference/"), get("z_score_in_place/"), "[>= 0.5]");
        write_summary();
    }

private:
    static double unit_per_second(benchmark::TimeUnit u) {
        switch (u) {
        case benchmark::kNanosecond: return 1e9;
        case benchmark::kMicrosecond: return 1e6;
        case benchmark::kMillisecond: return 1e3;
        default: return 1.0;
        }
    }
    double get(const std::string& key) const {
        auto it = seconds_.find(key);
        return it == seconds_.end() ? 0.0 : it->second;
    }
    double counter(const std::string& key) const {
        auto it = counters_.find(key);
        return it == counters_.end() ? 0.0 : it->second;
    }
    void paired(const std::string& what, const std::string& key, const char* target) {
        const double r = counter(key + "#ratio");
        if (r <= 0) return;
        record(what, r, target);
        std::printf("   %-72s %6.3f %s\n", what.c_str(), r, target);
        std::printf("   %-72s %.3f s / %.3f s\n", "  (medians: tenon / OpenBLAS products, measured in pairs)", counter(key + "#ours_s"),
                    counter(key + "#reference_s"));
    }
    void ratio(const std::string& what, double numerator, double denominator, const char* target) {
        if (numerator > 0 && denominator > 0) {
            std::printf("   %-72s %6.3f %s\n", what.c_str(), numerator / denominator, target);
            record(what, numerator / denominator, target);
        }
    }
    // The summary as JSON (--tenon_summary_out=FILE): what each value is, the
    // value and its target, so that runs can be compared by a program. The
    // targets are printed, not judged: speed is not checked in CI.
    struct entry {
        std::string what;
        int threads;  // 0: not a per-thread-count measurement
        double value;
        std::string target;
    };
    void record(const std::string& what, double value, const char* target) { entries_.push_back({what, threads_, value, target}); }
    static std::string quoted(const std::string& text) {
        std::string out = "\"";
        for (const char c : text) {
            if (c == '"' || c == '\\') out += '\\';
            out += c;
        }
        return out + "\"";
    }
    void write_summary() const {
        if (summary_out_.empty()) return;
        std::ofstream out(summary_out_);
        out << "{\n  \"benchmark\": \"tenon_bench_perf\",\n  \"smoke\": " << (smoke() ? "true" : "false") << ",\n  \"ratios\": [";
        char number[64];
        for (std::size_t i = 0; i < entries_.size(); ++i) {
            std::snprintf(number, sizeof number, "%.6g", entries_[i].value);
            out << (i ? ",\n" : "\n") << "    {\"what\": " << quoted(entries_[i].what) << ", \"threads\": " << entries_[i].threads
                << ", \"value\": " << number << ", \"target\": " << quoted(entries_[i].target) << "}";
        }
        out << "\n  ]\n}\n";
        if (!out) std::fprintf(stderr, "could not write the summary to %s\n", summary_out_.c_str());
    }
    std::string summary_out_;
    int threads_ = 0;
    bool failed_ = false;
    std::vector<entry> entries_;
    std::map<std::string, double> seconds_, counters_;
};

// How much compute a second thread adds on this machine right now: the
// time of n built-in products (128 x 256 x 256, in cache) on one thread,
// against n products on each of two threads at once, as two threads'
// throughput over one thread's. Near 2 when the two hardware threads are
// separate cores; near 1 when a hypervisor runs them on one core's two
// hyperthreads (seen on the development machines: it can change from one
// hour to the next), and then the two-thread ratios measure no parallel
// gain for tenon or for the reference.
double two_thread_compute_scaling() {
    struct worker_buffers {
        std::vector<float> a = std::vector<float>(128 * 256, 0.5f), b = std::vector<float>(256 * 256, 0.25f), c = std::vector<float>(128 * 256);
        void run(int n) {
            for (int i = 0; i < n; ++i) tenon::gemm<float>(false, false, 128, 256, 256, 1.0f, a.data(), 256, b.data(), 256, 0.0f, c.data(), 256);
        }
    };
    const tenon::kernel_path before = tenon::active_kernel_path();
    tenon::set_kernel_path(tenon::best_builtin_kernel_path());
    worker_buffers mine, other;
    const int n = smoke() ? 100 : 2000;
    mine.run(n / 10);
    auto t0 = std::chrono::steady_clock::now();
    mine.run(n);
    const double one = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
    t0 = std::chrono::steady_clock::now();
    std::thread second([&] { other.run(n); });
    mine.run(n);
    second.join();
    const double two = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
    tenon::set_kernel_path(before);
    return 2.0 * one / two;
}

std::string cpu_name() {
    std::ifstream in("/proc/cpuinfo");
    std::string line;
    while (std::getline(in, line))
        if (line.rfind("model name", 0) == 0) return line.substr(line.find(':') + 2);
    return "unknown";
}

}  // namespace

int main(int argc, char** argv) {
    benchmark::Initialize(&argc, argv);
    // Google Benchmark removed its own options; ours is the one left.
    std::string summary_out;
    for (int i = 1; i < argc; ++i) {
        const std::string a = argv[i];
        if (a.rfind("--tenon_summary_out=", 0) == 0) {
            summary_out = a.substr(std::string("--tenon_summary_out=").size());
        } else {
            std::fprintf(stderr, "unknown option: %s\n", argv[i]);
            return 2;
        }
    }
    std::printf("== tenon performance benchmark\n");
    std::printf("CPU:             %s (%u hardware threads)\n", cpu_name().c_str(), std::thread::hardware_concurrency());
    std::printf("compiler:        %s, flags: %s\n", __VERSION__, TENON_BENCH_FLAGS);
    std::printf("kernel paths:    built-in %s (avx512 %s, avx2 %s), BLAS backend %s\n", tenon::kernel_path_name(tenon::best_builtin_kernel_path()),
                tenon::kernel_path_available(tenon::kernel_path::avx512) ? "yes" : "no",
                tenon::kernel_path_available(tenon::kernel_path::avx2) ? "yes" : "no",
                tenon::kernel_path_available(tenon::kernel_path::blas) ? "yes" : "no");
    std::printf("OpenBLAS:        %s\n", openblas_get_config());
    for (const char* v : {"OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE", "OPENBLAS_NUM_THREADS"}) {
        if (const char* value = std::getenv(v)) std::printf("warning:         %s=%s is set (unset it for reference numbers)\n", v, value);
    }
    std::printf("threads:         each benchmark names its thread count; tenon's pool and the OpenBLAS references use that\n"
                "                 count (with the BLAS backend, tenon splits the products and OpenBLAS runs each band on one thread)\n");
    std::printf("second thread:   two threads' compute / one thread's, at the start: %.2f (see the summary)\n\n", two_thread_compute_scaling());
    if (smoke()) std::printf("smoke run:       TENON_BENCH_SMOKE is set: small data, the numbers mean nothing\n");
    summary_reporter reporter(summary_out);
    benchmark::RunSpecifiedBenchmarks(&reporter);
    std::printf("-- two threads' compute / one thread's (independent in-cache products), at the end: %.2f; near 1 means the\n"
                "   two hardware threads shared one core during the run and the 2-thread ratios above show no parallel gain\n",
                two_thread_compute_scaling());
    benchmark::Shutdown();
    // A benchmark that stopped with an error (SkipWithError) fails the run.
    return reporter.failed() ? 1 : 0;
}
