// The `tenon` tool never loses a file: outputs compared with inputs and with
// each other by identity (device and inode), outputs checked before
// training, staged and committed without removing what the run did not
// create, temporary files that cannot be planted or shared, non-regular
// files written directly, inputs that are not regular files refused (no
// hang on a FIFO), and no temporary file left behind by a signal.
#include <doctest/doctest.h>

#include <algorithm>
#include <cerrno>
#include <csignal>
#include <cstring>
#include <limits>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <string>
#include <vector>

#include <fcntl.h>
#include <sys/resource.h>
#include <sys/stat.h>
#include <sys/types.h>
#include <sys/wait.h>
#include <grp.h>
#include <unistd.h>

#include "cli_test_support.hpp"
#include "sanitizer_build.hpp"

namespace fs = std::filesystem;

namespace {

using cli_test::cli_result;
using cli_test::read_file;

struct scratch_dir : cli_test::scratch_dir {
    explicit scratch_dir(const std::string& name) : cli_test::scratch_dir("tenon_cli_files_tests_", name) {}
};

cli_result run(std::vector<std::string> args) { return cli_test::run_tool(std::move(args)); }

bool contains(const std::string& text, const std::string& part) { return text.find(part) != std::string::npos; }

// Invented: a pump's flow from its speed and valve; 240 rows.
std::string pump_csv(std::size_t rows = 240) {
    std::string csv = "speed,valve,flow\n";
    for (std::size_t i = 0; i < rows; ++i) {
        const double speed = 1000.0 + static_cast<double>((i * 37) % 500);
        const char* valve = i % 3 == 0 ? "open" : i % 3 == 1 ? "half" : "shut";
        const double flow = 0.01 * speed * (i % 3 == 0 ? 1.0 : i % 3 == 1 ? 0.5 : 0.1) + static_cast<double>(i % 7) * 0.01;
        csv += std::to_string(speed) + "," + valve + "," + std::to_string(flow) + "\n";
    }
    return csv;
}

// A directory with the data and a trained model.
struct pump_setup {
    scratch_dir dir;
    std::string data, model;
    explicit pump_setup(const std::string& name) : dir(name) {
        data = dir.write("pump.csv", pump_csv());
        model = dir.file("pump.tnm");
        const auto r = run({"train", "--data", data, "--target", "flow", "--epochs", "3", "--model", model, "--quiet"});
        REQUIRE(r.status == 0);
    }
};

std::vector<std::string> temporaries_in(const scratch_dir& dir) {
    std::vector<std::string> found;
    for (const auto& name : dir.listing())
        if (contains(name, ".tenon-") || contains(name, ".tmp-")) found.push_back(name);
    return found;
}

// A process id that no longer exists: a child that ended and was reaped.
pid_t gone_process_id() {
    const pid_t child = ::fork();
    if (child == 0) ::_exit(0);
    int status = 0;
    ::waitpid(child, &status, 0);
    return child;
}

}  // namespace

TEST_CASE("an output naming an input by another path (symlink, hard link, absolute, ../) is refused, and the input is unchanged") {
    pump_setup p("identity");
    const std::string data_bytes = read_file(p.data);
    fs::create_symlink(p.data, p.dir.file("link.csv"));
    fs::create_hard_link(p.data, p.dir.file("hard.csv"));
    fs::create_directories(p.dir.file("w"));
    const std::string dotted = p.dir.file("w") + "/../pump.csv";
    const std::vector<std::pair<std::string, std::string>> cases = {
        {"--metrics", p.dir.file("link.csv")}, {"--report", p.dir.file("hard.csv")}, {"--model", dotted}, {"--metrics", p.data}};
    const auto before = p.dir.listing();
    for (const auto& c : cases) {
        CAPTURE(c.first);
        CAPTURE(c.second);
        const auto r = run({"train", "--data", p.data, "--target", "flow", "--epochs", "2", c.first, c.second, "--quiet"});
        CHECK(r.status == 2);
        CHECK(contains(r.err, "[cli.option.conflict] "));
        CHECK(contains(r.err, "name the same file"));
        CHECK(read_file(p.data) == data_bytes);
        CHECK(p.dir.listing() == before);
    }
    // Two outputs naming each other, one through a symlink that does not resolve yet.
    fs::create_symlink(p.dir.file("metrics.json"), p.dir.file("m_link.json"));
    auto r = run({"train", "--data", p.data, "--target", "flow", "--metrics", p.dir.file("metrics.json"), "--report", p.dir.file("m_link.json")});
    CHECK(r.status == 2);
    CHECK(contains(r.err, "--metrics and --report name the same file"));
    // infer --out and retrain --json / --rollback by hard link.
    r = run({"infer", "--model", p.model, "--data", p.data, "--out", p.dir.file("hard.csv")});
    CHECK(r.status == 2);
    CHECK(contains(r.err, "[cli.option.conflict] --out and --data name the same file"));
    fs::create_hard_link(p.model, p.dir.file("model_hard.tnm"));
    r = run({"retrain", "--model", p.model, "--data", p.data, "--out", p.dir.file("new.tnm"), "--json", p.dir.file("model_hard.tnm")});
    CHECK(r.status == 2);
    CHECK(contains(r.err, "name the same file"));
    CHECK(read_file(p.data) == data_bytes);
    CHECK(temporaries_in(p.dir).empty());
}

