// tenon: synchronous data-parallel training over MPI.
//
// Every rank runs the same trainer with the same seed and settings; an
// mpi_team makes the ranks one training team (train/trainer.hpp, "Teams").
// Usually each rank holds only its own shard of the rows:
//
//   tenon::mpi_session session(&argc, &argv);
//   tenon::communicator world;
//   tenon::mpi_team team(world);
//   tenon::mpi_statistics_exchange exchange(world);   // distributed/plan_merge.hpp
//   settings.team = &team;                              // model_settings
//   settings.member_rows = tenon::team_rows::shard_per_member;
//   settings.exchange = &exchange;                      // one plan over all shards
//   auto model = tenon::fit_model<float>(my_table, preparation, my_train, my_validation, settings);
//   if (world.rank() == 0) save(...);                  // every rank holds the same weights
//
//  - Shards (team_rows::shard_per_member): each rank passes only its own
//    rows (e.g. deal_rows of a split, or the part of a file it read) and
//    shuffles them with an engine stream of its own. Step k takes each
//    rank's next batch_size rows, so the global batch is batch_size x ranks
//    rows while every shard lasts; an epoch has as many steps as the largest
//    shard has batches, a rank whose shard is used up joining the remaining
//    steps with no rows (its gradient weighs 0). A rank's prepared matrices
//    hold its shard only; the plan is measured over all shards
//    (measure_plan_across, or fit_model with the exchange).
//  - All rows on every rank (team_rows::all_on_every_member, the trainer's
//    default): every rank passes all rows and shuffles them alike; rank r
//    takes the shuffled positions congruent to r modulo the rank count of
//    each global batch of batch_size x ranks rows.
//  - Equivalence, for a network without dropout or batch normalization and
//    up to the order of the floating-point sums (tests/test_distributed.cpp):
//    with all rows on every rank, p ranks train the weights of one process
//    with batch_size x p, shuffled or not; with shards and without shuffling
//    (training_options::shuffle false), the weights of one process with
//    batch_size x p given the ranks' batches end to end (rank 0's batch 0,
//    rank 1's batch 0, ..., rank 0's batch 1, ...). With shards and
//    shuffling the run is deterministic in seed, rank count and shards, but
//    no single process draws the same batches.
//  - Per step one MPI_Allreduce sums one contiguous buffer: every trainable
//    gradient weighted by the rank's share of the global batch's loss, the
//    weights, the loss, and the divergence, cancellation and time flags.
//    The averaged gradient is the gradient of the global batch's loss.
//  - Validation: each rank scores its validation shard (with all rows on
//    every rank: every p-th validation row); losses and metrics are summed,
//    so early stopping is decided on the same numbers everywhere.
//    Cancellation, the wall-clock budget and the epoch observer stop all
//    ranks when any rank asks.
//  - Failures: before the first step the ranks share whether their own
//    checks failed (rows, options, preparation in fit_model): the failed
//    ranks throw their error, the others train.team.member_failed; then
//    differing settings throw train.team.mismatch everywhere. A rank that
//    fails alone later, while the others may wait in a collective call,
//    must end the job: end_mpi_job (distributed/communicator.hpp), as the
//    tenon tool does.
//  - Dropout draws its masks from each layer's own engine, as alone, for the
//    rows of the rank's share: a rank's masks equal those a single process
//    draws for a batch of batch_size rows, not those it draws for the global
//    batch. Give each rank another dropout seed (seed_dropout_per_rank) so
//    the ranks' masks are independent; without it every rank draws the same
//    mask sequence for different rows.
//  - Batch normalization normalizes with the statistics of the rank's own
//    batch of batch_size rows (not of the global batch), and its running
//    statistics are averaged over the ranks after every epoch.
//
// Cost: each step sends and receives about 2 (p - 1) / p of the gradient's
// bytes per rank with a ring allreduce (Patarasuk & Yuan 2009, "Bandwidth
// optimal all-reduce algorithms for clusters of workstations", JPDC 69(2));
// see bench/bench_distributed.cpp and ring_allreduce_seconds below.
#pragma once

#include <cstddef>
#include <cstdint>
#include <cstring>
#include <string>
#include <vector>

