// `tenon train` as a data-parallel team (what `mpirun -np N tenon train`
// does, examples/cli/main.cpp), run in process on every rank: each rank
// holds its share of the split's rows, rank 0 alone writes and prints, and
// without shuffling its model matches one process training with the ranks'
// batches concatenated.
#include <doctest/doctest.h>

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <fstream>
#include <sstream>
#include <string>
#include <vector>

#include <unistd.h>

#include <tenon/tenon.hpp>
#include <tenon/distributed/data_parallel.hpp>
#include <tenon/distributed/plan_merge.hpp>

#include "cli/tool.hpp"

namespace {

tenon::communicator& cli_world() {
    static tenon::communicator c;
    return c;
}

// An invented hydraulic press: force from pressure, stroke and die.
std::string press_csv(std::size_t rows) {
    tenon::random_engine rng(21);
    std::string csv = "pressure,stroke,die,force\n";
    const char* dies[] = {"flat", "round", "vee"};
    for (std::size_t i = 0; i < rows; ++i) {
        const double pressure = rng.uniform(50.0, 200.0), stroke = rng.uniform(10.0, 80.0);
        const std::size_t die = i % 3;
        const double force = 0.8 * pressure + 0.02 * stroke * stroke + 15.0 * static_cast<double>(die) + rng.normal(0.0, 2.0);
        char line[160];
        std::snprintf(line, sizeof line, "%.6f,%.6f,%s,%.6f\n", pressure, stroke, dies[die], force);
        csv += line;
    }
    return csv;
}

bool exists(const std::string& path) { return std::ifstream(path).good(); }

int run_tool(const std::vector<std::string>& args, tenon::training_team* team, std::string& out_text,
             tenon::statistics_exchange* exchange = nullptr) {
    std::vector<std::string> all = {"tenon"};
    all.insert(all.end(), args.begin(), args.end());
    std::vector<char*> argv;
    for (auto& a : all) argv.push_back(a.data());
    std::ostringstream out, err;
    tenon_cli::cli_environment env;
    env.team = team;
    env.exchange = exchange;
    const int status = tenon_cli::run_cli(static_cast<int>(argv.size()), argv.data(), out, err, env);
    out_text = out.str() + err.str();
    return status;
}

// The largest difference between two saved models' weights, and the largest weight.
double weight_difference(const std::string& a_path, const std::string& b_path, double& largest) {
    const auto a = tenon::load_model_file<float>(a_path);
    const auto b = tenon::load_model_file<float>(b_path);
    REQUIRE(a.weights.size() == b.weights.size());
    double worst = 0.0;
    largest = 1.0;
    for (std::size_t w = 0; w < a.weights.size(); ++w) {
        REQUIRE(a.weights[w].values.size() == b.weights[w].values.size());
        for (std::size_t i = 0; i < a.weights[w].values.size(); ++i) {
            worst =
                std::max(worst, std::abs(static_cast<double>(a.weights[w].values.data()[i]) - static_cast<double>(b.weights[w].values.data()[i])));
            largest = std::max(largest, std::abs(static_cast<double>(b.weights[w].values.data()[i])));
        }
    }
    return worst;
}

// The number before " training rows" in the tool's summary.
std::string training_rows_line(const std::string& printed) {
    const auto end = printed.find(" training rows");
    if (end == std::string::npos) return "";
    const auto start = printed.rfind('\n', end);
    return printed.substr(start == std::string::npos ? 0 : start + 1, end - (start == std::string::npos ? 0 : start + 1));
}

}  // namespace

TEST_CASE("tenon train on p ranks: each rank holds its share of the rows, rank 0 writes the model, and with --keep-order it equals one "
          "process with p times the batch") {
    tenon::communicator& world = cli_world();
    const std::size_t p = world.size();
    // One directory for all ranks (rank 0's process id), so every rank reads the same file.
    std::int64_t id[1] = {world.rank() == 0 ? static_cast<std::int64_t>(::getpid()) : 0};
    double id_value[1] = {static_cast<double>(id[0])};
    world.sum(id_value, 1);
    const std::string dir = "/tmp/tenon_mpi_cli_" + std::to_string(static_cast<long long>(id_value[0]));
    const std::string data = dir + "_press.csv", model = dir + "_ranks.tnm", metrics = dir + "_ranks.json";
    const std::string ordered_model = dir + "_ordered.tnm", alone_model = dir + "_alone.tnm";
    if (world.rank() == 0) {
        std::ofstream(data) << press_csv(400);
    }
    world.barrier();

    tenon::mpi_team team(world);
    tenon::mpi_statistics_exchange exchange(world);
    std::string printed;
    const std::vector<std::string> common = {"train", "--data", data, "--target", "force", "--epochs", "6", "--seed", "3", "--hidden", "12"};
    const auto with = [&](std::vector<std::string> extra) {
        std::vector<std::string> args = common;
        args.insert(args.end(), extra.begin(), extra.end());
        return args;
    };
    // Shuffled (the default): a team without an exchange cannot measure one plan.
    CHECK(run_tool(with({"--batch", "8"}), &team, printed) == tenon_cli::exit_bad_input);
    CHECK((world.rank() != 0 || printed.find("[train.option.invalid] fit_model: a team whose members hold shards") != std::string::npos));
    const int status = run_tool(with({"--batch", "8", "--model", model, "--metrics", metrics}), &team, printed, &exchange);
    CHECK(status == 0);
    world.barrier();
    if (world.rank() == 0) {
        CHECK(printed.find("model written to " + model) != std::string::npos);
        CHECK(exists(model));
        CHECK(exists(metrics));
    } else {
        CHECK(printed.empty());  // only rank 0 prints
    }
    std::string ordered_printed;
    REQUIRE(run_tool(with({"--batch", "8", "--keep-order", "--model", ordered_model}), &team, ordered_printed, &exchange) == 0);
    world.barrier();

    if (world.rank() == 0) {
        // Rank k holds the split's training rows k, k + p, ...: without
        // shuffling, the ranks' batch j together are the rows [8 p j, 8 p (j + 1))
        // one process takes in order with batch 8 p.
        // One process as a team of one: without a team, fit_model also fits
        // the baseline, starts the linear path from it and averages a seed
        // ensemble, which a team does not (issue 19).
        tenon::communicator self(MPI_COMM_SELF);
        tenon::mpi_team solo(self);
        tenon::mpi_statistics_exchange solo_exchange(self);
        std::string alone_printed;
        REQUIRE(run_tool(with({"--batch", std::to_string(8 * p), "--keep-order", "--model", alone_model}), &solo, alone_printed, &solo_exchange) ==
                0);
        CHECK(training_rows_line(ordered_printed) == training_rows_line(alone_printed));  // the summary counts every rank's rows
        CHECK(!training_rows_line(alone_printed).empty());
        double largest = 1.0;
        const double worst = weight_difference(ordered_model, alone_model, largest);
        CHECK(worst <= 1e-4 * largest);
        std::printf("tenon train --keep-order on %zu ranks (batch 8 each, one share of the rows each) vs one process (batch %zu): max weight "
                    "difference %.3g\n",
                    p, 8 * p, worst);
        // Shuffled, the ranks draw their own orders: another model than in order.
        double unused = 1.0;
        CHECK(weight_difference(model, ordered_model, unused) > 0.0);
        for (const auto& f : {data, model, metrics, ordered_model, alone_model}) std::remove(f.c_str());
    }
    world.barrier();
}