TEST_CASE("a failing later output leaves earlier outputs in place, untouched, and is found before training") {
    pump_setup p("later_output");
    const std::string model_bytes = read_file(p.model);
    p.dir.write("prev.json", "{\"kept\": true}\n");
    fs::create_directories(p.dir.file("reports"));
    const auto before = p.dir.listing();
    auto r = run({"train", "--data", p.data, "--target", "flow", "--epochs", "2", "--model", p.model, "--metrics", p.dir.file("prev.json"),
                  "--report", p.dir.file("reports")});
    CHECK(r.status == 3);
    CHECK(r.err == "tenon train: error: [cli.output.write] --report '" + p.dir.file("reports") + "': is a directory; give a file name\n");
    CHECK(r.out.empty());  // nothing was trained
    CHECK(read_file(p.model) == model_bytes);
    CHECK(read_file(p.dir.file("prev.json")) == "{\"kept\": true}\n");
    CHECK(p.dir.listing() == before);
    // A directory that does not exist is named as such.
    r = run({"train", "--data", p.data, "--target", "flow", "--model", p.dir.file("nowhere/m.tnm")});
    CHECK(r.status == 3);
    CHECK(contains(r.err, "the directory '" + p.dir.file("nowhere") + "' does not exist"));
    // retrain --json naming a directory keeps an existing --out file.
    p.dir.write("out.tnm", "an older file\n");
    r = run({"retrain", "--model", p.model, "--data", p.data, "--out", p.dir.file("out.tnm"), "--json", p.dir.file("reports")});
    CHECK(r.status == 3);
    CHECK(read_file(p.dir.file("out.tnm")) == "an older file\n");
    CHECK(temporaries_in(p.dir).empty());
}

TEST_CASE("retrain with --out naming --model through a symlink or an absolute path is in place: rollback kept, link kept, mode kept") {
    pump_setup p("in_place_link");
    const std::string incumbent = read_file(p.model);
    fs::create_symlink("pump.tnm", p.dir.file("current.tnm"));
    ::chmod(p.model.c_str(), 0444);
    const auto r = run({"retrain", "--model", p.model, "--data", p.data, "--out", p.dir.file("current.tnm"), "--quiet", "--epochs", "3"});
    REQUIRE(r.status == 0);
    CHECK(read_file(p.model + ".previous") == incumbent);
    CHECK(read_file(p.model) != incumbent);
    CHECK(fs::is_symlink(p.dir.file("current.tnm")));
    CHECK(fs::read_symlink(p.dir.file("current.tnm")) == "pump.tnm");
    struct stat st {};
    REQUIRE(::stat(p.model.c_str(), &st) == 0);
    CHECK((st.st_mode & 07777) == 0444);
    CHECK(temporaries_in(p.dir).empty());
    // The model given through the link, --out the plain path: in place as well.
    const std::string second = read_file(p.model);
    const auto again = run({"retrain", "--model", p.dir.file("current.tnm"), "--data", p.data, "--out", p.model, "--quiet", "--epochs", "3"});
    REQUIRE(again.status == 0);
    CHECK(read_file(p.dir.file("current.tnm.previous")) == second);
}

TEST_CASE("an in-place retrain that cannot write (file size limit, as on a full disk) changes neither the model nor the older rollback") {
    pump_setup p("full_disk");
    p.dir.write("pump.tnm.previous", "the older rollback\n");
    const std::string incumbent = read_file(p.model);
    const auto before = p.dir.listing();
    // RLIMIT_FSIZE makes a write past the limit fail with EFBIG (POSIX
    // setrlimit()), standing for a file system that fills up; SIGXFSZ is
    // ignored so the write fails rather than the process ending.
    struct rlimit saved {};
    REQUIRE(::getrlimit(RLIMIT_FSIZE, &saved) == 0);
    const auto old_handler = std::signal(SIGXFSZ, SIG_IGN);
    struct rlimit small = saved;
    small.rlim_cur = 4096;
    REQUIRE(::setrlimit(RLIMIT_FSIZE, &small) == 0);
    const auto r = run({"retrain", "--model", p.model, "--data", p.data, "--out", p.model, "--quiet", "--epochs", "3"});
    ::setrlimit(RLIMIT_FSIZE, &saved);
    std::signal(SIGXFSZ, old_handler);
    CHECK(r.status == 3);
    CHECK(contains(r.err, "[cli.output.write]"));
    CHECK(contains(r.err, "File too large"));
    CHECK(read_file(p.model) == incumbent);
    CHECK(read_file(p.model + ".previous") == "the older rollback\n");
    CHECK(p.dir.listing() == before);
}

TEST_CASE("non-regular inputs are refused without opening them: a FIFO with no writer does not hang, a directory is named as one") {
    pump_setup p("inputs");
    const std::string fifo = p.dir.file("pipe");
    REQUIRE(::mkfifo(fifo.c_str(), 0600) == 0);
    auto r = run({"train", "--data", fifo, "--target", "flow"});
    CHECK(r.status == 2);
    CHECK(r.err ==
          "tenon train: error: [prep.file.open] --data '" + fifo + "' is a FIFO (named pipe), not a regular file, so it cannot be read as input\n");
    r = run({"infer", "--model", fifo, "--data", p.data, "--out", p.dir.file("o.csv")});
    CHECK(r.status == 2);
    CHECK(contains(r.err, "--model '" + fifo + "' is a FIFO (named pipe)"));
    r = run({"retrain", "--model", p.model, "--data", fifo, "--out", p.dir.file("o.tnm")});
    CHECK(r.status == 2);
    r = run({"drift", "--model", p.model, "--data", fifo});
    CHECK(r.status == 2);
    r = run({"inspect", "--model", fifo});
    CHECK(r.status == 2);
    r = run({"infer", "--model", p.model, "--data", p.dir.file("."), "--out", p.dir.file("o.csv")});
    CHECK(r.status == 2);
    CHECK(contains(r.err, "is a directory, not a regular file"));
    r = run({"infer", "--model", p.model, "--data", p.dir.file("absent.csv"), "--out", p.dir.file("o.csv")});
    CHECK(r.status == 2);
    CHECK(r.err == "tenon infer: error: [prep.file.open] --data '" + p.dir.file("absent.csv") + "': cannot read it (No such file or directory)\n");
    CHECK(!fs::exists(p.dir.file("o.csv")));
}