#include "tenon/format/checksum.hpp"
#include "tenon/distributed/communicator.hpp"
#include "tenon/layers/dropout.hpp"
#include "tenon/layers/network.hpp"
#include "tenon/train/trainer.hpp"

TENON_NAMESPACE_BEGIN

/// The ranks of a communicator as a training team.
class mpi_team final : public training_team {
public:
    explicit mpi_team(communicator& c) : comm_(c) {}
    std::size_t member_count() const override { return comm_.size(); }
    std::size_t member_index() const override { return comm_.rank(); }
    void sum(float* values, std::size_t count) override { comm_.sum(values, count); }
    void sum(double* values, std::size_t count) override { comm_.sum(values, count); }
    communicator& world() noexcept { return comm_; }

private:
    communicator& comm_;
};

/// FNV-1a 64 over the bits of every parameter and state buffer in order:
/// equal on two ranks exactly when their networks hold the same bits.
template <class T>
std::uint64_t weights_checksum(network<T>& net) {
    fnv1a_64 h;
    for (const auto* p : net.parameters()) h.add(p->value().data(), p->size() * sizeof(T));
    for (const auto* p : net.state_buffers()) h.add(p->value().data(), p->size() * sizeof(T));
    return h.value();
}

/// Whether every rank's network holds the same bits as rank 0's (collective).
template <class T>
bool weights_agree(network<T>& net, communicator& c) {
    const std::uint64_t mine = weights_checksum(net);
    std::uint64_t low = mine, high = mine;
    c.maximum(&high, 1);
    std::uint64_t negated = ~low;
    c.maximum(&negated, 1);  // max of the complements = complement of the minimum
    return high == ~negated;
}

/// Reseeds every dropout layer's engine of `net` (blocks' layers included)
/// with a stream of its own for this rank, so the ranks draw independent
/// masks. Call on every rank after building the network, before training.
template <class T>
void seed_dropout_per_rank(network<T>& net, std::uint64_t seed, std::size_t rank) {
    std::uint64_t k = 0;
    const auto visit = [&](layer<T>& l, const auto& self) -> void {
        if (auto* d = dynamic_cast<dropout<T>*>(&l)) d->engine().reseed(seed + k, 0xD1D0u + rank);
        ++k;
        if (auto* block = dynamic_cast<residual<T>*>(&l))
            for (std::size_t i = 0; i < block->layer_count(); ++i) self(block->layer_at(i), self);
        if (auto* bypass = dynamic_cast<linear_bypass<T>*>(&l))
            for (std::size_t i = 0; i < bypass->layer_count(); ++i) self(bypass->layer_at(i), self);
    };
    for (std::size_t i = 0; i < net.layer_count(); ++i) visit(net.layer_at(i), visit);
}

/// The rows of `rows` a rank holds when the rows are dealt round robin:
/// rows[rank], rows[rank + ranks], ... (e.g. which rows of a large file a
/// rank reads, or a fleet's simulated devices).
inline std::vector<std::size_t> deal_rows(const std::vector<std::size_t>& rows, std::size_t rank, std::size_t ranks) {
    if (ranks == 0 || rank >= ranks)
        raise(codes::invalid_argument, "deal_rows: rank " + std::to_string(rank) + " of " + std::to_string(ranks) + " ranks");
    std::vector<std::size_t> out;
    out.reserve(rows.size() / ranks + 1);
    for (std::size_t i = rank; i < rows.size(); i += ranks) out.push_back(rows[i]);
    return out;
}

/// The ring-allreduce cost model (Patarasuk & Yuan 2009, section 3; the
/// alpha-beta model of Hockney 1994): with p ranks and n bytes, each rank
/// sends and receives 2 (p - 1) / p x n bytes in 2 (p - 1) steps, so one
/// allreduce takes about
///   2 (p - 1) latency + 2 (p - 1) / p x n / bandwidth   seconds.
/// `latency_seconds` per message and `bytes_per_second` per link are the
/// host's measurements or assumptions.
inline double ring_allreduce_seconds(std::size_t ranks, double bytes, double latency_seconds, double bytes_per_second) {
    if (ranks < 2) return 0.0;
    const double p = static_cast<double>(ranks);
    return 2.0 * (p - 1.0) * latency_seconds + 2.0 * (p - 1.0) / p * bytes / bytes_per_second;
}

TENON_NAMESPACE_END
