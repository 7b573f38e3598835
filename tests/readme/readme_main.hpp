// The frame around README.md's C++ examples (extract_blocks.cmake): writes
// the CSV files the examples read into a scratch directory, runs each
// example there, and reports the first failure with the README line of the
// example that threw.
#pragma once

#include <cstdio>
#include <cstdlib>
#include <exception>
#include <filesystem>
#include <string>

#include "press_data.hpp"

namespace readme_test {

struct example {
    int number;
    void (*run)();
};

template <std::size_t N>
int run(const example (&examples)[N], const char* const* csv_files) {
    namespace fs = std::filesystem;
    const fs::path dir = fs::temp_directory_path() / "tenon_readme_examples";
    std::error_code ec;
    fs::remove_all(dir, ec);
    fs::create_directories(dir);
    fs::current_path(dir);
    std::uint64_t seed = 1;
    for (const char* const* name = csv_files; *name; ++name) {
        write_press_log(*name, 600, seed++);
        std::printf("wrote %s\n", *name);
    }
    int failures = 0;
    for (const auto& e : examples) {
        std::printf("README example %d\n", e.number);
        std::fflush(stdout);
        try {
            e.run();
        } catch (const std::exception& x) {
            std::fprintf(stderr, "README example %d failed: %s\n", e.number, x.what());
            ++failures;
        }
    }
    fs::current_path(dir.parent_path());
    fs::remove_all(dir, ec);
    std::printf("%zu README examples, %d failed\n", N, failures);
    return failures == 0 ? EXIT_SUCCESS : EXIT_FAILURE;
}

}  // namespace readme_test
