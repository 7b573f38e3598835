// A host built with -fno-exceptions: it loads nothing that could fail here
// (the model comes from the committed fixture, known good) and predicts
// through the non-throwing calls, checking statuses. Exit code 0 = pass.
#include <cstdio>
#include <string>
#include <string_view>

#include <tenon/deploy/predictor.hpp>

int main() {
    const std::string path = std::string(TENON_SOURCE_DIR) + "/tests/fixtures/deploy/pump_v1_float.tnm";
    tenon::predictor<float> p(tenon::load_model_file<float>(path), 4);
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
    std::printf("no-exceptions host: predicted %.6f %.6f %.6f; missing column reported as %s\n", static_cast<double>(out.at(0, 0)),
                static_cast<double>(out.at(0, 1)), static_cast<double>(out.at(0, 2)), missing.code_text());
    return 0;
}
