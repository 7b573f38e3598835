// Data-parallel scaling on a Fashion-MNIST epoch (Debian package
// dataset-fashion-mnist), and the ring-allreduce estimate for more ranks.
//
//   mpirun -np 2 build/release/bench/tenon_bench_distributed
//
// A plain MPI program (its runs are collective): rank 0 trains the epoch
// alone as the reference, then all ranks together; then the measured
// allreduce and the ring-allreduce model for 8 to 64 ranks. With
// TENON_BENCH_SMOKE=1 it trains on 2,560 images, for CI. The method, the
// formulas and the assumed links: docs/performance.md.
#include <algorithm>
#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <string>
#include <vector>

#include <tenon/distributed/data_parallel.hpp>
#include <tenon/prep/idx_gzip.hpp>
#include <tenon/update/rules.hpp>
#include <tenon/update/schedules.hpp>

namespace {

double now() { return std::chrono::duration<double>(std::chrono::steady_clock::now().time_since_epoch()).count(); }

double epoch_seconds(tenon::network<float>& net, const tenon::supervised_rows<float>& rows, std::size_t batch, tenon::training_team* team,
                     std::uint64_t& steps) {
    tenon::adam<float> rule;
    tenon::constant_rate schedule(1e-3);
    tenon::training_options<float> o;
    o.epochs = 1;
    o.batch_size = batch;
    o.seed = 1;
    o.patience = 0;
    o.loss = tenon::loss_kind::cross_entropy;
    o.team = team;
    tenon::trainer<float> tr(net, rule, schedule, o);
    const double t0 = now();
    steps = tr.run(rows, {}).steps;
    return now() - t0;
}

}  // namespace

int main(int argc, char** argv) {
    tenon::mpi_session session(&argc, &argv);
    tenon::communicator world;
    const std::size_t p = world.size(), batch = 64;
    const std::string folder = "/usr/share/datasets/fashion-mnist/";
    const auto labels = tenon::idx_labels(tenon::read_idx_gzip_file(folder + "train-labels-idx1-ubyte.gz"));
    tenon::supervised_rows<float> rows;
    rows.features = tenon::idx_images<float>(tenon::read_idx_gzip_file(folder + "train-images-idx3-ubyte.gz"));
    rows.labels.assign(labels.begin(), labels.end());
    rows.class_count = 10;
    const char* smoke = std::getenv("TENON_BENCH_SMOKE");
    if (smoke != nullptr && *smoke != '\0' && std::string(smoke) != "0") {
        const std::size_t keep = std::min<std::size_t>(2560, rows.labels.size());
        tenon::matrix<float> first({keep, 784});
        std::memcpy(first.data(), rows.features.data(), keep * 784 * sizeof(float));
        rows.features = std::move(first);
        rows.labels.resize(keep);
    }
    const std::vector<std::size_t> sizes = {784, 256, 128, 10};
    const tenon::initializer init{tenon::init_scheme::he, tenon::init_distribution::uniform};

    // Reference: one process, the global batch.
    double alone = 0.0;
    std::uint64_t alone_steps = 0;
    if (world.rank() == 0) {
        auto net = tenon::make_mlp<float>(sizes, tenon::activation::relu, init, 3);
        alone = epoch_seconds(net, rows, batch * p, nullptr, alone_steps);
    }
    world.barrier();

    // The team: every rank, the per-rank batch.
    tenon::mpi_team team(world);
    auto net = tenon::make_mlp<float>(sizes, tenon::activation::relu, init, 3);
    std::uint64_t team_steps = 0;
    double team_seconds = epoch_seconds(net, rows, batch, &team, team_steps);
    world.maximum(&team_seconds, 1);
    const bool agree = tenon::weights_agree(net, world);

    // The step's allreduce alone: the fused buffer's size, 50 times.
    const std::size_t values = net.parameter_count() + 5;
    std::vector<float> buffer(values, 1.0f);
    world.barrier();
    const double c0 = now();
    constexpr int repeats = 50;
    for (int k = 0; k < repeats; ++k) world.sum(buffer.data(), buffer.size());
    double allreduce = (now() - c0) / repeats;
    world.maximum(&allreduce, 1);

    if (world.rank() == 0) {
        const double efficiency = alone / (static_cast<double>(p) * team_seconds);
        const double step = team_seconds / static_cast<double>(team_steps);
        const double compute = step - allreduce;
        const double bytes = static_cast<double>(values * sizeof(float));
        std::printf("Fashion-MNIST epoch, %zu rows, 784-256-128-10 relu, Adam, one thread per rank\n", rows.labels.size());
        std::printf("  1 process, batch %zu:        %.3f s (%llu steps)\n", batch * p, alone, static_cast<unsigned long long>(alone_steps));
        std::printf("  %zu ranks, batch %zu each:    %.3f s (%llu steps), weights identical on every rank: %s\n", p, batch, team_seconds,
                    static_cast<unsigned long long>(team_steps), agree ? "yes" : "NO");
        std::printf("  scaling efficiency T1 / (p Tp) = %.3f (speed-up %.2f on %zu ranks)\n", efficiency, alone / team_seconds, p);
        std::printf("  per step: %.3f ms, of which allreduce of %.0f bytes %.3f ms (shared memory), compute %.3f ms\n", step * 1e3, bytes,
                    allreduce * 1e3, compute * 1e3);
        std::printf("ring-allreduce estimate, per-rank batch %zu fixed (weak scaling), compute %.3f ms per step:\n", batch, compute * 1e3);
        std::printf("  ranks   10GbE: comm ms  efficiency   100Gb: comm ms  efficiency\n");
        for (std::size_t ranks : {2, 8, 16, 32, 64}) {
            const double slow = tenon::ring_allreduce_seconds(ranks, bytes, 25e-6, 1.25e9);
            const double fast = tenon::ring_allreduce_seconds(ranks, bytes, 2e-6, 12.5e9);
            std::printf("  %5zu   %13.3f  %10.3f   %14.3f  %10.3f\n", ranks, slow * 1e3, compute / (compute + slow), fast * 1e3,
                        compute / (compute + fast));
        }
    }
    return agree ? 0 : 1;
}