TEST_CASE("non-regular outputs are written directly and never replaced; '-' and /dev/stdout mean standard output") {
    pump_setup p("direct");
    // '-' : the predictions on the tool's standard output, no file named '-'.
    auto r = run({"infer", "--model", p.model, "--data", p.data, "--out", "-"});
    REQUIRE(r.status == 0);
    CHECK(r.out.rfind("predicted,predicted_low,predicted_high,out_of_range\n", 0) == 0);  // a calibrated model: its band too
    CHECK(std::count(r.out.begin(), r.out.end(), '\n') == 241);
    CHECK(!fs::exists(p.dir.file("-")));
    CHECK(!fs::exists("-"));
    const auto by_device = run({"infer", "--model", p.model, "--data", p.data, "--out", "/dev/stdout"});
    CHECK(by_device.out == r.out);
    // /dev/null stays the device.
    r = run({"infer", "--model", p.model, "--data", p.data, "--out", "/dev/null", "--quiet"});
    CHECK(r.status == 0);
    struct stat st {};
    REQUIRE(::stat("/dev/null", &st) == 0);
    CHECK(S_ISCHR(st.st_mode));
    // A FIFO with no reader is refused (exit 3) rather than waited for, and stays a FIFO.
    const std::string fifo = p.dir.file("pipe");
    REQUIRE(::mkfifo(fifo.c_str(), 0600) == 0);
    r = run({"infer", "--model", p.model, "--data", p.data, "--out", fifo});
    CHECK(r.status == 3);
    CHECK(contains(r.err, "is a FIFO with no reader"));
    REQUIRE(::lstat(fifo.c_str(), &st) == 0);
    CHECK(S_ISFIFO(st.st_mode));
    // A FIFO with a reader receives the predictions.
    const int reader = ::open(fifo.c_str(), O_RDONLY | O_NONBLOCK);
    REQUIRE(reader >= 0);
    r = run({"infer", "--model", p.model, "--data", p.data, "--out", fifo, "--quiet"});
    CHECK(r.status == 0);
    char head[52] = {};
    CHECK(::read(reader, head, 51) == 51);
    CHECK(std::string(head) == "predicted,predicted_low,predicted_high,out_of_range");
    ::close(reader);
    CHECK(temporaries_in(p.dir).empty());
}

TEST_CASE("temporary files of dead processes are cleared by the next run writing the same output; others are left") {
    pump_setup p("stale");
    const pid_t gone = gone_process_id();
    const std::string ours = ".o.csv.tenon-" + std::to_string(gone) + "-0123456789abcdef.tmp";
    const std::string library = "o.csv.tmp-" + std::to_string(gone) + "-7";
    const std::string live = ".o.csv.tenon-" + std::to_string(::getpid()) + "-0123456789abcdef.tmp";
    const std::string other_output = ".other.csv.tenon-" + std::to_string(gone) + "-0123456789abcdef.tmp";
    for (const auto& name : {ours, library, live, other_output}) p.dir.write(name, "partial");
    const std::string planted = ".o.csv.tenon-" + std::to_string(gone) + "-fedcba9876543210.tmp";
    fs::create_symlink(p.data, p.dir.file(planted));  // a link is never removed, nor followed
    const auto r = run({"infer", "--model", p.model, "--data", p.data, "--out", p.dir.file("o.csv"), "--quiet"});
    REQUIRE(r.status == 0);
    CHECK(!fs::exists(p.dir.file(ours)));
    CHECK(!fs::exists(p.dir.file(library)));
    CHECK(fs::exists(p.dir.file(live)));
    CHECK(fs::exists(p.dir.file(other_output)));
    CHECK(fs::is_symlink(p.dir.file(planted)));
    CHECK(read_file(p.data) == pump_csv());
    // The name test itself.
    using tenon_cli::files::temporary_owner;
    CHECK(temporary_owner(".o.csv.tenon-42-00ff.tmp", "o.csv") == 42);
    CHECK(temporary_owner("o.csv.tmp-42-3", "o.csv") == 42);
    CHECK(temporary_owner(".o.csv.tenon-42-00ff.tmpx", "o.csv") == -1);
    CHECK(temporary_owner(".o.csv.tenon-x-00ff.tmp", "o.csv") == -1);
    CHECK(temporary_owner(".o.csv.tenon-42-.tmp", "o.csv") == -1);
    CHECK(temporary_owner("o.csv.tmp-42-", "o.csv") == -1);
    CHECK(temporary_owner(".p.csv.tenon-42-00ff.tmp", "o.csv") == -1);
}

TEST_CASE("two processes writing the same output at once each write whole files; the survivor is one complete file") {
    pump_setup p("concurrent");
    const std::string out = p.dir.file("o.csv");
    const auto expected = run({"infer", "--model", p.model, "--data", p.data, "--out", "-"}).out;
    std::vector<pid_t> children;
    for (int k = 0; k < 4; ++k) {
        const pid_t child = ::fork();
        REQUIRE(child >= 0);
        if (child == 0) {
            const auto r = run({"infer", "--model", p.model, "--data", p.data, "--out", out, "--quiet"});
            ::_exit(r.status);
        }
        children.push_back(child);
    }
    for (const pid_t child : children) {
        int status = 0;
        ::waitpid(child, &status, 0);
        CHECK(WIFEXITED(status));
        CHECK(WEXITSTATUS(status) == 0);
    }
    CHECK(read_file(out) == expected);
    CHECK(temporaries_in(p.dir).empty());
}

