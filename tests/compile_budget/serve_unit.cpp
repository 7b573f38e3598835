// A serving unit: load a model file and predict one row, through the one
// serving include.
#include <cstdio>

#include <tenon/serve.hpp>

int main(int argc, char** argv) {
    if (argc < 2) return 2;
    tenon::model_file<float> file;
    const tenon::load_status loaded = tenon::try_load_model_file(argv[1], file);
    if (!loaded.ok()) return 1;
    tenon::predictor<float> p(file, 1);
    const tenon::named_value row[] = {{"flow", "35"}, {"head", "12.5"}, {"fluid", "water"}};
    tenon::prediction_view<float> out;
    const tenon::predict_status s = p.try_predict_named(row, 3, out);
    std::printf("%s %f\n", s.code_text(), s.ok() ? static_cast<double>(out.at(0, 0)) : 0.0);
    return 0;
}
