// Data preparation speed, each against a memcpy of the same bytes in the same
// run (the ratio is the cost per byte relative to merely moving the bytes):
//   - reading a ~100 MB CSV file (generated here into a temp file: 8 numeric
//     columns, one categorical, one date) into a table;
//   - z-scoring a 1,000,000 x 32 float matrix in place with measured scalings.
#include <benchmark/benchmark.h>

#include <cstdio>
#include <cstring>
#include <fstream>
#include <string>
#include <vector>

#include <tenon/core/random.hpp>
#include <tenon/prep/csv.hpp>
#include <tenon/prep/scaling.hpp>

namespace {

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
        while (written < 100u * 1000u * 1000u) {
            int n = std::snprintf(line, sizeof(line), "%.6f,%.6f,%.3f,%.3f,%.9g,%.9g,%d,%d,%s,2024-%02d-%02dT%02d:%02d:00Z\n",
                                  rng.normal(0.0, 1.0), rng.normal(100.0, 5.0), rng.uniform(0.0, 1000.0),
                                  rng.uniform(-1.0, 1.0), 1e9 + rng.uniform(0.0, 1.0), rng.normal(0.0, 1e-3),
                                  static_cast<int>(rng.below(1000)), static_cast<int>(rng.below(7)),
                                  stations[rng.below(4)], static_cast<int>(1 + rng.below(12)), static_cast<int>(1 + rng.below(28)),
                                  static_cast<int>(rng.below(24)), static_cast<int>(rng.below(60)));
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

constexpr std::size_t z_rows = 1000000, z_cols = 32;

struct z_fixture {
    tenon::matrix<float> x = tenon::matrix<float>({z_rows, z_cols});
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

void z_score_apply(benchmark::State& state) {
    auto& f = fixture();
    tenon::matrix<float> y = f.x;
    for (auto _ : state) {
        state.PauseTiming();
        std::memcpy(y.data(), f.x.data(), f.x.size() * sizeof(float));
        state.ResumeTiming();
        tenon::apply_scalings(y, f.scalings);
        benchmark::DoNotOptimize(y.data());
    }
    state.SetBytesProcessed(static_cast<std::int64_t>(state.iterations() * f.x.size() * sizeof(float)));
}
BENCHMARK(z_score_apply)->Unit(benchmark::kMillisecond);

void z_score_memcpy_reference(benchmark::State& state) {
    auto& f = fixture();
    tenon::matrix<float> y = f.x;
    for (auto _ : state) {
        std::memcpy(y.data(), f.x.data(), f.x.size() * sizeof(float));
        benchmark::DoNotOptimize(y.data());
        benchmark::ClobberMemory();
    }
    state.SetBytesProcessed(static_cast<std::int64_t>(state.iterations() * f.x.size() * sizeof(float)));
}
BENCHMARK(z_score_memcpy_reference)->Unit(benchmark::kMillisecond);

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
            if (name == "z_score_memcpy_reference") z_ref_ns_ = r.GetAdjustedRealTime();
        }
    }
    void Finalize() override {
        ConsoleReporter::Finalize();
        if (csv_ns_ > 0 && csv_ref_ns_ > 0)
            std::printf("ratio CSV read / memcpy of the same bytes: %.1f\n", csv_ns_ / csv_ref_ns_);
        if (z_ns_ > 0 && z_ref_ns_ > 0)
            std::printf("ratio z-score 1,000,000 x 32 floats / memcpy of the same bytes: %.2f\n", z_ns_ / z_ref_ns_);
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
