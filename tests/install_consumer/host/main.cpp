// A host application built against an installed tenon: records y = sum(w * x)
// and checks that the gradient with respect to w equals x.
#include <cstdio>
#include <cstdlib>

#include <tenon/tenon.hpp>

int main() {
    tenon::parameter<double> w("w", tenon::make_matrix<double>({{1.0, 2.0, 3.0}}));
    tenon::tape<double> tape;
    const auto x = tape.input(tenon::make_matrix<double>({{4.0, 5.0, 6.0}}));
    tape.backward(tenon::sum(tape.track(w) * x));
    const double* g = w.grad().data();
    const bool ok = g[0] == 4.0 && g[1] == 5.0 && g[2] == 6.0;
    std::printf("tenon %s host: gradient %g %g %g: %s\n", tenon::version_string(), g[0], g[1], g[2], ok ? "ok" : "WRONG");
    return ok ? EXIT_SUCCESS : EXIT_FAILURE;
}
