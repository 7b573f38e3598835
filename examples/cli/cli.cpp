// The tool's entry: `tenon COMMAND [options]` dispatched to the subcommands
// of one table (name, one-line summary, handler); --help and --version.
#include <exception>
#include <ostream>
#include <string>
#include <vector>

#include "tool_parts.hpp"

namespace tenon_cli {

std::string general_help() {
    return std::string("tenon ") + tenon::version_string() +
        R"(: train neural networks on tabular data from the command line

Usage: tenon COMMAND [options]
       tenon --help | --version

Commands
  train    train a perceptron on a CSV file and score it on held-out rows
  infer    predict with a saved model, one output row per CSV row
  inspect  describe a saved model: inputs, classes, layers, scores, provenance
  retrain  continue training a saved model on new rows; replace it only if it
           scores better on new rows it did not train on
  drift    compare recent rows with the rows a saved model was trained on

Run 'tenon COMMAND --help' for a command's options and their defaults.

A typical session
  tenon train --data history.csv --target verdict --model caps.tnm
  tenon inspect --model caps.tnm
  tenon infer --model caps.tnm --data today.csv --keep id --out verdicts.csv
  tenon drift --model caps.tnm --data this_week.csv
  tenon retrain --model caps.tnm --data this_week.csv --out caps.tnm --margin 0.01

Exit status: 0 success, 2 bad command line or data, 3 output not written,
1 unexpected failure; retrain: 4 the incumbent was kept (nothing written);
drift: 5 at least one column drifted.
)";
}

namespace {

struct subcommand {
    const char* name;
    const char* summary;
    int (*run)(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env);
};

const std::vector<subcommand>& subcommands() {
    static const std::vector<subcommand> table{
        {"train", "train a perceptron on a CSV file and score it on held-out rows", &run_train},
        {"infer", "predict with a saved model, one output row per CSV row", &run_infer},
        {"inspect", "describe a saved model: inputs, classes, layers, scores, provenance", &run_inspect},
        {"retrain", "continue training a saved model on new rows; replace it only if it gets better", &run_retrain},
        {"drift", "compare recent rows with the rows a saved model was trained on", &run_drift},
    };
    return table;
}

}  // namespace

/// Runs the tool with the given arguments (argv[0] is the program name).
/// Returns the exit status; messages go to `out`, errors to `err`, one line each.
int run_cli(int argc, char** argv, std::ostream& out, std::ostream& err, const cli_environment& env) {
    std::vector<std::string> args;
    for (int k = 1; k < argc; ++k) args.emplace_back(argv[k]);
    std::string command = "tenon";
    try {
        if (args.empty()) {
            err << general_help();
            return exit_bad_input;
        }
        if (args[0] == "--help" || args[0] == "-h" || args[0] == "help") {
            if (args[0] == "help" && args.size() > 1) {
                args = {args[1], "--help"};
            } else {
                out << general_help();
                return exit_success;
            }
        }
        if (args[0] == "--version") {
            out << "tenon " << tenon::version_string() << "\n";
            return exit_success;
        }
        for (const auto& c : subcommands()) {
            if (args[0] == c.name) {
                command = std::string("tenon ") + c.name;
                return c.run(std::vector<std::string>(args.begin() + 1, args.end()), out, err, env);
            }
        }
        std::vector<std::string> names;
        for (const auto& c : subcommands()) names.emplace_back(c.name);
        fail(cli_codes::command_unknown, "unknown command '" + args[0] + "' (commands: " + detail::join(names, ", ") + "; see tenon --help)");
    } catch (const std::exception&) {
        out.flush();
        int status = exit_unexpected;
        err << detail::failure_text(command, std::current_exception(), status) << "\n";
        return status;
    }
}

}  // namespace tenon_cli
