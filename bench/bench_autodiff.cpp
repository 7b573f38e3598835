// Forward + backward of a small recorded graph (a 16-64-64-4 perceptron at
// batch 32 with a log-softmax loss), against the same arithmetic written as
// plain loops without a tape in the same run; the ratio is the tape's overhead.
#include <benchmark/benchmark.h>

#include <cstdio>
#include <vector>

#include <tenon/tenon.hpp>

namespace {

constexpr std::size_t batch = 32, n_in = 16, n_hidden = 64, n_out = 4;

struct fixture {
    tenon::parameter<float> w1{"w1", tenon::shape2{n_in, n_hidden}};
    tenon::parameter<float> b1{"b1", tenon::shape2{1, n_hidden}};
    tenon::parameter<float> w2{"w2", tenon::shape2{n_hidden, n_hidden}};
    tenon::parameter<float> b2{"b2", tenon::shape2{1, n_hidden}};
    tenon::parameter<float> w3{"w3", tenon::shape2{n_hidden, n_out}};
    tenon::matrix<float> x = tenon::matrix<float>({batch, n_in});
    tenon::matrix<float> targets = tenon::matrix<float>({batch, n_out});

    fixture() {
        tenon::random_engine rng(42);
        for (auto* p : {&w1, &b1, &w2, &b2, &w3})
            for (std::size_t k = 0; k < p->size(); ++k) p->value().data()[k] = rng.normal(0.0f, 0.1f);
        for (std::size_t k = 0; k < x.size(); ++k) x.data()[k] = rng.normal(0.0f, 1.0f);
        targets.fill(0.0f);
        for (std::size_t i = 0; i < batch; ++i) targets(i, rng.below(n_out)) = 1.0f;
    }
};

void tape_forward_backward(benchmark::State& state) {
    fixture f;
    tenon::tape<float> t;
    for (auto _ : state) {
        t.clear();
        auto x = t.input(f.x);
        auto h1 = tenon::relu(tenon::matmul(x, t.track(f.w1)) + t.track(f.b1));
        auto h2 = tenon::relu(tenon::matmul(h1, t.track(f.w2)) + t.track(f.b2));
        auto logits = tenon::matmul(h2, t.track(f.w3));
        auto loss = -tenon::mean(tenon::sum(tenon::log_softmax_rows(logits) * t.input(f.targets), 1));
        t.backward(loss);
        benchmark::DoNotOptimize(f.w1.grad().data());
    }
}
BENCHMARK(tape_forward_backward);

// Reference: the same forward and backward arithmetic with tenon::gemm and
// hand-written loops on preallocated buffers, no recording.
void reference_forward_backward(benchmark::State& state) {
    fixture f;
    using tenon::gemm;
    std::vector<float> h1(batch * n_hidden), h2(batch * n_hidden), logits(batch * n_out), g3(batch * n_out), g2(batch * n_hidden),
        g1(batch * n_hidden), gw1(n_in * n_hidden), gw2(n_hidden * n_hidden), gw3(n_hidden * n_out);
    for (auto _ : state) {
        gemm<float>(false, false, batch, n_hidden, n_in, 1, f.x.data(), n_in, f.w1.value().data(), n_hidden, 0, h1.data(), n_hidden);
        for (std::size_t i = 0; i < batch; ++i)
            for (std::size_t j = 0; j < n_hidden; ++j) {
                float& v = h1[i * n_hidden + j];
                v += f.b1.value().data()[j];
                v = v > 0 ? v : 0;
            }
        gemm<float>(false, false, batch, n_hidden, n_hidden, 1, h1.data(), n_hidden, f.w2.value().data(), n_hidden, 0, h2.data(), n_hidden);
        for (std::size_t i = 0; i < batch; ++i)
            for (std::size_t j = 0; j < n_hidden; ++j) {
                float& v = h2[i * n_hidden + j];
                v += f.b2.value().data()[j];
                v = v > 0 ? v : 0;
            }
        gemm<float>(false, false, batch, n_out, n_hidden, 1, h2.data(), n_hidden, f.w3.value().data(), n_out, 0, logits.data(), n_out);
        for (std::size_t i = 0; i < batch; ++i) {
            float m = logits[i * n_out], s = 0;
            for (std::size_t j = 1; j < n_out; ++j) m = std::max(m, logits[i * n_out + j]);
            for (std::size_t j = 0; j < n_out; ++j) s += std::exp(logits[i * n_out + j] - m);
            for (std::size_t j = 0; j < n_out; ++j) g3[i * n_out + j] = (std::exp(logits[i * n_out + j] - m) / s - f.targets(i, j)) / float(batch);
        }
        gemm<float>(true, false, n_hidden, n_out, batch, 1, h2.data(), n_hidden, g3.data(), n_out, 0, gw3.data(), n_out);
        gemm<float>(false, true, batch, n_hidden, n_out, 1, g3.data(), n_out, f.w3.value().data(), n_out, 0, g2.data(), n_hidden);
        for (std::size_t k = 0; k < g2.size(); ++k) g2[k] = h2[k] > 0 ? g2[k] : 0;
        gemm<float>(true, false, n_hidden, n_hidden, batch, 1, h1.data(), n_hidden, g2.data(), n_hidden, 0, gw2.data(), n_hidden);
        gemm<float>(false, true, batch, n_hidden, n_hidden, 1, g2.data(), n_hidden, f.w2.value().data(), n_hidden, 0, g1.data(), n_hidden);
        for (std::size_t k = 0; k < g1.size(); ++k) g1[k] = h1[k] > 0 ? g1[k] : 0;
        gemm<float>(true, false, n_in, n_hidden, batch, 1, f.x.data(), n_in, g1.data(), n_hidden, 0, gw1.data(), n_hidden);
        benchmark::DoNotOptimize(gw1.data());
    }
}
BENCHMARK(reference_forward_backward);

// Prints tape time / reference time after both have run.
class ratio_reporter : public benchmark::ConsoleReporter {
public:
    void ReportRuns(const std::vector<Run>& runs) override {
        ConsoleReporter::ReportRuns(runs);
        for (const auto& r : runs) {
            if (r.run_type == Run::RT_Aggregate) continue;  // repetition summaries, not runs
            if (r.run_name.function_name == "tape_forward_backward") tape_ns_ = r.GetAdjustedCPUTime();
            if (r.run_name.function_name == "reference_forward_backward") reference_ns_ = r.GetAdjustedCPUTime();
        }
    }
    void Finalize() override {
        ConsoleReporter::Finalize();
        if (tape_ns_ > 0 && reference_ns_ > 0) std::printf("ratio tape / hand-written reference: %.2f\n", tape_ns_ / reference_ns_);
    }

private:
    double tape_ns_ = 0, reference_ns_ = 0;
};

}  // namespace

int main(int argc, char** argv) {
    benchmark::Initialize(&argc, argv);
    ratio_reporter reporter;
    benchmark::RunSpecifiedBenchmarks(&reporter);
    benchmark::Shutdown();
    return 0;
}
