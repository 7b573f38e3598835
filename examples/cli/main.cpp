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

int main(int argc, char** argv) {
    tenon_cli::cli_environment env;
    env.terminal = TENON_CLI_STDOUT_IS_TERMINAL();
    return tenon_cli::run_cli(argc, argv, std::cout, std::cerr, env);
}
