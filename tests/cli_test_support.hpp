// What the tests of the `tenon` tool share: running it in process and a
// scratch directory per test case.
#pragma once

#include <algorithm>
#include <filesystem>
#include <fstream>
#include <map>
#include <sstream>
#include <stdexcept>
#include <string>
#include <system_error>
#include <vector>

#include <unistd.h>

#include <tenon/tenon.hpp>

#include <cli/tool.hpp>

namespace cli_test {

/// Puts the best built-in kernel path in force for its lifetime. With the
/// BLAS backend a product's bits are the BLAS's: they may change with the
/// rows per call (OpenBLAS picks a small-matrix kernel by size on some CPUs)
/// and with the thread count, so a comparison to the last bit between runs
/// that batch or split differently holds on the built-in kernels only.
struct on_builtin_kernels {
    tenon::kernel_path saved = tenon::active_kernel_path();
    on_builtin_kernels() { tenon::set_kernel_path(tenon::best_builtin_kernel_path()); }
    ~on_builtin_kernels() { tenon::set_kernel_path(saved); }
    on_builtin_kernels(const on_builtin_kernels&) = delete;
    on_builtin_kernels& operator=(const on_builtin_kernels&) = delete;
};

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
/// <temp>/<prefix><name>-<process id>. The process id keeps two test runs
/// on one machine (two worktrees) from removing each other's files.
class scratch_dir {
public:
    scratch_dir(const std::string& prefix, const std::string& name)
        : path_(std::filesystem::temp_directory_path() / (prefix + name + "-" + std::to_string(static_cast<long>(::getpid())))) {
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

/// A minimal JSON reader for the tool's metrics files: flattens every
/// scalar into "path.to.key" -> its text ("null" for null; array items by
/// index).
class json_flattener {
public:
    explicit json_flattener(const std::string& text) : s_(text) {
        value("");
        blank();
        if (p_ != s_.size()) throw std::runtime_error("trailing text in JSON at " + std::to_string(p_));
    }
    std::map<std::string, std::string> values;

private:
    void blank() {
        while (p_ < s_.size() && (s_[p_] == ' ' || s_[p_] == '\n' || s_[p_] == '\r' || s_[p_] == '\t')) ++p_;
    }
    void expect(char c) {
        blank();
        if (p_ >= s_.size() || s_[p_] != c) throw std::runtime_error(std::string("JSON: expected '") + c + "' at " + std::to_string(p_));
        ++p_;
    }
    std::string string_token() {
        expect('"');
        std::string out;
        while (p_ < s_.size() && s_[p_] != '"') {
            if (s_[p_] == '\\') {
                ++p_;
                const char e = s_.at(p_);
                if (e == 'u') {
                    out += static_cast<char>(std::stoi(s_.substr(p_ + 1, 4), nullptr, 16));
                    p_ += 4;
                } else {
                    out += e == 'n' ? '\n' : e == 't' ? '\t' : e == 'r' ? '\r' : e == 'b' ? '\b' : e == 'f' ? '\f' : e;
                }
                ++p_;
            } else {
                out += s_[p_++];
            }
        }
        expect('"');
        return out;
    }
    void value(const std::string& path) {
        blank();
        const char c = s_.at(p_);
        if (c == '{') {
            ++p_;
            blank();
            if (s_.at(p_) == '}') {
                ++p_;
                return;
            }
            for (;;) {
                const std::string key = string_token();
                expect(':');
                value(path.empty() ? key : path + "." + key);
                blank();
                if (s_.at(p_) == ',') {
                    ++p_;
                    continue;
                }
                expect('}');
                return;
            }
        }
        if (c == '[') {
            ++p_;
            blank();
            if (s_.at(p_) == ']') {
                ++p_;
                return;
            }
            for (std::size_t k = 0;; ++k) {
                value(path + "." + std::to_string(k));
                blank();
                if (s_.at(p_) == ',') {
                    ++p_;
                    continue;
                }
                expect(']');
                return;
            }
        }
        if (c == '"') {
            values[path] = string_token();
            return;
        }
        const std::size_t start = p_;
        while (p_ < s_.size() && std::string(",}] \n\r\t").find(s_[p_]) == std::string::npos) ++p_;
        values[path] = s_.substr(start, p_ - start);
    }
    const std::string& s_;
    std::size_t p_ = 0;
};

}  // namespace cli_test
