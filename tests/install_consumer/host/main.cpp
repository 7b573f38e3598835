// A host application built against an installed tenon: records y = sum(w * x)
// and checks that the gradient with respect to w equals x. Built with the
// gzip component (tenon::gzip defines TENON_HAS_ZLIB), it also calls zlib
// through tenon, so a component whose dependency was not linked fails here.
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <sstream>
#include <string>
#include <vector>

#include <tenon/tenon.hpp>
#if defined(TENON_SERVE_COMPILED)
#include <tenon/serve.hpp>
#endif

int main() {
    tenon::parameter<double> w("w", tenon::make_matrix<double>({{1.0, 2.0, 3.0}}));
    tenon::tape<double> tape;
    const auto x = tape.input(tenon::make_matrix<double>({{4.0, 5.0, 6.0}}));
    tape.backward(tenon::sum(tape.track(w) * x));
    const double* g = w.grad().data();
    bool ok = g[0] == 4.0 && g[1] == 5.0 && g[2] == 6.0;
    std::printf("tenon %s host: gradient %g %g %g: %s\n", tenon::version_string(), g[0], g[1], g[2], ok ? "ok" : "WRONG");
#if defined(TENON_HAS_ZLIB)
    try {
        (void)tenon::read_idx_gzip_file("no-such-file.idx.gz");
        ok = false;
    } catch (const tenon::error& e) {
        const bool expected = std::string(e.code()) == "prep.file.open";
        std::printf("tenon host with gzip: %s\n", expected ? "ok" : e.what());
        ok = ok && expected;
    }
#endif
#if defined(TENON_SERVE_COMPILED)
    // tenon::serve: the loader and the predictor come from the one unit the
    // component added; this unit only declares them (it links only if that
    // unit was compiled in).
    tenon::model_file<float> file;
    const tenon::load_status st = tenon::try_load_model_file("no-such-model.tnm", file);
    if (st.ok()) {
        tenon::predictor<float> p(file, 1);
        std::printf("inputs %zu\n", p.input_count());
    }
    const bool refused = !st.ok() && std::string(st.code) == "deploy.file.io";
    std::printf("tenon host with serve: %s\n", refused ? "ok" : st.message.c_str());
    ok = ok && refused;
#endif
#if defined(TENON_TRAIN_COMPILED)
    // tenon::train: fit_model and make_model_file come from the one unit the
    // component added (with tenon::serve too, each unit sees the other's
    // mode). A line y = 2x + 1 on 40 rows, scored on them; its file read back.
    std::string csv = "x,y\n";
    for (int i = 0; i < 40; ++i) csv += std::to_string(i * 0.05) + "," + std::to_string(2.0 * i * 0.05 + 1.0) + "\n";
    std::istringstream in(csv);
    const tenon::table t = tenon::read_csv(in, {}, "line.csv");
    tenon::plan p;
    p.set_target("y", tenon::target_kind::regression);
    tenon::model_settings s;
    s.hidden = {4};
    s.epochs = 3;
    std::vector<std::size_t> rows(40);
    for (std::size_t i = 0; i < rows.size(); ++i) rows[i] = i;
    const tenon::fitted_model<float> model = tenon::fit_model<float>(t, p, rows, {}, s);
    const tenon::model_file<float> written = tenon::make_model_file(model, t);
    const tenon::evaluation scored = tenon::evaluate_model(model, t, rows);
    // Read back from its bytes through the loader (the serve unit's, when linked).
    const tenon::model_file<float> read = tenon::model_file_from_bytes<float>(tenon::model_file_to_bytes(written));
    const bool trained = written.plan.has_value() && !written.weights.empty() && read.weights.size() == written.weights.size() && scored.rows == 40 &&
        std::isfinite(scored.rmse);
    std::printf("tenon host with train: %s\n", trained ? "ok" : "WRONG");
    ok = ok && trained;
#endif
    return ok ? EXIT_SUCCESS : EXIT_FAILURE;
}
