// Data preparation speed, each against a pass that merely moves the same
// bytes, in the same run (the ratio is the cost per byte relative to that):
//   - reading a ~100 MB CSV file (generated here into a temp file: 8 numeric
//     columns, one categorical, one date) into a table, against a memcpy of
//     the same number of bytes;
//   - z-scoring a 1,000,000 x 32 float matrix in place with measured scalings,
//     against an in-place pass over the same buffer (each value read and
//     written once: the same bytes moved as the transform moves).
// With TENON_BENCH_SMOKE=1 in the environment the CSV file is 1 MB and the
// matrix 10,000 x 32, so that CI can run every benchmark briefly.
#include <benchmark/benchmark.h>

#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <fstream>
#include <string>
#include <vector>

#include <tenon/core/random.hpp>
#include <tenon/prep/csv.hpp>
#include <tenon/prep/scaling.hpp>

namespace {

bool smoke() {
    const char* v = std::getenv("TENON_BENCH_SMOKE");
    return v != nullptr && *v != '\0' && std::string(v) != "0";
}

bool csv_generated = false;

const std::string& csv_path() {
    static const std::string path = [] {
        std::string p = std::string(P_tmpdir) + "/tenon_bench_prep.csv";
        std::ofstream out(p, std::ios::binary);
        out << "a,b,c,d,e,f,g,h,station,when\n";
        tenon::random_engine rng(1);
        const char* stations[] = {"north", "south", "\"east, upper\"", "west"};
        std::size_t written = 0;
        char line[512];
        const std::size_t size = smoke() ? 1000u * 1000u : 100u * 1000u * 1000u;
        while (written < size) {
            int n = std::snprintf(line, sizeof(line), "%.6f,%.6f,%.3f,%.3f,%.9g,%.9g,%d,%d,%s,2024-%02d-%02dT%02d:%02d:00Z\n", rng.normal(0.0, 1.0),
                                  rng.normal(100.0, 5.0), rng.uniform(0.0, 1000.0), rng.uniform(-1.0, 1.0), 1e9 + rng.uniform(0.0, 1.0),
                                  rng.normal(0.0, 1e-3), static_cast<int>(rng.below(1000)), static_cast<int>(rng.below(7)), stations[rng.below(4)],
                                  static_cast<int>(1 + rng.below(12)), static_cast<int>(1 + rng.below(28)), static_cast<int>(rng.below(24)),
                                  static_cast<int>(rng.below(60)));
            out.write(line, n);
            written += static_cast<std::size_t>(n);
        }
        csv_generated = true;
        return p;
    }();
    return path;
}

std::size_t file_size(const std::string& path) {
    std::ifstream in(path, std::ios::binary | std::ios::ate);
    return static_cast<std::size_t>(in.tellg());
}

void csv_read_table(benchmark::State& state) {
    const auto& path = csv_path();
    for (auto _ : state) {
        auto t = tenon::read_csv_file(path);
        benchmark::DoNotOptimize(t.row_count());
    }
    state.SetBytesProcessed(static_cast<std::int64_t>(state.iterations() * file_size(path)));
}
BENCHMARK(csv_read_table)->Unit(benchmark::kMillisecond)->Iterations(3);

void csv_memcpy_reference(benchmark::State& state) {
    const std::size_t n = file_size(csv_path());
    std::vector<char> source(n, 'x'), target(n);
    for (auto _ : state) {
        std::memcpy(target.data(), source.data(), n);
        benchmark::DoNotOptimize(target.data());
        benchmark::ClobberMemory();
    }
    state.SetBytesProcessed(static_cast<std::int64_t>(state.iterations() * n));
}
BENCHMARK(csv_memcpy_reference)->Unit(benchmark::kMillisecond)->Iterations(3);

constexpr std::size_t z_cols = 32;

struct z_fixture {
    tenon::matrix<float> x = tenon::matrix<float>({smoke() ? std::size_t{10000} : std::size_t{1000000}, z_cols});
    std::vector<tenon::scaling> scalings;
    z_fixture() {
        tenon::random_engine rng(2);
        for (std::size_t k = 0; k < x.size(); ++k) x.data()[k] = rng.normal(5.0f, 2.0f);
        scalings = tenon::measure_matrix_scalings(x, tenon::scaling_method::z_score);
    }
};
z_fixture& fixture() {
    static z_fixture f;
    return f;
}

// The reference pass: a sign flip in place, in the widest vectors the CPU
// has (chosen at load time), the least work a pass reading and writing
// every value can do.
__attribute__((target_clones("avx512f", "avx2", "default"), noinline)) void negate_in_place(float* p, std::size_t n) {
    for (std::size_t i = 0; i < n; ++i) p[i] = -p[i];
}

void z_score_apply(benchmark::State& state) {
    auto& f = fixture();
    for (auto _ : state) {
        // Scaling its own output again keeps the values finite and normal
        // (x -> (x - 5) / 2 has its fixed point at -5).
        tenon::apply_scalings(f.x, f.scalings);
        benchmark::DoNotOptimize(f.x.data());
        benchmark::ClobberMemory();
    }
    state.SetBytesProcessed(static_cast<std::int64_t>(state.iterations() * f.x.size() * sizeof(float)));
}
BENCHMARK(z_score_apply)->Unit(benchmark::kMillisecond);

void z_score_in_place_reference(benchmark::State& state) {
    auto& f = fixture();
    for (auto _ : state) {
        negate_in_place(f.x.data(), f.x.size());
        benchmark::DoNotOptimize(f.x.data());
        benchmark::ClobberMemory();
    }
    state.SetBytesProcessed(static_cast<std::int64_t>(state.iterations() * f.x.size() * sizeof(float)));
}
BENCHMARK(z_score_in_place_reference)->Unit(benchmark::kMillisecond);

// Prints each operation's time / its memcpy reference's time after the runs.
class ratio_reporter : public benchmark::ConsoleReporter {
public:
    void ReportRuns(const std::vector<Run>& runs) override {
        ConsoleReporter::ReportRuns(runs);
        for (const auto& r : runs) {
            const auto& name = r.run_name.function_name;
            if (name == "csv_read_table") csv_ns_ = r.GetAdjustedRealTime();
            if (name == "csv_memcpy_reference") csv_ref_ns_ = r.GetAdjustedRealTime();
            if (name == "z_score_apply") z_ns_ = r.GetAdjustedRealTime();
            if (name == "z_score_in_place_reference") z_ref_ns_ = r.GetAdjustedRealTime();
        }
    }
    void Finalize() override {
        ConsoleReporter::Finalize();
        if (csv_ns_ > 0 && csv_ref_ns_ > 0) std::printf("ratio CSV read / memcpy of the same bytes: %.1f\n", csv_ns_ / csv_ref_ns_);
        if (z_ns_ > 0 && z_ref_ns_ > 0)
            std::printf("ratio z-score %zu x 32 floats in place / an in-place pass over the same buffer: %.2f\n", fixture().x.shape()[0],
                        z_ns_ / z_ref_ns_);
    }

private:
    double csv_ns_ = 0, csv_ref_ns_ = 0, z_ns_ = 0, z_ref_ns_ = 0;
};

}  // namespace

int main(int argc, char** argv) {
    benchmark::Initialize(&argc, argv);
    ratio_reporter reporter;
    benchmark::RunSpecifiedBenchmarks(&reporter);
    benchmark::Shutdown();
    if (csv_generated) std::remove(csv_path().c_str());
    return 0;
}
