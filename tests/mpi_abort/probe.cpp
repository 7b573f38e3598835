// A rank that fails alone must not leave the other ranks waiting in a
// collective call for it. Run under mpirun by tests/mpi_abort/run.cmake,
// which expects the job to end within its timeout. Every rank but rank 1
// waits in an allreduce; rank 1, depending on the mode:
//   none     joins it (the job succeeds: the probe itself works);
//   end-job  calls tenon::end_mpi_job(..., 3) instead (the job ends, status 3);
//   session  throws out of its mpi_session's scope (caught in main): the
//            session ends the job instead of finalizing, which would wait for
//            the others while they wait for rank 1.
#include <cstdio>
#include <stdexcept>
#include <string>

#include <tenon/distributed/communicator.hpp>

int main(int argc, char** argv) {
    const std::string mode = argc > 1 ? argv[1] : "none";
    try {
        tenon::mpi_session session(&argc, &argv);
        tenon::communicator world;
        if (world.rank() == 1 && mode == "end-job") tenon::end_mpi_job("probe: rank 1 fails alone before the collective call", 3);
        if (world.rank() == 1 && mode == "session") throw std::runtime_error("probe: rank 1 fails alone before the collective call");
        double value[1] = {1.0};
        world.sum(value, 1);
        std::printf("probe: rank %zu passed the collective call (sum %g)\n", world.rank(), value[0]);
        std::fflush(stdout);
        return value[0] == static_cast<double>(world.size()) ? 0 : 1;
    } catch (const std::exception& e) {
        // Not reached in mode session: the session's destructor ends the job first.
        std::fprintf(stderr, "probe: caught '%s' after the session was finalized\n", e.what());
        return 2;
    }
}
