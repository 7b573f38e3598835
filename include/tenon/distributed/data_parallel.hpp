// tenon: synchronous data-parallel training over MPI.
//
// Every rank runs the same trainer with the same seed and settings; an
// mpi_team makes the ranks one training team (docs/design/trainer.md,
// "Teams"). Each rank holds its own shard of the rows, or all rows; per step
// one MPI_Allreduce sums the weighted gradients and the run's flags, so every
// rank takes the same step and the same stop decision and ends with the same
// weights. Usage, equivalence with one process, failures, dropout, batch
// normalization and the cost of a step (a ring allreduce, Patarasuk & Yuan
// 2009): docs/design/distributed.md.
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
        raise(codes::core_argument_invalid, "deal_rows: rank " + std::to_string(rank) + " of " + std::to_string(ranks) + " ranks");
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
