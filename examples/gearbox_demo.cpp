// tenon demo: telling a conveyor gearbox's condition from its sensor readings.
//
// On an invented plant log (its columns: docs/design/tests.md) the program
// prepares the data with a plan measured on the training rows,
// trains a perceptron with early stopping (printing progress), scores the
// test rows, writes an SVG report (to argv[1], or gearbox_report.svg here),
// and predicts the condition of one new reading given as raw cells.
//
// Build and run:  cmake --build build --target tenon_demo && build/examples/tenon_demo
#include <cmath>
#include <cstdio>
#include <fstream>
#include <sstream>
#include <string>
#include <utility>
#include <vector>

#include <tenon/tenon.hpp>

namespace {

const char* const conditions[] = {"healthy", "misalignment", "bearing_wear", "lubrication_loss"};
const char* const models[] = {"GB-200", "GB-350", "GB-500"};

// One shift's readings for a gearbox in the given condition.
std::string reading(tenon::random_engine& rng, std::size_t condition) {
    const std::size_t model = static_cast<std::size_t>(rng.below(3));
    const double size = 1.0 + 0.35 * static_cast<double>(model);  // bigger boxes vibrate a little more
    const double load = rng.uniform(30.0, 100.0);  // percent of rated torque
    const double speed = rng.uniform(900.0, 1800.0);  // rpm at the input shaft
    double peak_1x = size * (0.6 + 0.012 * load) * rng.uniform(0.8, 1.2);
    double peak_2x = 0.35 * peak_1x * rng.uniform(0.7, 1.3);
    double kurtosis = rng.normal(3.0, 0.35);
    double oil = 38.0 + 0.28 * load + rng.normal(0.0, 2.5);
    double particles = std::exp(rng.normal(std::log(180.0), 0.35));
    switch (condition) {
    case 1:  // misalignment: 2x grows beyond 1x, more so under load
        peak_2x = peak_1x * rng.uniform(0.35, 1.1) * (0.6 + 0.005 * load);
        break;
    case 2:  // bearing wear: impacts raise the envelope kurtosis, speed makes them sharper
        kurtosis += rng.uniform(0.2, 2.0) * (0.4 + speed / 3000.0);
        particles *= rng.uniform(1.2, 2.2);
        break;
    case 3:  // lubrication loss: hotter than the load explains, more wear metal
        oil += rng.uniform(2.0, 14.0);
        particles *= rng.uniform(1.2, 3.0);
        break;
    default: break;
    }
    const double rms = std::sqrt(peak_1x * peak_1x + peak_2x * peak_2x + 0.08 * kurtosis * kurtosis) * rng.uniform(0.95, 1.05);
    char line[256];
    char particle_cell[32] = "";
    if (rng.uniform01() >= 0.06) std::snprintf(particle_cell, sizeof particle_cell, "%.0f", particles);
    std::snprintf(line, sizeof line, "%s,%.1f,%.0f,%.3f,%.3f,%.3f,%.2f,%.1f,%s,%s\n", models[model], load, speed, rms, peak_1x, peak_2x, kurtosis,
                  oil, particle_cell, conditions[condition]);
    return line;
}

tenon::table gearbox_log(std::size_t rows, std::uint64_t seed) {
    tenon::random_engine rng(seed);
    std::string csv = "gearbox_model,load_percent,speed_rpm,vibration_rms,peak_1x,peak_2x,envelope_kurtosis,oil_temp_c,particle_count,condition\n";
    for (std::size_t i = 0; i < rows; ++i) {
        const double u = rng.uniform01();
        const std::size_t condition = u < 0.55 ? 0 : u < 0.70 ? 1 : u < 0.85 ? 2 : 3;
        csv += reading(rng, condition);
    }
    std::istringstream in(csv);
    return tenon::read_csv(in, {}, "gearbox_log.csv");
}

}  // namespace

