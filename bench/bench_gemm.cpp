// tenon::gemm for the four transpose cases against a naive triple loop (one
// dot product per element of C, the textbook definition) in the same run;
// the ratio naive / tenon is printed per case and shape.
//
// Shapes: a 784-256-128-10 perceptron's at batch 128 plus smaller ones (listed
// in docs/performance.md). Each benchmark's arguments are (case, m, n, k);
// case 0 = NN, 1 = TN, 2 = NT, 3 = TT (first letter: op(A), second: op(B);
// T = transposed).
#include <benchmark/benchmark.h>

#include <cstdio>
#include <map>
#include <string>
#include <utility>
#include <vector>

#include <tenon/core/gemm.hpp>
#include <tenon/core/random.hpp>

namespace {

const char* const case_names[4] = {"NN", "TN", "NT", "TT"};

struct operands {
    std::size_t m, n, k;
    bool transpose_a, transpose_b;
    std::vector<float> a, b, c;
    std::size_t lda, ldb;

    explicit operands(const benchmark::State& state)
        : m(static_cast<std::size_t>(state.range(1))), n(static_cast<std::size_t>(state.range(2))), k(static_cast<std::size_t>(state.range(3))),
          transpose_a((state.range(0) & 1) != 0), transpose_b((state.range(0) & 2) != 0), a(m * k), b(k * n), c(m * n), lda(transpose_a ? m : k),
          ldb(transpose_b ? k : n) {
        tenon::random_engine rng(5);
        for (auto& v : a) v = rng.normal(0.0f, 1.0f);
        for (auto& v : b) v = rng.normal(0.0f, 1.0f);
    }
};

void naive_triple_loop(const operands& o, float* c) {
    for (std::size_t i = 0; i < o.m; ++i) {
        for (std::size_t j = 0; j < o.n; ++j) {
            float acc = 0.0f;
            for (std::size_t p = 0; p < o.k; ++p) {
                const float x = o.transpose_a ? o.a[p * o.lda + i] : o.a[i * o.lda + p];
                const float y = o.transpose_b ? o.b[j * o.ldb + p] : o.b[p * o.ldb + j];
                acc += x * y;
            }
            c[i * o.n + j] = acc;
        }
    }
}

void tenon_gemm(benchmark::State& state) {
    operands o(state);
    for (auto _ : state) {
        tenon::gemm<float>(o.transpose_a, o.transpose_b, o.m, o.n, o.k, 1.0f, o.a.data(), o.lda, o.b.data(), o.ldb, 0.0f, o.c.data(), o.n);
        benchmark::DoNotOptimize(o.c.data());
        benchmark::ClobberMemory();
    }
    state.counters["GFLOP/s"] = benchmark::Counter(2.0 * double(o.m * o.n * o.k), benchmark::Counter::kIsIterationInvariantRate);
}

void naive_gemm(benchmark::State& state) {
    operands o(state);
    for (auto _ : state) {
        naive_triple_loop(o, o.c.data());
        benchmark::DoNotOptimize(o.c.data());
        benchmark::ClobberMemory();
    }
    state.counters["GFLOP/s"] = benchmark::Counter(2.0 * double(o.m * o.n * o.k), benchmark::Counter::kIsIterationInvariantRate);
}

void shapes(benchmark::internal::Benchmark* b) {
    b->ArgNames({"case", "m", "n", "k"});
    for (int c = 0; c < 4; ++c) {
        b->Args({c, 128, 256, 784});
        b->Args({c, 128, 256, 128});
        b->Args({c, 784, 256, 128});
        b->Args({c, 32, 64, 64});
        b->Args({c, 1, 256, 784});
        b->Args({c, 128, 1, 128});
    }
}
BENCHMARK(tenon_gemm)->Apply(shapes);
BENCHMARK(naive_gemm)->Apply(shapes);

// Prints naive time / tenon time for every (case, shape) after both ran.
class ratio_reporter : public benchmark::ConsoleReporter {
public:
    void ReportRuns(const std::vector<Run>& runs) override {
        ConsoleReporter::ReportRuns(runs);
        for (const auto& r : runs) {
            if (r.run_type != Run::RT_Iteration) continue;
            const std::string& name = r.run_name.function_name;
            auto& slot = times_[r.run_name.args];
            if (name == "tenon_gemm") slot.first = r.GetAdjustedCPUTime();
            if (name == "naive_gemm") slot.second = r.GetAdjustedCPUTime();
        }
    }
    void Finalize() override {
        ConsoleReporter::Finalize();
        for (const auto& [args, t] : times_) {
            if (t.first > 0 && t.second > 0) std::printf("naive / tenon::gemm  %-36s %6.2f\n", args.c_str(), t.second / t.first);
        }
    }

private:
    std::map<std::string, std::pair<double, double>> times_;  // args -> (tenon, naive)
};

}  // namespace

int main(int argc, char** argv) {
    benchmark::Initialize(&argc, argv);
    ratio_reporter reporter;
    benchmark::RunSpecifiedBenchmarks(&reporter);
    benchmark::Shutdown();
    return 0;
}
