// `tenon train` as a data-parallel team (what `mpirun -np N tenon train`
// does, examples/cli/main.cpp), run in process on every rank: rank 0 alone
// writes and prints, and its model matches one process training with the
// ranks' batches concatenated.
#include <doctest/doctest.h>

#include <cmath>
#include <cstdio>
#include <fstream>
#include <sstream>
#include <string>
#include <vector>

#include <unistd.h>

#include <tenon/distributed/data_parallel.hpp>

#include "cli/cli.hpp"

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

int run_tool(const std::vector<std::string>& args, tenon::training_team* team, std::string& out_text) {
    std::vector<std::string> all = {"tenon"};
    all.insert(all.end(), args.begin(), args.end());
    std::vector<char*> argv;
    for (auto& a : all) argv.push_back(a.data());
    std::ostringstream out, err;
    tenon_cli::cli_environment env;
    env.team = team;
    const int status = tenon_cli::run_cli(static_cast<int>(argv.size()), argv.data(), out, err, env);
    out_text = out.str() + err.str();
    return status;
}

}  // namespace

TEST_CASE("tenon train on p ranks: rank 0 writes the model, and it equals one process with p times the batch") {
    tenon::communicator& world = cli_world();
    const std::size_t p = world.size();
    // One directory for all ranks (rank 0's process id), so every rank reads the same file.
    std::int64_t id[1] = {world.rank() == 0 ? static_cast<std::int64_t>(::getpid()) : 0};
    double id_value[1] = {static_cast<double>(id[0])};
    world.sum(id_value, 1);
    const std::string dir = "/tmp/tenon_mpi_cli_" + std::to_string(static_cast<long long>(id_value[0]));
    const std::string data = dir + "_press.csv", model = dir + "_ranks.tnm", metrics = dir + "_ranks.json";
    const std::string alone_model = dir + "_alone.tnm";
    if (world.rank() == 0) {
        std::ofstream(data) << press_csv(400);
    }
    world.barrier();

    tenon::mpi_team team(world);
    std::string printed;
    const std::vector<std::string> common = {"train", "--data", data, "--target", "force", "--epochs", "6", "--seed", "3", "--hidden", "12"};
    std::vector<std::string> shared = common;
    for (const char* a : {"--batch", "8"}) shared.emplace_back(a);
    for (const std::string& a : {std::string("--model"), model, std::string("--metrics"), metrics}) shared.push_back(a);
    const int status = run_tool(shared, &team, printed);
    CHECK(status == 0);
    world.barrier();
    if (world.rank() == 0) {
        CHECK(printed.find("model written to " + model) != std::string::npos);
        CHECK(exists(model));
        CHECK(exists(metrics));
    } else {
        CHECK(printed.empty());  // only rank 0 prints
    }

    if (world.rank() == 0) {
        std::vector<std::string> alone = common;
        for (const std::string& a : {std::string("--batch"), std::to_string(8 * p), std::string("--model"), alone_model}) alone.push_back(a);
        std::string alone_printed;
        REQUIRE(run_tool(alone, nullptr, alone_printed) == 0);
        const auto a = tenon::load_model_file<float>(model);
        const auto b = tenon::load_model_file<float>(alone_model);
        REQUIRE(a.weights.size() == b.weights.size());
        double worst = 0.0, largest = 1.0;
        for (std::size_t w = 0; w < a.weights.size(); ++w)
            for (std::size_t i = 0; i < a.weights[w].values.size(); ++i) {
                worst = std::max(worst, std::abs(static_cast<double>(a.weights[w].values.data()[i]) - static_cast<double>(b.weights[w].values.data()[i])));
                largest = std::max(largest, std::abs(static_cast<double>(b.weights[w].values.data()[i])));
            }
        CHECK(worst <= 1e-4 * largest);
        std::printf("tenon train on %zu ranks (batch 8 each) vs one process (batch %zu): max weight difference %.3g\n", p, 8 * p, worst);
        for (const auto& f : {data, model, metrics, alone_model}) std::remove(f.c_str());
    }
    world.barrier();
}