int main(int argc, char** argv) {
    try {
        const std::string report_path = argc > 1 ? argv[1] : "gearbox_report.svg";
        const tenon::table log = gearbox_log(3000, 2024);
        std::printf("tenon %s demo: conveyor gearbox condition from %zu logged readings\n", tenon::version_string(), log.row_count());

        // 1. Prepare: roles and steps. Every statistic is measured on the training rows only.
        tenon::plan preparation;
        preparation.set_target("condition", tenon::target_kind::classification);
        tenon::feature_steps numeric;
        numeric.fill = tenon::fill_method::median;
        numeric.scaling = tenon::scaling_method::z_score;
        tenon::feature_steps sometimes_missing = numeric;
        sometimes_missing.missing_indicator = true;  // "sensor offline" may itself carry information
        tenon::feature_steps category;
        category.fill = tenon::fill_method::mode;
        category.unseen = tenon::unseen_policy::all_zero;
        preparation.set_default_steps(numeric);
        preparation.set_steps("particle_count", sometimes_missing);
        preparation.set_steps("gearbox_model", category);

        // 2. Split: every condition keeps its share in train, validation and test.
        const auto split = tenon::stratified_holdout(tenon::dense_codes(log.at("condition")), {0.7, 0.15, 0.15}, 7);
        std::printf("split: %zu train, %zu validation, %zu test rows\n\n", split.train.size(), split.validation.size(), split.test.size());

        // 3. Train with early stopping, printing every 10th epoch.
        tenon::model_settings settings;
        settings.hidden = {64, 32};
        settings.epochs = 150;
        settings.patience = 15;
        settings.seed = 7;
        settings.on_epoch = [epochs = settings.epochs](const tenon::epoch_summary& e) {
            if (e.epoch == 1 || e.epoch % 10 == 0)
                std::printf("  epoch %3zu of %zu | training loss %.4f | validation loss %.4f | validation accuracy %.3f\n", e.epoch, epochs,
                            e.training_loss, e.validation_loss, e.validation_metric);
            return true;
        };
        auto model = tenon::fit_model<float>(log, preparation, split.train, split.validation, settings);
        std::printf("stopped after %zu epochs (%s), kept epoch %zu, %.2f s\n\n", model.outcome.history.size(), model.outcome.message.c_str(),
                    model.outcome.best_epoch, model.outcome.seconds);

        // 4. Score the test rows.
        const tenon::evaluation test = tenon::evaluate_model(model, log, split.test);
        std::printf("test rows: %zu  accuracy %.3f  macro F1 %.3f  log loss %.3f\n", test.rows, test.accuracy, test.macro_f1, test.log_loss);
        const auto& names = model.plan.class_names();
        for (std::size_t c = 0; c < names.size(); ++c)
            std::printf("  %-17s recall %.3f  precision %.3f  (%zu rows)\n", names[c].c_str(), test.classes.per_class[c].recall,
                        test.classes.per_class[c].precision, test.classes.per_class[c].true_rows);

        // 5. The report: loss curves and the test confusion matrix.
        tenon::report_content content;
        content.title = "Conveyor gearbox condition (invented data)";
        for (const auto& e : model.outcome.history) content.epochs.push_back({e.training_loss, e.validation_loss});
        content.kept_epoch = model.outcome.best_epoch;
        content.confusion = &test.classes.confusion;
        content.class_names = names;
        std::ofstream svg(report_path, std::ios::binary);
        svg << tenon::training_report_svg(content);
        svg.close();
        if (!svg) {
            std::fprintf(stderr, "cannot write the report to %s\n", report_path.c_str());
            return 1;
        }
        std::printf("\nreport written to %s\n", report_path.c_str());

        // 6. A new reading as it arrives from the plant: raw cells by column
        // name, the particle sensor offline (empty cell).
        const std::vector<std::pair<std::string, std::string>> new_reading = {
            {"gearbox_model", "GB-350"}, {"load_percent", "82"},       {"speed_rpm", "1450"},  {"vibration_rms", "2.8"}, {"peak_1x", "2.2"},
            {"peak_2x", "1.5"},          {"envelope_kurtosis", "3.1"}, {"oil_temp_c", "62.5"}, {"particle_count", ""}};
        tenon::matrix<float> features({1, model.plan.feature_count()});
        model.plan.apply_named(new_reading, features.data());
        const tenon::matrix<float> probabilities = tenon::predict_prepared(model, features);
        std::size_t best = 0;
        for (std::size_t c = 1; c < names.size(); ++c)
            if (probabilities(0, c) > probabilities(0, best)) best = c;
        std::printf("new reading (GB-350, 82%% load, 2x peak at 0.7 of 1x, particle sensor offline): %s\n", names[best].c_str());
        for (std::size_t c = 0; c < names.size(); ++c) std::printf("  p(%s) = %.3f\n", names[c].c_str(), static_cast<double>(probabilities(0, c)));
        return 0;
    } catch (const tenon::error& e) {
        std::fprintf(stderr, "tenon demo: %s\n", e.what());
        return 1;
    }
}