#if defined(TENON_CLI_BINARY)
namespace {

// Starts the built tool on a long training run, waits (bounded by a count of
// polls, not by time) until its temporary files exist, sends `signal_number`
// and returns the wait status.
int signal_during_training(const pump_setup& p, int signal_number, bool& saw_temporary) {
    const pid_t child = ::fork();
    REQUIRE(child >= 0);
    if (child == 0) {
        // A test runner started in the background may have SIGINT ignored,
        // which exec keeps and the tool honours (as under nohup).
        for (const int s : {SIGINT, SIGTERM, SIGHUP}) std::signal(s, SIG_DFL);
        const int null_fd = ::open("/dev/null", O_WRONLY);
        ::dup2(null_fd, 1);
        ::dup2(null_fd, 2);
        ::execl(TENON_CLI_BINARY, "tenon", "train", "--data", p.data.c_str(), "--target", "flow", "--epochs", "100000", "--patience", "100000",
                "--model", p.model.c_str(), "--metrics", p.dir.file("m.json").c_str(), static_cast<char*>(nullptr));
        ::_exit(127);
    }
    saw_temporary = false;
    int status = 0;
    for (int poll = 0; poll < 200000 && !saw_temporary; ++poll) {
        if (::waitpid(child, &status, WNOHANG) == child) return status;  // ended on its own: the caller fails
        saw_temporary = temporaries_in(p.dir).size() == 2;
        if (!saw_temporary) ::usleep(500);
    }
    ::kill(child, signal_number);
    ::waitpid(child, &status, 0);
    return status;
}

}  // namespace

TEST_CASE("SIGINT, SIGTERM and SIGHUP remove the run's temporary files, end the run by that signal and change no output") {
    pump_setup p("signals");
    p.dir.write("pump.csv", pump_csv(3000));
    const std::string model_bytes = read_file(p.model);
    const auto before = p.dir.listing();
    for (const int s : {SIGINT, SIGTERM, SIGHUP}) {
        CAPTURE(s);
        bool saw = false;
        const int status = signal_during_training(p, s, saw);
        REQUIRE(saw);
        CHECK(WIFSIGNALED(status));
        CHECK(WTERMSIG(status) == s);
        CHECK(p.dir.listing() == before);
        CHECK(read_file(p.model) == model_bytes);
    }
}

TEST_CASE("SIGKILL leaves the temporary files (it cannot be caught); the next run writing the same outputs removes them") {
    pump_setup p("sigkill");
    p.dir.write("pump.csv", pump_csv(3000));
    const auto before = p.dir.listing();
    bool saw = false;
    const int status = signal_during_training(p, SIGKILL, saw);
    REQUIRE(saw);
    CHECK(WIFSIGNALED(status));
    CHECK(temporaries_in(p.dir).size() == 2);
    const auto r =
        run({"train", "--data", p.data, "--target", "flow", "--epochs", "1", "--model", p.model, "--metrics", p.dir.file("m.json"), "--quiet"});
    CHECK(r.status == 0);
    CHECK(temporaries_in(p.dir).empty());
    CHECK(p.dir.listing().size() == before.size() + 1);  // m.json is new
}
#endif

TEST_CASE("size limits and unusable learning rates are refused with exit 2 and the limit named; whole-list quotes in --hidden") {
    pump_setup p("limits");
    const auto before = p.dir.listing();
    const auto refused = [&](const std::vector<std::string>& extra, const std::string& expected) {
        std::vector<std::string> args{"train", "--data", p.data, "--target", "flow", "--epochs", "1"};
        args.insert(args.end(), extra.begin(), extra.end());
        const auto r = run(args);
        CHECK(r.status == 2);
        CHECK(r.err == "tenon train: error: " + expected + "\n");
        CHECK(p.dir.listing() == before);
    };
    refused({"--hidden", "100000000"}, "[cli.option.value] --hidden '100000000': width 100000000 is above the limit of 65536 units per layer");
    refused({"--hidden", "20000,20000"},
            "[cli.option.value] --hidden '20000,20000': 400000000 weights between the hidden layers, above the limit of 100000000");
    refused({"--hidden", "8,,4"}, "[cli.option.value] --hidden '8,,4': an empty width between commas");
    refused({"--hidden", "8,x"}, "[cli.option.value] --hidden '8,x': width 'x': not a whole number");
    refused({"--patience", "99999999999999999999999"},
            "[cli.option.value] --patience '99999999999999999999999': too large (more than 18446744073709551615)");
    // 1e-50 is a positive double but rounds to 0 in single precision (IEEE 754
    // binary32: smallest normal 2^-126, about 1.18e-38).
    refused({"--learning-rate", "1e-50"},
            "[cli.option.value] --learning-rate '1e-50': outside what single precision (the training's) holds, 1.2e-38 to 3.4e38");
    refused({"--learning-rate", "1e39"},
            "[cli.option.value] --learning-rate '1e39': outside what single precision (the training's) holds, 1.2e-38 to 3.4e38");
}

TEST_CASE("infer --keep naming an output column is refused rather than writing two columns of one name") {
    pump_setup p("keep_clash");
    p.dir.write("with_predicted.csv", "speed,valve,predicted\n1100,open,3\n");
    const auto r =
        run({"infer", "--model", p.model, "--data", p.dir.file("with_predicted.csv"), "--out", p.dir.file("o.csv"), "--keep", "predicted"});
    CHECK(r.status == 2);
    CHECK(contains(r.err, "[cli.option.conflict] --keep names 'predicted', which is also a column the predictions write"));
    CHECK(!fs::exists(p.dir.file("o.csv")));
    CHECK(temporaries_in(p.dir).empty());
}

