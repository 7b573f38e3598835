// A host application built against an installed tenon: records y = sum(w * x)
// and checks that the gradient with respect to w equals x. Built with the
// gzip component (tenon::gzip defines TENON_HAS_ZLIB), it also calls zlib
// through tenon, so a component whose dependency was not linked fails here.
#include <cstdio>
#include <cstdlib>
#include <string>

#include <tenon/tenon.hpp>

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
    return ok ? EXIT_SUCCESS : EXIT_FAILURE;
}
