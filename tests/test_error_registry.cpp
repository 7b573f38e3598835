// The error-code registry against the documentation and the tests: every
// code in core/error_codes.hpp, and every code of the command-line tool
// (examples/cli/tool.hpp, namespace cli_codes), must have a row in one of the
// README's bad-input tables and a test that triggers it; every row must name
// a code that exists. Adding a code without a row or a test fails here. The
// files are read from TENON_SOURCE_DIR at run time. "A test that triggers
// it" is an assertion on the code an error carried; what counts as one:
// docs/design/tests.md.
#include <doctest/doctest.h>

#include <algorithm>
#include <cctype>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <map>
#include <set>
#include <sstream>
#include <string>
#include <vector>

#include <tenon/core/error_codes.hpp>

#include "cli/tool.hpp"

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

// The source with the contents of comments and of string and character
// literals replaced by spaces (a literal keeps its quotes; every character
// keeps its position), so that the brackets, operators and statement ends
// around a literal can be read without a literal's own text getting in the way.
std::string code_only(const std::string& s) {
    std::string c = s;
    enum class in { code, line_comment, block_comment, string, character } state = in::code;
    for (std::size_t i = 0; i < s.size(); ++i) {
        const char ch = s[i], next = i + 1 < s.size() ? s[i + 1] : '\0';
        switch (state) {
        case in::code:
            if (ch == '/' && next == '/')
                state = in::line_comment, c[i] = ' ';
            else if (ch == '/' && next == '*')
                state = in::block_comment, c[i] = ' ';
            else if (ch == '"' && i > 0 && s[i - 1] == 'R') {
                // A raw string R"delimiter( ... )delimiter": blanked up to its end.
                const std::size_t open = s.find('(', i);
                const std::string end = ")" + s.substr(i + 1, open - i - 1) + "\"";
                const std::size_t close = s.find(end, open);
                const std::size_t last = close == std::string::npos ? s.size() : close + end.size() - 1;
                for (std::size_t k = i + 1; k < last; ++k)
                    if (c[k] != '\n') c[k] = ' ';
                i = last;
            } else if (ch == '"')
                state = in::string;
            // A quote after a digit separates digits (1'000), it opens no literal.
            else if (ch == '\'' && !(i > 0 && std::isxdigit(static_cast<unsigned char>(s[i - 1]))))
                state = in::character;
            break;
        case in::line_comment:
            if (ch == '\n')
                state = in::code;
            else
                c[i] = ' ';
            break;
        case in::block_comment:
            if (ch == '*' && next == '/')
                c[i] = c[i + 1] = ' ', ++i, state = in::code;
            else if (ch != '\n')
                c[i] = ' ';
            break;
        case in::string:
        case in::character:
            if (ch == '\\') {
                c[i] = ' ';
                if (i + 1 < s.size()) c[++i] = ' ';
            } else if (ch == (state == in::string ? '"' : '\'')) {
                state = in::code;
            } else {
                c[i] = ' ';
            }
            break;
        }
    }
    return c;
}

// The identifier that ends just before position `end` (spaces skipped).
std::string name_before(const std::string& c, std::size_t end) {
    while (end > 0 && std::isspace(static_cast<unsigned char>(c[end - 1]))) --end;
    std::size_t start = end;
    while (start > 0 && (std::isalnum(static_cast<unsigned char>(c[start - 1])) || c[start - 1] == '_')) --start;
    return c.substr(start, end - start);
}

// Whether the string literal whose opening quote is at `at` is a checked
// code (see the rule in docs/design/tests.md). Walks outwards from the
// literal through the brackets that enclose it, up to the end of its
// statement, noting `==` and commas at each level.
bool asserted_at(const std::string& c, std::size_t at) {
    int depth = 0;  // brackets closed between the literal and the current position
    bool equals = false;
    int commas = 0;  // at the current level
    for (std::size_t i = at; i-- > 0;) {
        const char ch = c[i];
        if (ch == ')' || ch == ']' || ch == '}') {
            ++depth;
        } else if (ch == '(' || ch == '[' || ch == '{') {
            if (depth > 0) {
                --depth;
                continue;
            }
            if (ch != '(') return false;  // in a list or a block before any assertion
            const std::string name = name_before(c, i);
            if (name == "CHECK_THROWS_WITH" || name == "CHECK_THROWS_WITH_AS" || name == "REQUIRE_THROWS_WITH" || name == "REQUIRE_THROWS_WITH_AS")
                return commas == 1;
            if (name == "CHECK" || name == "REQUIRE" || name == "CHECK_MESSAGE" || name == "REQUIRE_MESSAGE") return commas == 0 && equals;
            if (name == "check_failure") return commas == 2;
            commas = 0;  // one level further out
        } else if (depth == 0) {
            if (ch == ';') return false;
            if (ch == ',') ++commas;
            if (ch == '=' && i > 0 && c[i - 1] == '=') equals = true;
        }
    }
    return false;
}

struct source_file {
    std::string text, code;
};

std::vector<source_file> test_sources() {
    std::vector<source_file> all;
    for (const auto& entry : std::filesystem::directory_iterator(std::filesystem::path(TENON_SOURCE_DIR) / "tests")) {
        const auto ext = entry.path().extension().string();
        if (entry.is_regular_file() && (ext == ".cpp" || ext == ".hpp")) {
            std::string text = read_text(entry.path());
            std::string code = code_only(text);
            all.push_back({std::move(text), std::move(code)});
        }
    }
    return all;
}