#if defined(TENON_CLI_BINARY)
namespace {

// Runs the built tool as user and group `id` (fork, setgid, setuid, exec);
// returns the exit status and stderr.
cli_result run_binary_as(uid_t id, const std::vector<std::string>& args) {
    int pipe_fds[2];
    REQUIRE(::pipe(pipe_fds) == 0);
    const pid_t child = ::fork();
    REQUIRE(child >= 0);
    if (child == 0) {
        ::close(pipe_fds[0]);
        ::dup2(pipe_fds[1], 2);
        const int null_fd = ::open("/dev/null", O_WRONLY);
        ::dup2(null_fd, 1);
        if (::setgroups(0, nullptr) != 0 || ::setgid(id) != 0 || ::setuid(id) != 0) ::_exit(126);
        std::vector<char*> argv;
        std::vector<std::string> copy = args;
        copy.insert(copy.begin(), "tenon");
        for (auto& a : copy) argv.push_back(a.data());
        argv.push_back(nullptr);
        ::execv(TENON_CLI_BINARY, argv.data());
        const std::string why = std::string("cannot run ") + TENON_CLI_BINARY + " as uid " + std::to_string(id) + ": " + std::strerror(errno);
        (void)!::write(2, why.data(), why.size());
        ::_exit(127);
    }
    ::close(pipe_fds[1]);
    cli_result r;
    char buffer[4096];
    for (ssize_t n; (n = ::read(pipe_fds[0], buffer, sizeof buffer)) > 0;) r.err.append(buffer, static_cast<std::size_t>(n));
    ::close(pipe_fds[0]);
    int status = 0;
    ::waitpid(child, &status, 0);
    r.status = WIFEXITED(status) ? WEXITSTATUS(status) : -1;
    return r;
}

}  // namespace

TEST_CASE("as an unprivileged user: unreadable inputs, a read-only directory and another user's file in a sticky directory change nothing") {
    if (::geteuid() != 0) {
        MESSAGE("skipped: switching to an unprivileged user needs root, and this test runs as uid " << ::geteuid());
        return;
    }
    const uid_t nobody = 65534;  // the conventional "nobody" id on Debian (base-passwd)
    // The build must be reachable by nobody: a clone under a directory only
    // root may enter (mktemp -d makes one of mode 0700) cannot run this test.
    const auto reach = run_binary_as(nobody, {"--version"});
    if (reach.status == 127) {
        MESSAGE("skipped: " << reach.err);
        return;
    }
    REQUIRE(reach.status == 0);
    pump_setup p("unprivileged");
    ::chmod(p.dir.file("").c_str(), 0755);
    ::chmod(p.data.c_str(), 0644);
    ::chmod(p.model.c_str(), 0644);
    const std::string model_bytes = read_file(p.model);
    // A directory nobody cannot write: the output is refused before training.
    auto r = run_binary_as(nobody, {"train", "--data", p.data, "--target", "flow", "--epochs", "1", "--model", p.model});
    CHECK(r.status == 3);
    CHECK(contains(r.err,
                   "[cli.output.write] --model '" + p.model + "': cannot create a file in the directory '" +
                       fs::path(p.model).parent_path().string() + "'"));
    CHECK(contains(r.err, "(Permission denied)"));
    // An input nobody cannot read.
    p.dir.write("secret.csv", pump_csv());
    ::chmod(p.dir.file("secret.csv").c_str(), 0600);
    r = run_binary_as(nobody, {"infer", "--model", p.model, "--data", p.dir.file("secret.csv"), "--out", "-"});
    CHECK(r.status == 2);
    CHECK(contains(r.err, "--data '" + p.dir.file("secret.csv") + "': cannot read it (Permission denied)"));
    // A sticky, world-writable directory (as /tmp): nobody may create files
    // but not replace root's read-only model; the retrain in place fails with
    // exit 3 and leaves the model, and no temporary file.
    ::chmod(p.dir.file("").c_str(), 01777);
    ::chmod(p.model.c_str(), 0444);
    const auto before = p.dir.listing();
    r = run_binary_as(nobody, {"retrain", "--model", p.model, "--data", p.data, "--out", p.model, "--epochs", "2", "--quiet"});
    CHECK(r.status == 3);
    CHECK(contains(r.err, "[cli.output.write]"));
    CHECK(read_file(p.model) == model_bytes);
    CHECK(p.dir.listing() == before);
    ::chmod(p.dir.file("").c_str(), 0755);
}
#endif

// ---------------------------------------------------------------------------
// Column kinds: a few bad cells never change a column's kind silently.

namespace {

// 300 rows: an ISO date column, a reading with `na_share` of its cells
// written "n/a", and a numeric target.
std::string dated_csv(const std::string& bad_date, std::size_t bad_row, std::size_t na_every) {
    std::string csv = "day,reading,output\n";
    for (std::size_t i = 0; i < 300; ++i) {
        char day[16];
        std::snprintf(day, sizeof day, "2024-%02zu-%02zu", 1 + (i / 28) % 12, 1 + i % 28);
        const std::string reading = na_every && i % na_every == 0 ? "n/a" : std::to_string(10.0 + static_cast<double>(i % 17));
        csv += (i == bad_row ? bad_date : std::string(day)) + "," + reading + "," + std::to_string(static_cast<double>(i % 17) * 2.0) + "\n";
    }
    return csv;
}

}  // namespace

