// Fuzz target: the command-line tool's argument handling, through its
// public entry tenon_cli::run_cli (examples/cli/tool.hpp, the tenon_tool library). The input is the
// argument list, one argument per line. The tool must answer every list
// with an exit status and messages; it must never crash, throw, or write
// outside its working directory.
//
// It works in a sandbox directory restored before each input, and skips
// inputs whose cost is the user's request (many epochs, folds, threads,
// networks or a search). The sandbox and the cost guard: docs/design/tests.md.
#include <algorithm>
#include <charconv>
#include <cstddef>
#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <sstream>
#include <string>
#include <system_error>
#include <vector>

#include "cli/tool.hpp"

namespace {

struct sandbox {
    std::filesystem::path directory;
    std::string data_csv;
    std::string model_bytes;

    sandbox() {
        std::string pattern = (std::filesystem::temp_directory_path() / "tenon-fuzz-cli-XXXXXX").string();
        if (!::mkdtemp(pattern.data())) std::abort();
        directory = pattern;
        std::filesystem::current_path(directory);
        std::ostringstream csv;
        csv << "flow,head,fluid,day,line,power,condition\n";
        const char* fluids[] = {"water", "glycol", "brine"};
        const char* conditions[] = {"ok", "worn", "cavitating"};
        for (int i = 0; i < 40; ++i) {
            const int flow = 20 + (i * 37) % 100, head = 5 + (i * 13) % 35;
            csv << flow << "," << head << "," << fluids[i % 3] << ",2024-01-" << (10 + i % 20) << "," << (i % 4) << "," << (flow * head) / 250.0
                << "," << conditions[(i / 2) % 3] << "\n";
        }
        data_csv = csv.str();
        std::ifstream fixture(std::string(TENON_SOURCE_DIR) + "/tests/fixtures/deploy/pump_v1_float.tnm", std::ios::binary);
        model_bytes.assign(std::istreambuf_iterator<char>(fixture), std::istreambuf_iterator<char>());
        if (model_bytes.empty()) std::abort();
    }

    ~sandbox() {
        std::error_code ignored;
        std::filesystem::current_path(directory.parent_path(), ignored);
        std::filesystem::remove_all(directory, ignored);
    }

    void reset() const {
        for (const auto& entry : std::filesystem::directory_iterator(directory)) {
            const std::string name = entry.path().filename().string();
            if (name != "data.csv" && name != "model.tnm") std::filesystem::remove_all(entry.path());
        }
        std::ofstream(directory / "data.csv", std::ios::binary | std::ios::trunc) << data_csv;
        std::ofstream(directory / "model.tnm", std::ios::binary | std::ios::trunc) << model_bytes;
    }
};

bool number_above(const std::string& text, std::uint64_t limit) {
    std::uint64_t v = 0;
    const auto r = std::from_chars(text.data(), text.data() + text.size(), v);
    return r.ec == std::errc::result_out_of_range || (r.ec == std::errc() && v > limit);
}

std::uint64_t number_or(const std::string& text, std::uint64_t fallback) {
    std::uint64_t v = 0;
    const auto r = std::from_chars(text.data(), text.data() + text.size(), v);
    return r.ec == std::errc() ? v : fallback;
}

bool too_costly(const std::vector<std::string>& args) {
    const bool train = args.size() > 1 && args[1] == "train";
    bool epochs_given = false;
    std::uint64_t epochs = 1, networks = 5, folds = 1;
    for (std::size_t k = 0; k < args.size(); ++k) {
        const std::string& a = args[k];
        const auto eq = a.find('=');
        const std::string name = a.substr(0, eq);
        const std::string value = eq != std::string::npos ? a.substr(eq + 1) : (k + 1 < args.size() ? args[k + 1] : "");
        if (name == "--epochs" && number_above(value, 20)) return true;
        if (name == "--folds" && number_above(value, 5)) return true;
        if (name == "--ensemble" && number_above(value, 100)) return true;
        if (name == "--epochs") epochs_given = true, epochs = number_or(value, 1);
        if (name == "--ensemble") networks = number_or(value, 1);
        if (name == "--folds") folds = number_or(value, 1);
        if (name == "--search" && number_or(value, 0) > 0) return true;
        if (name == "--threads" && number_above(value, 2)) return true;
        if (name == "--hidden") {
            std::size_t layers = 0, start = 0;
            for (;;) {
                const auto comma = value.find(',', start);
                ++layers;
                if (number_above(value.substr(start, comma - start), 64)) return true;
                if (comma == std::string::npos) break;
                start = comma + 1;
            }
            if (layers > 4) return true;
        }
    }
    if (!train) return false;
    return !epochs_given || epochs * networks * std::max<std::uint64_t>(folds, 1) > 100;
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
    static const sandbox box;
    if (size > 4096) return 0;
    std::vector<std::string> args{"tenon"};
    std::string current;
    for (std::size_t i = 0; i <= size; ++i) {
        if (i == size || data[i] == '\n') {
            args.push_back(current.c_str());  // what the tool sees of it: argv holds C strings
            current.clear();
        } else {
            current += data[i] == '/' ? '_' : static_cast<char>(data[i]);
        }
    }
    if (args.size() > 1 && args.back().empty()) args.pop_back();  // a final newline ends the list
    if (args.size() > 40 || too_costly(args)) return 0;
    box.reset();
    std::vector<char*> argv;
    for (auto& a : args) argv.push_back(a.data());
    argv.push_back(nullptr);
    std::ostringstream out, err;
    tenon_cli::cli_environment env;
    env.clock = [] { return 0.0; };
    const int status = tenon_cli::run_cli(static_cast<int>(args.size()), argv.data(), out, err, env);
    // Every documented status is an answer (success, bad input, an output
    // not written, a retrain that kept the incumbent, drift flagged);
    // exit_unexpected means the tool met something it did not expect, which
    // is a finding, and so is any other number.
    const bool documented = status == tenon_cli::exit_success || status == tenon_cli::exit_bad_input || status == tenon_cli::exit_output_failed ||
        status == tenon_cli::exit_kept_incumbent || status == tenon_cli::exit_drift_flagged;
    if (!documented) {
        std::fprintf(stderr, "run_cli exit status %d: %s\n", status, err.str().c_str());
        std::abort();
    }
    return 0;
}