bool triggered_in(const std::vector<source_file>& sources, const std::string& code) {
    for (const auto& f : sources)
        for (const std::string& literal : {'"' + code + '"', "\"[" + code + "] "})
            for (std::size_t at = f.text.find(literal); at != std::string::npos; at = f.text.find(literal, at + 1))
                if (f.code[at] == '"' && asserted_at(f.code, at)) return true;
    return false;
}

}  // namespace

TEST_CASE("every error code has a README row and a test that triggers it, and every row names a code") {
    const std::filesystem::path root(TENON_SOURCE_DIR);
    const auto rows = readme_rows(read_text(root / "README.md"));
    const auto sources = test_sources();
    std::vector<std::string> library, tool = cli_codes_in(read_text(root / "examples" / "cli" / "tool.hpp"));
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
            CHECK_MESSAGE(triggered_in(sources, code),
                          "no test under tests/ asserts it (CHECK_THROWS_WITH(_AS), `== \"code\"` in a CHECK/REQUIRE, or check_failure)");
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

// Each identifier is its code with '_' for '.', so that codes::x_y_z is
// "x.y.z" in every message; the old short identifiers are aliases of them.
TEST_CASE("every error identifier spells its code") {
    std::size_t entries = 0;
#define TENON_TEST_IDENTIFIER_SPELLS_CODE(identifier, code, meaning)                                                                                 \
    {                                                                                                                                                \
        std::string dotted = #identifier;                                                                                                            \
        std::replace(dotted.begin(), dotted.end(), '_', '.');                                                                                        \
        std::string expected = code;                                                                                                                 \
        std::replace(expected.begin(), expected.end(), '_', '.');                                                                                    \
        INFO(#identifier << " = " << code);                                                                                                          \
        CHECK(dotted == expected);                                                                                                                   \
        CHECK(std::string(tenon::codes::identifier) == code);                                                                                        \
        ++entries;                                                                                                                                   \
    }
    TENON_ERROR_CODES(TENON_TEST_IDENTIFIER_SPELLS_CODE)
#undef TENON_TEST_IDENTIFIER_SPELLS_CODE
    CHECK(entries == static_cast<std::size_t>(tenon::error_registry_end() - tenon::error_registry_begin()));
    CHECK(std::string(tenon::codes::train_option) == tenon::codes::train_option_invalid);  // an alias of an earlier release
    CHECK(std::string(tenon::codes::deploy_checksum) == "deploy.model.checksum");
}

// The one tool code no other test triggered when the registry test came.
TEST_CASE("an unknown subcommand is refused with cli.command.unknown and exit status 2") {
    std::string program = "tenon", command = "calibrate";
    char* argv[] = {program.data(), command.data(), nullptr};
    std::ostringstream out, err;
    CHECK(tenon_cli::run_cli(2, argv, out, err, {}) == tenon_cli::exit_bad_input);
    const std::string prefix = "tenon: error: ";
    REQUIRE(err.str().rfind(prefix, 0) == 0);
    // The list of commands goes on; its start is enough here.
    CHECK(err.str().substr(prefix.size(), 73) == "[cli.command.unknown] unknown command 'calibrate' (commands: train, infer");
}

// The rule above, on snippets: assertions on a code count, mentions do not.
TEST_CASE("the registry counts a code as tested only where a test asserts it") {
    const auto counted = [](const std::string& snippet) { return triggered_in({source_file{snippet, code_only(snippet)}}, "area.thing"); };
    CHECK(counted(R"snippet(CHECK(code_of([] { f("a;b)", '('); }) == "area.thing");)snippet"));
    CHECK(counted(R"snippet(CHECK(e.code() == "area.thing");)snippet"));
    CHECK(counted("CHECK(message ==\n      \"[area.thing] what went wrong\");"));
    CHECK(counted(R"snippet(CHECK_MESSAGE((code == "other.thing" || code == "area.thing"), "at " << n);)snippet"));
    CHECK(counted(R"snippet(CHECK_THROWS_WITH_AS(run(x), doctest::Contains("area.thing"), tenon::error);)snippet"));
    CHECK(counted(R"snippet(check_failure(dir, {"train", "--data", path}, "[area.thing] " + path + ": cannot open");)snippet"));
    CHECK_FALSE(counted(R"snippet(const char* mine[] = {"area.thing", "other.thing"};)snippet"));
    CHECK_FALSE(counted(R"snippet(// CHECK(code == "area.thing");)snippet"));
    CHECK_FALSE(counted(R"snippet(/* CHECK(code == "area.thing"); */ int x = 1'000;)snippet"));
    CHECK_FALSE(counted(R"snippet(CHECK(text.find("area.thing") != std::string::npos);)snippet"));
    CHECK_FALSE(counted(R"snippet(CHECK(seen["area.thing"] == 16);)snippet"));
    CHECK_FALSE(counted(R"snippet(CHECK_MESSAGE(a == b, "area.thing");)snippet"));
    CHECK_FALSE(counted(R"snippet(CHECK_FALSE(code == "area.thing");)snippet"));
    CHECK_FALSE(counted(R"snippet(CHECK(code != "area.thing");)snippet"));
    CHECK_FALSE(counted(R"snippet(MESSAGE("[area.thing] seen");)snippet"));
    CHECK_FALSE(counted(R"snippet(check_failure(dir, {"train", "area.thing"}, "[other.thing] message");)snippet"));
    CHECK_FALSE(counted(R"snippet(CHECK(x == 1); f("area.thing");)snippet"));
}