TEST_CASE("one bad timestamp among 300 rows is reported with its file, line and value instead of making the column categorical") {
    scratch_dir dir("bad_timestamp");
    const auto data = dir.write("log.csv", dated_csv("2024-13-45", 122, 0));
    const auto r = run({"train", "--data", data, "--target", "output", "--epochs", "1"});
    CHECK(r.status == 2);
    CHECK(r.err == "tenon train: error: [prep.cell.not_datetime] " + data + " line 124 column 1 ('day'): '2024-13-45' is not a date/time\n");
}

TEST_CASE("the usual missing spellings (n/a, -, none, ...) read as missing: a numeric column with 15% n/a stays numeric, in train and infer") {
    scratch_dir dir("missing_tokens");
    const auto data = dir.write("log.csv", dated_csv("2024-01-01", 0, 7));
    const auto model = dir.file("m.tnm");
    const auto metrics = dir.file("m.json");
    const auto r = run({"train", "--data", data, "--target", "output", "--epochs", "1", "--model", model, "--metrics", metrics, "--quiet"});
    REQUIRE(r.status == 0);
    CHECK(r.err.empty());
    // As many features as with the same cells left empty (missing by any
    // reading), not one per distinct text as a categorical column would give.
    std::string blank = read_file(data);
    for (std::size_t at; (at = blank.find("n/a")) != std::string::npos;) blank.erase(at, 3);
    const auto blank_data = dir.write("blank.csv", blank);
    const auto blank_metrics = dir.file("blank.json");
    REQUIRE(run({"train", "--data", blank_data, "--target", "output", "--epochs", "1", "--metrics", blank_metrics, "--quiet"}).status == 0);
    CHECK(cli_test::json_flattener(read_file(metrics)).values.at("features") ==
          cli_test::json_flattener(read_file(blank_metrics)).values.at("features"));
    dir.write("new.csv", "day,reading\n2024-02-03,n/a\n2024-02-04,-\n2024-02-05,none\n2024-02-06,12\n");
    const auto inferred = run({"infer", "--model", model, "--data", dir.file("new.csv"), "--out", "-"});
    CHECK(inferred.status == 0);
    CHECK(std::count(inferred.out.begin(), inferred.out.end(), '\n') == 5);
}

TEST_CASE("a column mostly of numbers that stays categorical is named in a warning") {
    scratch_dir dir("kind_warning");
    std::string csv = "code,output\n";
    for (int i = 0; i < 100; ++i) csv += (i % 3 == 0 ? "X" + std::to_string(i % 5) : std::to_string(i % 9)) + "," + std::to_string(i % 4) + ".5\n";
    const auto data = dir.write("log.csv", csv);
    const auto r = run({"train", "--data", data, "--target", "output", "--epochs", "1", "--quiet"});
    CHECK(r.status == 0);
    CHECK(r.err == "tenon train: warning: column 'code' is read as categorical (11 categories), although 66% of its cells read as numbers\n");
}

// ---------------------------------------------------------------------------
// Output bytes

TEST_CASE("table numbers are width-bounded: scientific notation from a million up") {
    using tenon_cli::detail::fixed;
    CHECK(fixed(11.06695, 4) == "11.0670");  // printf rounding of 11.06695 in binary: the nearest double is just above
    CHECK(fixed(999999.0, 1) == "999999.0");
    CHECK(fixed(3.4e38, 4) == "3.400e+38");
    CHECK(fixed(-1234567.0, 2) == "-1.23e+06");
    CHECK(fixed(std::numeric_limits<double>::infinity(), 4) == "-");
    CHECK(fixed(std::numeric_limits<float>::max(), 4).size() <= 12);
}

TEST_CASE("JSON strings: well-formed UTF-8 passes, anything else becomes U+FFFD (RFC 3629 section 4, RFC 8259 section 8.1)") {
    using tenon_cli::json_writer;
    CHECK(json_writer::escape("caf\xc3\xa9") == "caf\xc3\xa9");  // U+00E9, two bytes
    CHECK(json_writer::escape("\xe2\x82\xac") == "\xe2\x82\xac");  // U+20AC, three bytes
    CHECK(json_writer::escape("\xf0\x9f\x94\xa7") == "\xf0\x9f\x94\xa7");  // U+1F527, four bytes
    CHECK(json_writer::escape("ok\xff") == "ok\\ufffd");  // never valid
    CHECK(json_writer::escape("\xc0\xaf") == "\\ufffd\\ufffd");  // overlong '/'
    CHECK(json_writer::escape("\xed\xa0\x80") == "\\ufffd\\ufffd\\ufffd");  // a surrogate, U+D800
    CHECK(json_writer::escape("\xf4\x90\x80\x80") == "\\ufffd\\ufffd\\ufffd\\ufffd");  // above U+10FFFF
    CHECK(json_writer::escape("\xc3") == "\\ufffd");  // cut short
    CHECK(json_writer::escape("a\"b\n") == "a\\\"b\\n");
}

TEST_CASE("inspect --json on a model whose category holds a Latin-1 byte prints valid UTF-8") {
    scratch_dir dir("latin1");
    std::string csv = "site,load,output\n";
    for (int i = 0; i < 60; ++i)
        csv += std::string(i % 2 ? "Gen\xe8ve" : "Basel") + "," + std::to_string(i % 10) + "," + std::to_string(i % 10 * 2 + i % 2) + "\n";
    const auto data = dir.write("sites.csv", csv);
    const auto model = dir.file("m.tnm");
    REQUIRE(run({"train", "--data", data, "--target", "output", "--epochs", "1", "--model", model, "--quiet"}).status == 0);
    const auto r = run({"inspect", "--model", model, "--json"});
    REQUIRE(r.status == 0);
    CHECK(contains(r.out, "Gen\\ufffdve"));
    CHECK(r.out.find('\xe8') == std::string::npos);
    CHECK_NOTHROW(cli_test::json_flattener{r.out});
}

