// tenon: a thin, checked layer over an MPI communicator.
//
// tenon carries no transport of its own: processes talk through MPI, linked
// through the optional CMake component tenon::mpi (TENON_HAS_MPI); the core
// library never includes this folder. Every failing call raises
// distributed.mpi.failed naming the MPI call and MPI's message (the
// communicator uses MPI_ERRORS_RETURN). A failure on one rank alone must end
// the whole job (end_mpi_job), since MPI's collective calls have no timeout.
// Usage and the reasoning: docs/design/distributed.md.
#pragma once

#include <cstddef>
#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <exception>
#include <limits>
#include <string>
#include <vector>

#include <mpi.h>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {

inline void check_mpi(int status, const char* call) {
    if (status == MPI_SUCCESS) return;
    char text[MPI_MAX_ERROR_STRING];
    int length = 0;
    if (MPI_Error_string(status, text, &length) != MPI_SUCCESS) length = 0;
    raise(codes::distributed_mpi_failed,
          std::string(call) +
              " failed: " + (length > 0 ? std::string(text, static_cast<std::size_t>(length)) : std::string("error ") + std::to_string(status)));
}

inline int mpi_count(std::size_t n, const char* call) {
    if (n > static_cast<std::size_t>(std::numeric_limits<int>::max()))
        raise(codes::distributed_mpi_failed, std::string(call) + ": " + std::to_string(n) + " elements exceed MPI's int count");
    return static_cast<int>(n);
}

template <class T>
MPI_Datatype mpi_type();
template <>
inline MPI_Datatype mpi_type<float>() {
    return MPI_FLOAT;
}
template <>
inline MPI_Datatype mpi_type<double>() {
    return MPI_DOUBLE;
}
template <>
inline MPI_Datatype mpi_type<std::uint64_t>() {
    return MPI_UINT64_T;
}

}  // namespace detail

/// Whether this process was started by an MPI launcher (mpirun / mpiexec of
/// Open MPI or MPICH, or srun with PMI): the environment names a world size.
inline bool launched_by_mpi_launcher() {
    for (const char* name : {"OMPI_COMM_WORLD_SIZE", "PMI_SIZE", "PMIX_RANK", "MPI_LOCALNRANKS"})
        if (std::getenv(name) != nullptr) return true;
    return false;
}

/// Ends every process of the MPI job from this one: prints `message` (when
/// not empty) to standard error as "rank R: message", then calls MPI_Abort
/// on MPI_COMM_WORLD with `status`, which mpirun reports as the job's exit
/// status. For a failure on this rank while other ranks may be waiting in a
/// collective call for it. Without MPI initialized (or after MPI_Finalize)
/// it exits this process with `status`. Does not return.
[[noreturn]] inline void end_mpi_job(const std::string& message, int status = 1) noexcept {
    int initialized = 0, finalized = 0, rank = -1;
    const bool running = MPI_Initialized(&initialized) == MPI_SUCCESS && initialized && MPI_Finalized(&finalized) == MPI_SUCCESS && !finalized;
    if (running && MPI_Comm_rank(MPI_COMM_WORLD, &rank) != MPI_SUCCESS) rank = -1;
    if (!message.empty()) {
        if (rank >= 0)
            std::fprintf(stderr, "rank %d: %s\n", rank, message.c_str());
        else
            std::fprintf(stderr, "%s\n", message.c_str());
    }
    std::fflush(stdout);
    std::fflush(stderr);
    if (running) MPI_Abort(MPI_COMM_WORLD, status);
    std::_Exit(status);  // MPI_Abort does not return; without MPI, this process alone ends
}

/// Initializes MPI for the lifetime of the object when nobody has (a host
/// that initializes MPI itself keeps doing so), and finalizes it only if it
/// initialized it. Asks for MPI_THREAD_FUNNELED: tenon's worker threads
/// never call MPI, only the thread that trains does.
///
/// When the session initialized MPI and an exception leaves its scope (the
/// destructor runs during stack unwinding), it ends the whole job with
/// end_mpi_job(status 1) instead of finalizing: finalizing would wait for
/// the other ranks, which may be waiting for this one. (An exception that no
/// handler catches ends the process without unwinding; mpirun then ends the
/// job as for any rank that dies.)
class mpi_session {
public:
    mpi_session() : mpi_session(nullptr, nullptr) {}
    mpi_session(int* argc, char*** argv) : unwinding_at_start_(std::uncaught_exceptions()) {
        int initialized = 0;
        detail::check_mpi(MPI_Initialized(&initialized), "MPI_Initialized");
        if (initialized) return;
        int provided = 0;
        detail::check_mpi(MPI_Init_thread(argc, argv, MPI_THREAD_FUNNELED, &provided), "MPI_Init_thread");
        owner_ = true;
    }
    mpi_session(const mpi_session&) = delete;
    mpi_session& operator=(const mpi_session&) = delete;
    ~mpi_session() {
        int finalized = 0;
        if (!owner_ || MPI_Finalized(&finalized) != MPI_SUCCESS || finalized) return;
        if (std::uncaught_exceptions() > unwinding_at_start_)
            end_mpi_job("an exception left the scope of the MPI session; ending the job so that no rank waits for this one", 1);
        MPI_Finalize();
    }
    /// Whether this object called MPI_Init (and will call MPI_Finalize).
    bool owns_mpi() const noexcept { return owner_; }

private:
    int unwinding_at_start_ = 0;
    bool owner_ = false;
};

