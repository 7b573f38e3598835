// A host application built against an installed tenon: records y = sum(w * x)
// and checks that the gradient with respect to w equals x. Built with the
// gzip component (tenon::gzip defines TENON_HAS_ZLIB), it also calls zlib
// through tenon, so a component whose dependency was not linked fails here.
#include <cstdio>
#include <cstdlib>
#include <string>

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
    return ok ? EXIT_SUCCESS : EXIT_FAILURE;
}