TEST_CASE("error lines escape control characters: a cell holding CR, LF or a tab stays on one line") {
    scratch_dir dir("control");
    std::string csv = "a,output\n";
    for (int i = 0; i < 40; ++i) csv += (i == 20 ? std::string("\"4\r\n2\t\"") : std::to_string(i)) + "," + std::to_string(i) + "\n";
    const auto data = dir.write("cells.csv", csv);
    const auto r = run({"train", "--data", data, "--target", "output", "--epochs", "1"});
    CHECK(r.status == 2);
    CHECK(contains(r.err, "'4\\r\\n2\\t'"));
    CHECK(std::count(r.err.begin(), r.err.end(), '\n') == 1);
    CHECK(r.err.find('\r') == std::string::npos);
}

TEST_CASE("--ignore leaving no input column is named in column terms, not as a layer of 0 inputs") {
    scratch_dir dir("no_inputs");
    const auto data = dir.write("two.csv", "a,b,output\n1,2,3\n4,5,6\n7,8,9\n");
    const auto r = run({"train", "--data", data, "--target", "output", "--ignore", "a,b"});
    CHECK(r.status == 2);
    CHECK(r.err ==
          "tenon train: error: [cli.option.conflict] " + data +
              ": no input column is left: the columns are a, b, output, of which 'output' is the target and the others are ignored or the group "
              "column\n");
}

TEST_CASE("wide one-hot inputs times the first hidden width above the weight limit are refused before training, naming the columns") {
    // 2,000 part numbers, each on two rows: about 2,000 one-hot features
    // (those of the training rows) times 65,536 units is above 100 million.
    scratch_dir dir("wide");
    std::string csv = "part,speed,flow\n";
    for (int i = 0; i < 4000; ++i)
        csv += "p" + std::to_string(i % 2000) + "," + std::to_string(1000 + i % 37) + "," + std::to_string(i % 11) + ".5\n";
    const auto data = dir.write("parts.csv", csv);
    const auto before = dir.listing();
    for (const char* folds : {"0", "3"}) {
        std::vector<std::string> args{"train", "--data",   data, "--target", "flow",           "--hidden",
                                      "65536", "--epochs", "1",  "--model",  dir.file("m.tnm")};
        if (std::string(folds) != "0") args = {"train", "--data", data, "--target", "flow", "--hidden", "65536", "--epochs", "1", "--folds", folds};
        const auto r = run(args);
        CHECK(r.status == 2);
        CHECK(contains(r.err, "[cli.option.value] " + data + ": "));
        CHECK(contains(r.err, "input features (the widest: 'part' "));
        CHECK(contains(r.err, "hidden layers 65536 and 1 outputs make "));
        CHECK(contains(r.err,
                       " weights (every network of the ensemble counted), above the limit of 100000000 (give narrower --hidden widths, "
                       "--ensemble 1, or --ignore the wide columns)\n"));
        CHECK(dir.listing() == before);
    }
    // The same data with a narrow layer trains.
    CHECK(run({"train", "--data", data, "--target", "flow", "--hidden", "4", "--epochs", "1", "--quiet"}).status == 0);
}

TEST_CASE("a field above 64 KiB is refused with its file, line and column, before anything is written") {
    scratch_dir dir("field");
    std::string csv = pump_csv(40);
    const std::string huge(70000, 'x');
    csv += "1200.0," + huge + ",3.5\n";  // line 42, column 2
    const auto data = dir.write("huge.csv", csv);
    const auto model = dir.file("m.tnm");
    const auto r = run({"train", "--data", data, "--target", "flow", "--epochs", "1", "--model", model});
    CHECK(r.status == 2);
    CHECK(contains(r.err, "[prep.csv.oversize] " + data + " line 42 column 2: a field longer than the limit of 65536 bytes"));
    CHECK(std::count(r.err.begin(), r.err.end(), '\n') == 1);
    CHECK_FALSE(fs::exists(model));
}

TEST_CASE("1e300 inputs that overflow when scaled are named by file line, column and value, in train and in infer") {
    scratch_dir dir("overflow");
    std::string csv = "speed,load,flow\n";
    for (int i = 0; i < 60; ++i) csv += std::string(i % 2 ? "1e300" : "-1e300") + "," + std::to_string(i % 9) + "," + std::to_string(i % 5) + ".25\n";
    const auto data = dir.write("big.csv", csv);
    const auto r = run({"train", "--data", data, "--target", "flow", "--epochs", "1", "--model", dir.file("m.tnm")});
    CHECK(r.status == 2);
    // The spread of +-1e300 overflows (its square is beyond double's range),
    // so the z-score leaves about 1e300, beyond single precision.
    CHECK(contains(r.err, "[prep.value.overflow] " + data + " line "));
    CHECK(contains(r.err, ", column 'speed': the value "));
    CHECK(contains(r.err, "e+300 scales to "));
    CHECK(contains(r.err, "beyond the single precision range (about 3.4e38)"));
    CHECK_FALSE(contains(r.err, "row 0"));
    CHECK_FALSE(fs::exists(dir.file("m.tnm")));

    // A model trained on ordinary speeds meets 1e300 in new rows: its data line.
    pump_setup p("overflow_infer");
    std::string rows = "speed,valve\n1000,open\n1e300,half\n";
    const auto fresh = p.dir.write("fresh.csv", rows);
    const auto i = run({"infer", "--model", p.model, "--data", fresh, "--out", p.dir.file("out.csv")});
    CHECK(i.status == 2);
    CHECK(contains(i.err, fresh + " line 3 column 1 ('speed'): '1e300' is beyond what the model computes with"));
    CHECK_FALSE(fs::exists(p.dir.file("out.csv")));
}