/// A communicator (by default MPI_COMM_WORLD) with checked collectives on
/// the types tenon needs. It does not own the MPI_Comm.
class communicator {
public:
    explicit communicator(MPI_Comm comm = MPI_COMM_WORLD) : comm_(comm) {
        int initialized = 0;
        detail::check_mpi(MPI_Initialized(&initialized), "MPI_Initialized");
        if (!initialized) raise(codes::distributed_mpi_failed, "communicator: MPI is not initialized (create an mpi_session first)");
        detail::check_mpi(MPI_Comm_set_errhandler(comm_, MPI_ERRORS_RETURN), "MPI_Comm_set_errhandler");
        int r = 0, s = 0;
        detail::check_mpi(MPI_Comm_rank(comm_, &r), "MPI_Comm_rank");
        detail::check_mpi(MPI_Comm_size(comm_, &s), "MPI_Comm_size");
        rank_ = static_cast<std::size_t>(r);
        size_ = static_cast<std::size_t>(s);
    }

    std::size_t rank() const noexcept { return rank_; }
    std::size_t size() const noexcept { return size_; }
    MPI_Comm handle() const noexcept { return comm_; }

    /// Elementwise sum over all ranks, in place (MPI_Allreduce). Every rank
    /// gets the same bits: the MPI standard's advice to implementors for
    /// MPI_Reduce asks for the same result on the same arguments in the same
    /// order (MPI 4.0, section 6.9.1, from memory), and Open MPI's
    /// allreduce algorithms reduce each element once and then distribute it;
    /// tests/test_distributed.cpp checks every rank's weights after every epoch.
    template <class T>
    void sum(T* values, std::size_t count) {
        if (count == 0 || size_ == 1) return;
        detail::check_mpi(MPI_Allreduce(MPI_IN_PLACE, values, detail::mpi_count(count, "MPI_Allreduce"), detail::mpi_type<T>(), MPI_SUM, comm_),
                          "MPI_Allreduce");
    }
    /// Elementwise maximum over all ranks, in place.
    template <class T>
    void maximum(T* values, std::size_t count) {
        if (count == 0 || size_ == 1) return;
        detail::check_mpi(MPI_Allreduce(MPI_IN_PLACE, values, detail::mpi_count(count, "MPI_Allreduce"), detail::mpi_type<T>(), MPI_MAX, comm_),
                          "MPI_Allreduce");
    }

    void barrier() { detail::check_mpi(MPI_Barrier(comm_), "MPI_Barrier"); }

    /// Rank `root`'s bytes, on every rank.
    std::vector<std::uint8_t> broadcast(std::vector<std::uint8_t> bytes, std::size_t root = 0) {
        std::uint64_t n = bytes.size();
        detail::check_mpi(MPI_Bcast(&n, 1, MPI_UINT64_T, static_cast<int>(root), comm_), "MPI_Bcast");
        bytes.resize(static_cast<std::size_t>(n));
        if (n > 0)
            detail::check_mpi(MPI_Bcast(bytes.data(), detail::mpi_count(bytes.size(), "MPI_Bcast"), MPI_BYTE, static_cast<int>(root), comm_),
                              "MPI_Bcast");
        return bytes;
    }

    /// Every rank's bytes, in rank order, on every rank.
    std::vector<std::vector<std::uint8_t>> gather_all(const std::vector<std::uint8_t>& mine) { return gather(mine, true, 0); }

    /// Every rank's bytes, in rank order, on `root` (other ranks get an empty list).
    std::vector<std::vector<std::uint8_t>> gather_at(const std::vector<std::uint8_t>& mine, std::size_t root = 0) {
        return gather(mine, false, root);
    }

private:
    std::vector<std::vector<std::uint8_t>> gather(const std::vector<std::uint8_t>& mine, bool everywhere, std::size_t root) {
        const int n = detail::mpi_count(mine.size(), "MPI_Allgather");
        std::vector<int> sizes(size_), offsets(size_);
        detail::check_mpi(MPI_Allgather(&n, 1, MPI_INT, sizes.data(), 1, MPI_INT, comm_), "MPI_Allgather");
        std::size_t total = 0;
        for (std::size_t r = 0; r < size_; ++r) {
            offsets[r] = detail::mpi_count(total, "MPI_Gatherv");
            total += static_cast<std::size_t>(sizes[r]);
        }
        detail::mpi_count(total, "MPI_Gatherv");
        const bool receive = everywhere || rank_ == root;
        std::vector<std::uint8_t> all(receive ? total : 0);
        if (everywhere) {
            detail::check_mpi(MPI_Allgatherv(mine.data(), n, MPI_BYTE, all.data(), sizes.data(), offsets.data(), MPI_BYTE, comm_), "MPI_Allgatherv");
        } else {
            detail::check_mpi(
                MPI_Gatherv(mine.data(), n, MPI_BYTE, all.data(), sizes.data(), offsets.data(), MPI_BYTE, static_cast<int>(root), comm_),
                "MPI_Gatherv");
        }
        std::vector<std::vector<std::uint8_t>> out;
        if (!receive) return out;
        out.reserve(size_);
        for (std::size_t r = 0; r < size_; ++r) out.emplace_back(all.begin() + offsets[r], all.begin() + offsets[r] + sizes[r]);
        return out;
    }

    MPI_Comm comm_;
    std::size_t rank_ = 0, size_ = 1;
};

TENON_NAMESPACE_END
