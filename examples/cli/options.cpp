// The tool's option tables (tool_parts.hpp): reading a command line by a
// table and writing the table's part of --help; the value parsers the
// tables' entries share.
#include <algorithm>
#include <charconv>
#include <cstdint>
#include <limits>
#include <string>
#include <system_error>
#include <vector>

#include "tool_parts.hpp"

namespace tenon_cli {

void fail(const char* code, const std::string& message, int exit_status) { throw cli_failure(code, message, exit_status); }

const tenon::model_settings& library_defaults() {
    static const tenon::model_settings defaults;
    return defaults;
}

tenon::model_settings tool_model_defaults() {
    tenon::model_settings s = library_defaults();
    s.seed = 1;
    return s;
}

namespace detail {

std::vector<given_option> read_options(const std::string& command, const std::vector<std::string>& args, const std::vector<option_shape>& known,
                                       bool& help) {
    std::vector<given_option> given;
    for (std::size_t k = 0; k < args.size(); ++k) {
        std::string name = args[k], value;
        bool inline_value = false;
        if (name == "--help" || name == "-h") {
            help = true;
            continue;
        }
        if (name.rfind("--", 0) != 0)
            fail(cli_codes::option_unknown,
                 "unexpected argument '" + name + "' for 'tenon " + command + "' (options start with --; see tenon " + command + " --help)");
        const auto eq = name.find('=');
        if (eq != std::string::npos) {
            value = name.substr(eq + 1);
            name = name.substr(0, eq);
            inline_value = true;
        }
        const auto row = std::find_if(known.begin(), known.end(), [&](const option_shape& o) { return name == o.spelling; });
        if (row == known.end())
            fail(cli_codes::option_unknown, "unknown option '" + name + "' for 'tenon " + command + "' (see tenon " + command + " --help)");
        for (const auto& g : given)
            if (g.name == name) fail(cli_codes::option_conflict, name + " is given more than once");
        if (row->flag) {
            if (inline_value) fail(cli_codes::option_value, name + " takes no value");
        } else if (!inline_value) {
            if (k + 1 >= args.size()) fail(cli_codes::option_missing, name + " needs a value");
            value = args[++k];
        }
        given.push_back({name, value, static_cast<std::size_t>(row - known.begin())});
    }
    return given;
}

// The help text starts in column 26; a name with its value wider than 21
// characters stands on a line of its own.
std::string option_help(const char* before, const char* spelling, const char* value_name, const char* help) {
    constexpr std::size_t text_column = 25;
    std::string s = before ? before : "";
    std::string name = std::string("  ") + spelling;
    if (value_name) name += std::string(" ") + value_name;
    s += name;
    if (name.size() + 2 <= text_column)
        s.append(text_column - name.size(), ' ');
    else
        s += "\n" + std::string(text_column, ' ');
    for (const char* c = help; *c; ++c) {
        s += *c;
        if (*c == '\n') s.append(text_column, ' ');
    }
    return s + "\n";
}

bool was_given(const std::vector<std::string>& seen, const char* option) { return std::find(seen.begin(), seen.end(), option) != seen.end(); }

std::string file_name(const std::string& option, const std::string& value) {
    if (value.empty()) fail(cli_codes::option_value, option + " needs a file name, got an empty one");
    return value;
}

std::string join(const std::vector<std::string>& parts, const char* separator) {
    std::string s;
    for (std::size_t k = 0; k < parts.size(); ++k) {
        if (k) s += separator;
        s += parts[k];
    }
    return s;
}

std::vector<std::string> split_list(const std::string& text) {
    std::vector<std::string> parts;
    std::string current;
    for (char c : text) {
        if (c == ',') {
            parts.push_back(current);
            current.clear();
        } else {
            current += c;
        }
    }
    parts.push_back(current);
    return parts;
}

std::size_t parse_count(const std::string& option, const std::string& text, std::size_t minimum) {
    std::uint64_t value = 0;
    const char* first = text.data();
    const char* last = text.data() + text.size();
    const auto r = std::from_chars(first, last, value);
    if (!text.empty() && r.ec == std::errc::result_out_of_range && r.ptr == last)
        fail(cli_codes::option_value, option + " '" + text + "': too large (more than 18446744073709551615)");
    if (text.empty() || r.ec != std::errc() || r.ptr != last) fail(cli_codes::option_value, option + " '" + text + "': not a whole number");
    if (value < minimum) fail(cli_codes::option_value, option + " '" + text + "': must be at least " + std::to_string(minimum));
    if (value > std::numeric_limits<std::size_t>::max()) fail(cli_codes::option_value, option + " '" + text + "': too large");
    return static_cast<std::size_t>(value);
}

std::uint64_t parse_seed(const std::string& option, const std::string& text) {
    std::uint64_t value = 0;
    const char* last = text.data() + text.size();
    const auto r = std::from_chars(text.data(), last, value);
    if (text.empty() || r.ec != std::errc() || r.ptr != last)
        fail(cli_codes::option_value, option + " '" + text + "': not a whole number between 0 and 18446744073709551615");
    return value;
}

double parse_real(const std::string& option, const std::string& text) {
    double value = 0;
    if (!tenon::parse_number(text, value) || text.empty()) fail(cli_codes::option_value, option + " '" + text + "': not a finite number");
    return value;
}

// The "Files" paragraph of every subcommand's help that writes files;
// `extra` (wrapped lines, the last ending in ';') adds what one subcommand
// promises beyond the others.
std::string files_help(const std::string& extra) {
    std::string text = R"(Files
  Every output is checked before training: compared with the inputs and the
  other outputs by identity (symlinks, hard links and other paths to the same
  file are caught), its directory must exist and accept a new file. Outputs
  are written to temporary files and renamed into place together at the end;
  a replaced file keeps its permission bits; an output that is a symlink has
  its target replaced and the link kept. '-' and /dev/stdout write to
  standard output;)";
    if (!extra.empty()) text += " " + extra + "\n ";
    return text + R"( a FIFO or device is written directly, never replaced.
  SIGINT, SIGTERM and SIGHUP remove the temporary files and end the run by
  that signal.
)";
}

}  // namespace detail
}  // namespace tenon_cli