TEST_CASE("retrain refusing every new row names the first bad cell: file, line, column and value") {
    pump_setup p("retrain_refused");
    std::string rows = "speed,valve,flow\n";
    for (int i = 0; i < 30; ++i) rows += std::string(i == 0 ? "\"fa\rst\"" : "fast") + ",open,3.5\n";
    const auto fresh = p.dir.write("fresh.csv", rows);
    const auto r = run({"retrain", "--model", p.model, "--data", fresh, "--out", p.dir.file("next.tnm")});
    CHECK(r.status == 2);
    CHECK(contains(r.err,
                   "0 of the 30 new rows are usable (30 refused; the first, " + fresh + " line 2: column 'speed' holds 'fa\\rst', not a number)"));
    CHECK(std::count(r.err.begin(), r.err.end(), '\n') == 1);
    CHECK_FALSE(fs::exists(p.dir.file("next.tnm")));
    // A target that is not a number.
    std::string words = "speed,valve,flow\n";
    for (int i = 0; i < 30; ++i) words += std::to_string(1000 + i) + ",open,fast\n";
    const auto worded = p.dir.write("worded.csv", words);
    const auto w = run({"retrain", "--model", p.model, "--data", worded, "--out", p.dir.file("next.tnm")});
    CHECK(w.status == 2);
    CHECK(contains(w.err, "(30 refused; the first, " + worded + " line 2: column 'flow' (the target) holds 'fast', not a number)"));
}

TEST_CASE("a class too small for a stratified split is named by its label and the target column, not its code") {
    scratch_dir dir("small_class");
    std::string csv = "speed,kind\n";
    for (int i = 0; i < 60; ++i) csv += std::to_string(1000 + (i * 7) % 50) + "," + (i == 30 ? "rare" : i % 2 ? "pump" : "fan") + "\n";
    const auto data = dir.write("kinds.csv", csv);
    const auto r = run({"train", "--data", data, "--target", "kind", "--epochs", "1"});
    CHECK(r.status == 2);
    CHECK(contains(r.err, "[prep.split.class_too_small] " + data + ": stratified holdout: class 'rare' of the target 'kind' has 1 rows"));
    const auto f = run({"train", "--data", data, "--target", "kind", "--epochs", "1", "--folds", "3"});
    CHECK(f.status == 2);
    CHECK(contains(f.err, "stratified k-fold: class 'rare' of the target 'kind' has 1 rows, fewer than the 3 folds"));
}

TEST_CASE("columns all left out by the tool (counters) are named in column terms, not as a layer of 0 inputs") {
    scratch_dir dir("all_left_out");
    std::string csv = "a,b,y\n";
    for (int i = 0; i < 200; ++i) csv += std::to_string(i * 3) + "," + std::to_string(i) + "," + std::to_string(i % 3) + "\n";
    const auto data = dir.write("counters.csv", csv);
    const auto r = run({"train", "--data", data, "--target", "y", "--epochs", "1"});
    CHECK(r.status == 2);
    CHECK(contains(r.err, "[cli.option.conflict] " + data + ": no input column is left: the columns are a, b, y, of which 'y' is the target"));
    CHECK_FALSE(contains(r.err, "dense layer"));
}

#if !defined(TENON_TEST_SANITIZER)  // sanitizers reserve terabytes of address space, and abort on a failed allocation
TEST_CASE("running out of memory under a limit is one line saying so, and leaves no output") {
    // 16384 x 6000 = 98,304,000 weights between the layers (under the 100
    // million limit): 393 MB in single precision, with gradients and Adam's
    // two moments about 1.6 GB, above an address-space limit of what the
    // process maps now plus 768 MiB (POSIX setrlimit(), RLIMIT_AS:
    // allocations past it fail; /proc/self/statm's first field is the
    // mapped size in pages, proc(5)).
    pump_setup p("memory");
    const std::string model = p.dir.file("big.tnm"), report = p.dir.file("err.txt");
    const auto before = p.dir.listing();
    const pid_t child = ::fork();
    REQUIRE(child >= 0);
    if (child == 0) {
        unsigned long long pages = 0;
        if (!(std::ifstream("/proc/self/statm") >> pages)) ::_exit(98);
        struct rlimit limit {};
        limit.rlim_cur = limit.rlim_max = static_cast<rlim_t>(pages * static_cast<unsigned long long>(::sysconf(_SC_PAGESIZE)) + (768ull << 20));
        if (::setrlimit(RLIMIT_AS, &limit) != 0) ::_exit(99);
        const auto r =
            run({"train", "--data", p.data, "--target", "flow", "--hidden", "16384,6000", "--epochs", "1", "--ensemble", "1", "--model", model});
        std::ofstream(report) << r.err;
        ::_exit(r.status);
    }
    int status = 0;
    REQUIRE(::waitpid(child, &status, 0) == child);
    REQUIRE(WIFEXITED(status));
    CHECK(WEXITSTATUS(status) == 1);
    const std::string err = read_file(report);
    CHECK(contains(err, "tenon train: error: out of memory ("));
    CHECK(contains(err, "a smaller network (--hidden) or fewer rows or columns needs less"));
    CHECK(std::count(err.begin(), err.end(), '\n') == 1);
    fs::remove(report);
    CHECK(p.dir.listing() == before);
}
#endif
