// What the tests of the `tenon` tool share: running it in process and a
// scratch directory per test case.
#pragma once

#include <algorithm>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>
#include <system_error>
#include <vector>

#include <cli/cli.hpp>

namespace cli_test {

struct cli_result {
    int status = -1;
    std::string out, err;
};

/// Runs `tenon args...` in process with the given environment.
inline cli_result run_tool(std::vector<std::string> args, const tenon_cli::cli_environment& env = {}) {
    args.insert(args.begin(), "tenon");
    std::vector<char*> argv;
    for (auto& a : args) argv.push_back(a.data());
    std::ostringstream out, err;
    cli_result r;
    r.status = tenon_cli::run_cli(static_cast<int>(argv.size()), argv.data(), out, err, env);
    r.out = out.str();
    r.err = err.str();
    return r;
}

/// A fresh, empty directory per test case, removed at the end:
/// <temp>/<prefix><name>.
class scratch_dir {
public:
    scratch_dir(const std::string& prefix, const std::string& name) : path_(std::filesystem::temp_directory_path() / (prefix + name)) {
        std::filesystem::remove_all(path_);
        std::filesystem::create_directories(path_);
    }
    ~scratch_dir() {
        std::error_code ec;
        std::filesystem::remove_all(path_, ec);
    }
    scratch_dir(const scratch_dir&) = delete;
    scratch_dir& operator=(const scratch_dir&) = delete;
    std::string file(const std::string& name) const { return (path_ / name).string(); }
    std::string write(const std::string& name, const std::string& content) const {
        std::ofstream(file(name), std::ios::binary) << content;
        return file(name);
    }
    std::vector<std::string> listing() const {
        std::vector<std::string> names;
        for (const auto& e : std::filesystem::directory_iterator(path_)) names.push_back(e.path().filename().string());
        std::sort(names.begin(), names.end());
        return names;
    }

private:
    std::filesystem::path path_;
};

inline std::string read_file(const std::string& path) {
    std::ifstream in(path, std::ios::binary);
    std::ostringstream s;
    s << in.rdbuf();
    return s.str();
}

}  // namespace cli_test
