// Shared helpers of the prep/ tests.
#pragma once

#include <cstdio>
#include <fstream>
#include <string>

#include <tenon/core/error.hpp>

namespace prep_test {

/// Runs f and returns the code of the tenon::error it throws ("no error" if
/// it throws none); the full what() goes to *message.
template <class F>
std::string error_code_of(F&& f, std::string* message = nullptr) {
    try {
        f();
    } catch (const tenon::error& e) {
        if (message) *message = e.what();
        return e.code();
    }
    return "no error";
}

/// A file in the system temp folder, removed when the object goes away.
struct temp_file {
    std::string path;
    explicit temp_file(const std::string& name, const std::string& contents = {}) : path(std::string(P_tmpdir) + "/tenon_prep_test_" + name) {
        std::ofstream out(path, std::ios::binary);
        out << contents;
    }
    ~temp_file() { std::remove(path.c_str()); }
    temp_file(const temp_file&) = delete;
    temp_file& operator=(const temp_file&) = delete;
};

}  // namespace prep_test
