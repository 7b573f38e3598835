// The `tenon` command-line tool: forwards argv to run_cli (the tenon_tool
// library, tool.hpp); under mpirun, each process is one rank of a team.
#include <iostream>

#ifdef _WIN32
#include <io.h>
#define TENON_CLI_STDOUT_IS_TERMINAL() (::_isatty(::_fileno(stdout)) != 0)
#else
#include <unistd.h>
#define TENON_CLI_STDOUT_IS_TERMINAL() (::isatty(STDOUT_FILENO) != 0)
#endif

#include "tool.hpp"

#if defined(TENON_HAS_MPI)
#include <tenon/distributed/data_parallel.hpp>
#include <tenon/distributed/plan_merge.hpp>
#endif

int main(int argc, char** argv) {
    tenon_cli::cli_environment env;
    env.terminal = TENON_CLI_STDOUT_IS_TERMINAL();
    // SIGINT, SIGTERM, SIGHUP: the run's temporary files are removed and the
    // process ends by the same signal (output_files.hpp); no output changes.
    tenon_cli::files::remove_temporaries_on_signals();
#if defined(TENON_HAS_MPI)
    // Under mpirun (`mpirun -np N tenon train ...`) every process trains as
    // one rank of a data-parallel team, holding its share of the rows;
    // started directly, MPI is not touched.
    if (tenon::launched_by_mpi_launcher()) {
        tenon::mpi_session session(&argc, &argv);
        tenon::communicator world;
        tenon::mpi_team team(world);
        tenon::mpi_statistics_exchange exchange(world);
        env.team = &team;
        env.exchange = &exchange;
        // A failure on one rank while the ranks train: the others may wait
        // for it in a collective call, so the whole job ends.
        env.end_job = [](const std::string& message, int status) { tenon::end_mpi_job(message, status); };
        if (world.rank() != 0) env.terminal = false;
        int status = tenon_cli::exit_unexpected;
        try {
            status = tenon_cli::run_cli(argc, argv, std::cout, std::cerr, env);
        } catch (...) {  // run_cli reports what it knows; anything else ends the job
            tenon::end_mpi_job("tenon: unexpected failure", tenon_cli::exit_unexpected);
        }
        // Every rank is here, outside any collective call of the training:
        // a failure on any rank fails every rank, so mpirun reports it once.
        std::cout.flush();
        int worst = status;
        MPI_Allreduce(&status, &worst, 1, MPI_INT, MPI_MAX, world.handle());
        return worst;
    }
#endif
    return tenon_cli::run_cli(argc, argv, std::cout, std::cerr, env);
}
