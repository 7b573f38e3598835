// A first look at the tape: a cooling-pump model predicts motor power from
// flow and pressure head with a tiny linear model, and the tape computes how
// the mean squared error changes with each weight. The numbers are invented.
#include <cstdio>

#include <tenon/tenon.hpp>

int main() {
    using tenon::make_matrix;
    // Readings: flow [m3/h] and head [m], scaled to roughly unit range.
    const auto readings = make_matrix<double>({{0.8, 0.30}, {1.1, 0.25}, {0.5, 0.40}, {1.4, 0.20}});
    // Measured motor power [kW], scaled.
    const auto power = make_matrix<double>({{0.61}, {0.74}, {0.52}, {0.88}});

    tenon::parameter<double> weights("weights", make_matrix<double>({{0.5}, {0.5}}));
    tenon::parameter<double> bias("bias", make_matrix<double>({{0.0}}));

    tenon::tape<double> tape;
    const auto x = tape.input(readings);
    const auto prediction = tenon::matmul(x, tape.track(weights)) + tape.track(bias);
    const auto loss = tenon::mean(tenon::square(prediction - tape.input(power)));
    tape.backward(loss);

    std::printf("tenon %s: recorded %zu operations\n", tenon::version_string(), tape.size());
    std::printf("mean squared error: %.6f\n", loss.value()(0, 0));
    std::printf("d(loss)/d(weight for flow): %+.6f\n", weights.grad()(0, 0));
    std::printf("d(loss)/d(weight for head): %+.6f\n", weights.grad()(1, 0));
    std::printf("d(loss)/d(bias):            %+.6f\n", bias.grad()(0, 0));

    // The same gradients by central finite differences, as a host would check
    // its own components.
    const auto report = tenon::check_gradients({&weights, &bias}, [&](tenon::tape<double>& t) {
        const auto p = tenon::matmul(t.input(readings), t.track(weights)) + t.track(bias);
        return tenon::mean(tenon::square(p - t.input(power)));
    });
    std::printf("finite-difference check: worst relative error %.2e\n", report.max_rel_error);
    return report.max_rel_error < 1e-6 ? 0 : 1;
}
