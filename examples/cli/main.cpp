// The `tenon` command-line tool; the logic is in cli.hpp so tests can run it
// in process.
#include <iostream>

#ifdef _WIN32
#include <io.h>
#define TENON_CLI_STDOUT_IS_TERMINAL() (::_isatty(::_fileno(stdout)) != 0)
#else
#include <unistd.h>
#define TENON_CLI_STDOUT_IS_TERMINAL() (::isatty(STDOUT_FILENO) != 0)
#endif

#include "cli.hpp"

#if defined(TENON_HAS_MPI)
#include <tenon/distributed/data_parallel.hpp>
#endif

int main(int argc, char** argv) {
    tenon_cli::cli_environment env;
    env.terminal = TENON_CLI_STDOUT_IS_TERMINAL();
#if defined(TENON_HAS_MPI)
    // Under mpirun (`mpirun -np N tenon train ...`) every process trains as
    // one rank of a data-parallel team; started directly, MPI is not touched.
    if (tenon::launched_by_mpi_launcher()) {
        tenon::mpi_session session(&argc, &argv);
        tenon::communicator world;
        tenon::mpi_team team(world);
        env.team = &team;
        if (world.rank() != 0) env.terminal = false;
        const int status = tenon_cli::run_cli(argc, argv, std::cout, std::cerr, env);
        // A failure on any rank fails every rank, so mpirun reports it once.
        int worst = status;
        MPI_Allreduce(&status, &worst, 1, MPI_INT, MPI_MAX, world.handle());
        return worst;
    }
#endif
    return tenon_cli::run_cli(argc, argv, std::cout, std::cerr, env);
}
