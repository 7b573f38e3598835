// The `tenon` command-line tool; the logic is in cli.hpp so tests can run it
// in process.
#include <iostream>

#include <unistd.h>

#include "cli.hpp"

int main(int argc, char** argv) {
    tenon_cli::cli_environment env;
    env.terminal = ::isatty(STDOUT_FILENO) != 0;
    return tenon_cli::run_cli(argc, argv, std::cout, std::cerr, env);
}
