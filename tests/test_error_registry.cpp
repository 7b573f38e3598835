// The error-code registry against the documentation and the tests: every
// code in core/error_codes.hpp, and every code of the command-line tool
// (examples/cli/cli.hpp, namespace cli_codes), must have a row in one of the
// README's bad-input tables and a test that triggers it (the code as a
// string literal in a test source, "code" or "[code] message"); every row
// must name a code that exists. Adding a code without a row or a test fails
// here. The files are read from TENON_SOURCE_DIR at run time.
#include <doctest/doctest.h>

#include <algorithm>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <map>
#include <set>
#include <sstream>
#include <string>
#include <vector>

#include <tenon/core/error_codes.hpp>

#include "cli/cli.hpp"

namespace {

std::string read_text(const std::filesystem::path& p) {
    std::ifstream in(p, std::ios::binary);
    REQUIRE_MESSAGE(in, "cannot read " << p.string());
    return std::string(std::istreambuf_iterator<char>(in), std::istreambuf_iterator<char>());
}

std::vector<std::string> lines_of(const std::string& text) {
    std::vector<std::string> lines;
    std::istringstream in(text);
    for (std::string line; std::getline(in, line);) lines.push_back(line);
    return lines;
}

// The README's table rows "| `code` | when | what happens |", by code, with
// the number of non-empty cells.
std::map<std::string, std::size_t> readme_rows(const std::string& readme) {
    std::map<std::string, std::size_t> rows;
    for (const auto& line : lines_of(readme)) {
        if (line.rfind("| `", 0) != 0) continue;
        const auto end = line.find('`', 3);
        if (end == std::string::npos) continue;
        const std::string code = line.substr(3, end - 3);
        std::size_t cells = 0;
        std::size_t start = 1;
        for (std::size_t bar = line.find('|', start); bar != std::string::npos; bar = line.find('|', start)) {
            if (line.find_first_not_of(' ', start) < bar) ++cells;
            start = bar + 1;
        }
        rows[code] = cells;
    }
    return rows;
}

// The tool's codes: `inline constexpr const char* name = "cli.x.y";` lines.
std::vector<std::string> cli_codes_in(const std::string& source) {
    std::vector<std::string> found;
    for (const auto& line : lines_of(source)) {
        if (line.find("inline constexpr const char*") == std::string::npos) continue;
        const auto open = line.find("\"cli.");
        if (open == std::string::npos) continue;
        const auto close = line.find('"', open + 1);
        found.push_back(line.substr(open + 1, close - open - 1));
    }
    return found;
}

std::string test_sources() {
    std::string all;
    for (const auto& entry : std::filesystem::directory_iterator(std::filesystem::path(TENON_SOURCE_DIR) / "tests")) {
        const auto ext = entry.path().extension().string();
        if (entry.is_regular_file() && (ext == ".cpp" || ext == ".hpp"))
            all += read_text(entry.path());
    }
    return all;
}

bool triggered_in(const std::string& sources, const std::string& code) {
    return sources.find('"' + code + '"') != std::string::npos || sources.find("\"[" + code + "] ") != std::string::npos;
}

}  // namespace

TEST_CASE("every error code has a README row and a test that triggers it, and every row names a code") {
    const std::filesystem::path root(TENON_SOURCE_DIR);
    const auto rows = readme_rows(read_text(root / "README.md"));
    const std::string sources = test_sources();
    std::vector<std::string> library, tool = cli_codes_in(read_text(root / "examples" / "cli" / "cli.hpp"));
    for (auto e = tenon::error_registry_begin(); e != tenon::error_registry_end(); ++e) library.emplace_back(e->code);
    REQUIRE(library.size() >= 70);
    REQUIRE(tool.size() >= 10);

    std::set<std::string> known;
    for (const auto* list : {&library, &tool})
        for (const auto& code : *list) {
            INFO("error code " << code);
            CHECK_MESSAGE(known.insert(code).second, "listed twice");
            const auto row = rows.find(code);
            CHECK_MESSAGE(row != rows.end(), "no row in README.md's bad-input tables");
            if (row != rows.end()) CHECK_MESSAGE(row->second == 3, "the row needs three cells: code | when | what happens");
            CHECK_MESSAGE(triggered_in(sources, code), "no test under tests/ checks it (as \"code\" or \"[code] message\")");
        }
    for (const auto& row : rows) {
        INFO("README row " << row.first);
        CHECK_MESSAGE(known.count(row.first) == 1, "names no code of the registry or the tool");
    }
}

TEST_CASE("the registry's codes are unique, dotted names starting with their area, each with a meaning") {
    std::set<std::string> seen;
    for (auto e = tenon::error_registry_begin(); e != tenon::error_registry_end(); ++e) {
        const std::string code = e->code;
        INFO(code);
        CHECK(seen.insert(code).second);
        CHECK(std::count(code.begin(), code.end(), '.') >= 1);
        CHECK(code.find_first_not_of("abcdefghijklmnopqrstuvwxyz0123456789._") == std::string::npos);
        CHECK(std::string(e->meaning).size() > 10);
    }
}

// The one tool code no other test triggered when the registry test came.
TEST_CASE("an unknown subcommand is refused with cli.command.unknown and exit status 2") {
    std::string program = "tenon", command = "calibrate";
    char* argv[] = {program.data(), command.data(), nullptr};
    std::ostringstream out, err;
    CHECK(tenon_cli::run_cli(2, argv, out, err, {}) == tenon_cli::exit_bad_input);
    CHECK(err.str().rfind("tenon: error: ", 0) == 0);
    CHECK(err.str().find("[cli.command.unknown] unknown command 'calibrate' (commands: train, infer") != std::string::npos);
}
