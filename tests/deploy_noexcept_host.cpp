// A serving host built with -fno-exceptions and only <tenon/serve.hpp>: it
// loads through try_load_model_file (a missing file, a damaged copy and the
// wrong scalar type come back as statuses; nothing aborts) and predicts
// through the non-throwing calls, checking statuses. Exit code 0 = pass.
#include <cstdio>
#include <fstream>
#include <iterator>
#include <string>
#include <string_view>
#include <vector>

#include <tenon/serve.hpp>

namespace {
bool expect_status(const tenon::load_status& s, const char* code) {
    if (s.ok() || std::string_view(s.code) != code) {
        std::fprintf(stderr, "expected %s, got %s (%s)\n", code, s.ok() ? "ok" : s.code, s.message.c_str());
        return false;
    }
    return true;
}
}  // namespace

int main(int argc, char** argv) {
    // With --raise: a failure goes to the host's handler, then the process
    // aborts (ctest test tenon_deploy_noexcept_handler reads the line).
    if (argc > 1 && std::string_view(argv[1]) == "--raise") {
        tenon::set_failure_handler(
            [](const char* code, const char* message) noexcept { std::fprintf(stderr, "host handler saw [%s] %s\n", code, message); });
        tenon::raise(tenon::codes::core_argument_invalid, "a failure asked for\nby the test");
    }
    const std::string path = std::string(TENON_SOURCE_DIR) + "/tests/fixtures/deploy/pump_v1_float.tnm";
    tenon::model_file<float> file;
    const tenon::load_status loaded = tenon::try_load_model_file(path, file);
    if (!loaded.ok()) {
        std::fprintf(stderr, "expected the fixture to load, got %s: %s\n", loaded.code, loaded.message.c_str());
        return 1;
    }
    tenon::model_file<float> unused;
    if (!expect_status(tenon::try_load_model_file(path + ".absent", unused), "deploy.file.io")) return 1;
    tenon::model_file<double> as_double;
    if (!expect_status(tenon::try_load_model_file(path, as_double), "deploy.model.scalar_type")) return 1;
    // A copy with one byte of the last section's payload flipped.
    if (argc > 1) {
        std::ifstream in(path, std::ios::binary);
        std::vector<char> bytes((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
        bytes[bytes.size() - 3] = static_cast<char>(bytes[bytes.size() - 3] ^ 0x10);
        const std::string damaged = std::string(argv[1]) + "/noexcept_host_damaged.tnm";
        std::ofstream(damaged, std::ios::binary).write(bytes.data(), static_cast<std::streamsize>(bytes.size()));
        if (!expect_status(tenon::try_load_model_file(damaged, unused), "deploy.model.checksum")) return 1;
    }

    tenon::predictor<float> p(file, 4);
    tenon::prediction_view<float> out;
    const tenon::named_value good[] = {{"flow", "35"}, {"head", "12.5"}, {"fluid", "water"}};
    const tenon::predict_status ok = p.try_predict_named(good, 3, out);
    if (!ok.ok() || out.width != 3) {
        std::fprintf(stderr, "expected a prediction, got %s\n", ok.code_text());
        return 1;
    }
    const tenon::named_value bad[] = {{"flow", "35"}, {"fluid", "water"}};
    const tenon::predict_status missing = p.try_predict_named(bad, 2, out);
    if (missing.code != tenon::input_status::missing_column || std::string_view(missing.code_text()) != "deploy.input.missing_column") {
        std::fprintf(stderr, "expected deploy.input.missing_column, got '%s'\n", missing.code_text());
        return 1;
    }
    std::printf("no-exceptions host: loaded through try_load_model_file; predicted %.6f %.6f %.6f; missing column reported as %s\n",
                static_cast<double>(out.at(0, 0)), static_cast<double>(out.at(0, 1)), static_cast<double>(out.at(0, 2)), missing.code_text());
    return 0;
}
