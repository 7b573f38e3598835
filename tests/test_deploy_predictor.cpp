// Tests of the predictor: bit-exact agreement with the trainer, raw rows
// (named, ordered, typed), input errors and range flags, zero allocations
// per call, threads, and the holder swapping models under load.
#include <doctest/doctest.h>

#include <atomic>
#include <cstdlib>
#include <limits>
#include <new>
#include <string>
#include <thread>
#include <vector>

#include <tenon/deploy/predictor.hpp>

#include "deploy_test_support.hpp"

// GCC sees malloc/free pairs through the replaced operators and warns.
#if defined(__GNUC__) && !defined(__clang__)
#pragma GCC diagnostic ignored "-Wmismatched-new-delete"
#endif

// ThreadSanitizer brings its own allocation functions; the TSan build of
// this file (see the deploy report) leaves out the counting ones and the
// allocation test.
#include "sanitizer_build.hpp"

// Counting global allocation functions: a call is allocation-free when the
// count does not move while `counting` is on in this thread.
namespace {
[[maybe_unused]] thread_local bool counting = false;
[[maybe_unused]] thread_local std::size_t allocations = 0;
}  // namespace

#if !defined(TENON_TEST_TSAN)
void* operator new(std::size_t size) {
    if (counting) ++allocations;
    if (void* p = std::malloc(size ? size : 1)) return p;
    throw std::bad_alloc();
}
void operator delete(void* p) noexcept { std::free(p); }
void operator delete(void* p, std::size_t) noexcept { std::free(p); }
#endif

namespace {

using namespace deploy_test;

template <class T>
struct trained {
    tenon::table t = pump_table(300, 21);
    std::vector<std::size_t> train = range(0, 220), validation = range(220, 260), test = range(260, 300);
    tenon::fitted_model<T> model;
    explicit trained(const tenon::plan& p) : model(tenon::fit_model<T>(t, p, train, validation, small_settings())) {}
};

// The raw cells of `rows` of t in the predictor's input-column order.
std::vector<std::string> raw_cells(const tenon::table& t, const std::vector<std::size_t>& rows, const std::vector<std::string>& columns) {
    std::vector<std::string> cells;
    for (auto r : rows)
        for (const auto& name : columns) {
            const auto& c = t.at(name);
            cells.push_back(c.kind() == tenon::column_kind::categorical ? c.category(r) : tenon::number_to_text(c.number(r)));
        }
    return cells;
}

}  // namespace

TEST_CASE_TEMPLATE("a predictor from a loaded file gives the trainer's predictions to the last bit", T, float, double) {
    for (const bool classify : {true, false}) {
        trained<T> run(classify ? condition_plan() : power_plan());
        const auto features = run.model.plan.template apply<T>(run.t, run.test).features;
        const tenon::matrix<T> expected = tenon::predict_prepared(run.model, features);

        const std::string path = "/tmp/tenon_deploy_predictor_" + std::to_string(::getpid()) + ".tnm";
        tenon::save_model_file(path, tenon::make_model_file(run.model, run.t, run.train, small_settings()));
        tenon::predictor<T> from_file(tenon::load_model_file<T>(path), 64);
        std::remove(path.c_str());
        tenon::predictor<T> from_fit(run.model, 64);
        CHECK(from_file.is_classification() == classify);

        const std::size_t rows = features.shape()[0];
        const auto a = from_file.predict_prepared(features.data(), rows);
        REQUIRE(a.width == expected.shape()[1]);
        for (std::size_t k = 0; k < expected.size(); ++k) CHECK(same_bits(a.values[k], expected.data()[k]));
        const auto b = from_fit.predict_prepared(features.data(), rows);
        for (std::size_t k = 0; k < expected.size(); ++k) CHECK(same_bits(b.values[k], expected.data()[k]));

        // Raw cells through the stored plan give the same bits as well.
        std::vector<std::string> columns;
        for (std::size_t k = 0; k < from_file.input_count(); ++k) columns.push_back(from_file.input_name(k));
        const auto cells = raw_cells(run.t, run.test, columns);
        std::vector<std::string_view> views(cells.begin(), cells.end());
        const auto c = from_file.predict_cells(views.data(), rows);
        for (std::size_t k = 0; k < expected.size(); ++k) CHECK(same_bits(c.values[k], expected.data()[k]));
    }
}

TEST_CASE_TEMPLATE("a seed ensemble's mean and spread per row, from a fit and from its file", T, float, double) {
    for (const bool classify : {true, false}) {
        trained<T> run(classify ? condition_plan() : power_plan());
        REQUIRE(run.model.member_count() == 5);  // the default under 10,000 training rows
        const auto features = run.model.plan.template apply<T>(run.t, run.test).features;
        const std::size_t rows = features.shape()[0];
        const tenon::matrix<T> expected = tenon::predict_prepared(run.model, features);
        const auto file =
            tenon::model_file_from_bytes<T>(tenon::model_file_to_bytes(tenon::make_model_file(run.model, run.t, run.train, small_settings())));
        CHECK(file.members.size() == 4);
        tenon::predictor<T> from_file(file, 64);
        CHECK(from_file.member_count() == 5);
        const auto v = from_file.predict_prepared(features.data(), rows);
        REQUIRE(v.members == 5);
        for (std::size_t k = 0; k < expected.size(); ++k) CHECK(same_bits(v.values[k], expected.data()[k]));
        // Each member alone, as its own network gives it; the spread is the
        // sample standard deviation (n - 1) of the five about their mean.
        for (std::size_t m = 0; m < 5; ++m) {
            auto one = tenon::rebuild_member(file, m);
            tenon::matrix<T> out = tenon::network_outputs(one, features);
            if (classify) out = tenon::softmax_rows(out);
            const auto& ts = run.model.plan.target_scaling();
            for (std::size_t k = 0; k < out.size(); ++k) {
                const T member = classify ? out.data()[k] : static_cast<T>(ts.inverse(static_cast<double>(out.data()[k])));
                CHECK(same_bits(v.member_values[m * rows * v.width + k], member));
            }
        }
        double widest = 0;
        for (std::size_t k = 0; k < rows * v.width; ++k) {
            double squares = 0;
            for (std::size_t m = 0; m < 5; ++m) {
                const double d = static_cast<double>(v.member_values[m * rows * v.width + k]) - static_cast<double>(v.values[k]);
                squares += d * d;
            }
            CHECK(static_cast<double>(v.spread[k]) == doctest::Approx(std::sqrt(squares / 4)).epsilon(1e-4));
            widest = std::max(widest, static_cast<double>(v.spread[k]));
        }
        CHECK(widest > 0);  // members from different seeds disagree somewhere
    }
}

TEST_CASE_TEMPLATE("an ensemble's members computed side by side keep each member's bits, for one to three rows a call", T, float, double) {
    // A call of few rows runs the same layer of every member in one
    // dense_group (group_steps, core/small_dense.hpp); each member's values
    // must stay its own network's for the same rows to the last bit, and the
    // mean the trainer's, on every kernel path.
    const tenon::kernel_path before = tenon::active_kernel_path();
    for (const bool classify : {true, false}) {
        trained<T> run(classify ? condition_plan() : power_plan());
        REQUIRE(run.model.member_count() == 5);
        const auto features = run.model.plan.template apply<T>(run.t, run.test).features;
        const std::size_t rows = features.shape()[0], width = features.shape()[1];
        const auto file = tenon::make_model_file(run.model, run.t, run.train, small_settings());
        std::vector<tenon::network<T>> nets;
        for (std::size_t m = 0; m < 5; ++m) nets.push_back(tenon::rebuild_member(file, m));
        tenon::predictor<T> p(file, 8);
        for (const auto path : {tenon::kernel_path::portable, tenon::kernel_path::avx2, tenon::kernel_path::avx512, tenon::kernel_path::neon}) {
            if (!tenon::kernel_path_available(path)) continue;
            tenon::set_kernel_path(path);
            for (const std::size_t per_call : std::vector<std::size_t>{1, 2, 3}) {
                CAPTURE(classify);
                CAPTURE(std::string(tenon::kernel_path_name(path)));
                CAPTURE(per_call);
                std::size_t differing = 0;
                for (std::size_t r = 0; r + per_call <= rows; r += per_call) {
                    tenon::matrix<T> x({per_call, width});
                    std::copy(features.data() + r * width, features.data() + (r + per_call) * width, x.data());
                    const tenon::matrix<T> expected = tenon::predict_prepared(run.model, x);
                    const auto v = p.predict_prepared(x.data(), per_call);
                    REQUIRE(v.members == 5);
                    const std::size_t block = per_call * v.width;
                    for (std::size_t e = 0; e < block; ++e) differing += same_bits(v.values[e], expected.data()[e]) ? 0 : 1;
                    for (std::size_t m = 0; m < 5; ++m) {
                        tenon::matrix<T> out = tenon::network_outputs(nets[m], x);
                        if (classify) out = tenon::softmax_rows(out);
                        for (std::size_t e = 0; e < block; ++e) {
                            const T member = classify ? out.data()[e]
                                                      : static_cast<T>(run.model.plan.target_scaling().inverse(static_cast<double>(out.data()[e])));
                            differing += same_bits(v.member_values[m * block + e], member) ? 0 : 1;
                        }
                    }
                }
                CHECK(differing == 0);
            }
        }
    }
    tenon::set_kernel_path(before);
}

TEST_CASE("one network has one member and a zero spread; an ensemble section is required") {
    auto settings = small_settings();
    settings.ensemble = 1;
    const auto t = pump_table(200, 3);
    auto model = tenon::fit_model<float>(t, power_plan(), range(0, 140), range(140, 170), settings);
    CHECK(model.member_count() == 1);
    tenon::predictor<float> p(model, 8);
    const auto features = model.plan.apply<float>(t, range(170, 178)).features;
    const auto v = p.predict_prepared(features.data(), 8);
    CHECK(v.members == 1);
    for (std::size_t k = 0; k < 8; ++k) CHECK(v.spread[k] == 0.0f);
    for (std::size_t k = 0; k < 8; ++k) CHECK(v.member_values[k] == v.values[k]);
    const auto bytes = tenon::model_file_to_bytes(tenon::make_model_file(model, t, range(0, 140), settings));
    for (std::size_t k = 0; k + 4 <= bytes.size(); ++k)
        CHECK_FALSE((bytes[k] == 'E' && bytes[k + 1] == 'N' && bytes[k + 2] == 'S' && bytes[k + 3] == 'M'));
}

TEST_CASE_TEMPLATE("every layer kind is evaluated as the tape evaluates it", T, float, double) {
    tenon::random_engine rng(5);
    tenon::network<T> net;
    net.add(tenon::dense<T>(6, 8, rng, {tenon::init_scheme::glorot, tenon::init_distribution::uniform},
                            {tenon::init_scheme::glorot, tenon::init_distribution::uniform}),
            "in");
    net.add(tenon::batch_norm<T>(8), "bn");
    net.add(tenon::activation_layer<T>(tenon::activation::gelu), "g");
    tenon::residual<T> block;
    block.add(tenon::dense<T>(8, 8, rng, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}), "d");
    block.add(tenon::layer_norm<T>(8), "ln");
    block.add(tenon::activation_layer<T>(tenon::activation::elu), "e");
    block.add(tenon::dropout<T>(0.3, 1), "drop");
    net.add(std::move(block), "block");
    for (auto a : {tenon::activation::tanh, tenon::activation::sigmoid, tenon::activation::leaky_relu, tenon::activation::softplus,
                   tenon::activation::gelu_tanh, tenon::activation::relu, tenon::activation::log_softmax, tenon::activation::softmax}) {
        net.add(tenon::activation_layer<T>(a));
    }
    // Non-trivial population estimates and gains.
    for (auto* p : net.state_buffers())
        for (std::size_t k = 0; k < p->size(); ++k) p->value().data()[k] = static_cast<T>(rng.uniform(0.5, 1.5));
    for (auto* p : net.parameters())
        if (p->name().find("gain") != std::string::npos)
            for (std::size_t k = 0; k < p->size(); ++k) p->value().data()[k] = static_cast<T>(rng.uniform(0.5, 1.5));
    tenon::matrix<T> x({10, 6});
    for (std::size_t k = 0; k < x.size(); ++k) x.data()[k] = rng.normal<T>();
    const tenon::matrix<T> expected = tenon::network_outputs(net, x);
    tenon::predictor<T> p(net, nullptr, {}, 16);
    const auto out = p.predict_prepared(x.data(), 10);
    REQUIRE(out.width == expected.shape()[1]);
    for (std::size_t k = 0; k < expected.size(); ++k) CHECK(same_bits(out.values[k], expected.data()[k]));
}

TEST_CASE_TEMPLATE("a linear bypass is evaluated as the tape evaluates it", T, float, double) {
    tenon::random_engine rng(6);
    auto net = tenon::make_mlp<T>({5, 7, 3}, tenon::activation::tanh, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 6,
                                  tenon::activation::identity, true);
    for (auto* p : net.parameters())
        for (std::size_t k = 0; k < p->size(); ++k) p->value().data()[k] = static_cast<T>(rng.uniform(-1.0, 1.0));
    tenon::matrix<T> x({9, 5});
    for (std::size_t k = 0; k < x.size(); ++k) x.data()[k] = rng.normal<T>();
    const tenon::matrix<T> expected = tenon::network_outputs(net, x);
    tenon::predictor<T> p(net, nullptr, {}, 16);
    const auto out = p.predict_prepared(x.data(), 9);
    REQUIRE(out.width == 3);
    for (std::size_t k = 0; k < expected.size(); ++k) CHECK(same_bits(out.values[k], expected.data()[k]));
}

TEST_CASE_TEMPLATE("fused dense steps give the tape's bits for any row count on every kernel path", T, float, double) {
    // The predictor runs a dense step with the relu and the linear bypass's
    // sum that follow it as one pass (specialise_steps, core/small_dense.hpp),
    // with a kernel chosen by shape: one to three rows, batches on the fused
    // paths, outputs fewer than a vector (transposed weights). Each must give
    // the tape's values to the last bit, whatever path gemm takes.
    const tenon::kernel_path before = tenon::active_kernel_path();
    tenon::random_engine rng(8);
    for (const auto& sizes : std::vector<std::vector<std::size_t>>{{8, 32, 32, 1}, {6, 16, 3}, {9, 40, 5}}) {
        for (const bool bypass : {true, false}) {
            auto net = tenon::make_mlp<T>(sizes, tenon::activation::relu, {tenon::init_scheme::glorot, tenon::init_distribution::uniform}, 9,
                                          tenon::activation::identity, bypass);
            for (auto* p : net.parameters())
                for (std::size_t k = 0; k < p->size(); ++k) p->value().data()[k] = static_cast<T>(rng.uniform(-1.0, 1.0));
            tenon::predictor<T> p(net, nullptr, {}, 64);
            for (const auto path : {tenon::kernel_path::portable, tenon::kernel_path::avx2, tenon::kernel_path::avx512, tenon::kernel_path::neon,
                                    tenon::kernel_path::blas}) {
                if (!tenon::kernel_path_available(path)) continue;
                tenon::set_kernel_path(path);
                for (const std::size_t rows : std::vector<std::size_t>{1, 3, 5, 8, 64}) {
                    CAPTURE(sizes[1]);
                    CAPTURE(bypass);
                    CAPTURE(tenon::kernel_path_name(path));
                    CAPTURE(rows);
                    tenon::matrix<T> x({rows, sizes[0]});
                    for (std::size_t k = 0; k < x.size(); ++k) x.data()[k] = rng.normal<T>();
                    const tenon::matrix<T> expected = tenon::network_outputs(net, x);
                    const auto out = p.predict_prepared(x.data(), rows);
                    REQUIRE(out.width == expected.shape()[1]);
                    std::size_t differing = 0;
                    for (std::size_t k = 0; k < expected.size(); ++k) differing += same_bits(out.values[k], expected.data()[k]) ? 0 : 1;
                    CHECK(differing == 0);
                }
            }
        }
    }
    tenon::set_kernel_path(before);
}

TEST_CASE("a layer the predictor does not know is refused at construction") {
    tenon::network<float> net;
    net.add(tenon::dense<float>(2, 2), "d");
    struct custom : tenon::layer<float> {
        tenon::var<float> forward(tenon::tape<float>&, tenon::var<float> x, tenon::run_mode) override { return x; }
        const char* kind() const noexcept override { return "custom"; }
        tenon::layer_record describe() const override { return this->base_record(); }
        std::size_t output_width(std::size_t w) const override { return w; }
    };
    net.add(std::make_unique<custom>(), "mine");
    CHECK_THROWS_WITH_AS(tenon::predictor<float>(net, nullptr, {}), doctest::Contains("'mine'"), tenon::error);
    try {
        tenon::predictor<float>(net, nullptr, {});
    } catch (const tenon::error& e) {
        CHECK(e.code() == "deploy.predictor.unsupported_layer");
    }
}

namespace {

// A host's own row type, described to tenon through row_fields.
struct pump_reading {
    double flow;
    double head;
    const char* fluid;
};

}  // namespace

template <>
struct tenon::row_fields<pump_reading> {
    static constexpr std::size_t count = 3;
    static const char* name(std::size_t field) { return field == 0 ? "flow" : field == 1 ? "head" : "fluid"; }
    static tenon::raw_value get(const pump_reading& r, std::size_t field) {
        if (field == 0) return tenon::raw_value::of_number(r.flow);
        if (field == 1) return tenon::raw_value::of_number(r.head);
        return r.fluid ? tenon::raw_value::of_text(r.fluid) : tenon::raw_value::none();
    }
};

TEST_CASE("named cells, ordered cells and typed rows give the same predictions") {
    trained<float> run(condition_plan());
    tenon::predictor<float> p(tenon::make_model_file(run.model, run.t, run.train, small_settings()));
    const std::vector<tenon::named_value> named = {{"fluid", "glycol"}, {"unused", "x"}, {"head", " 21.5 "}, {"flow", "64"}};
    const auto a = p.predict_named(named);
    std::vector<float> first(a.values, a.values + a.width);
    const std::string_view ordered[3] = {"64", "21.5", "glycol"};
    const auto b = p.predict_cells(ordered, 1);
    for (std::size_t k = 0; k < first.size(); ++k) CHECK(same_bits(b.values[k], first[k]));
    const auto binding = p.bind<pump_reading>();
    const pump_reading reading{64.0, 21.5, "glycol"};
    const auto c = p.predict_rows(binding, &reading, 1);
    for (std::size_t k = 0; k < first.size(); ++k) CHECK(same_bits(c.values[k], first[k]));
    float total = 0;
    for (float v : first) total += v;
    CHECK(total == doctest::Approx(1.0f));
    CHECK(c.flagged(0) == 0);
}

TEST_CASE("inputs outside the training range are flagged per cell") {
    trained<double> run(power_plan());
    tenon::predictor<double> p(tenon::make_model_file(run.model, run.t, run.train, small_settings()));
    const std::string_view rows[2][3] = {{"5", "60", "water"}, {"60", "20", "brine"}};  // flow below 20, head above 40
    const auto out = p.predict_cells(&rows[0][0], 2);
    CHECK(out.flag(0, 0) == tenon::range_flag::below);
    CHECK(out.flag(0, 1) == tenon::range_flag::above);
    CHECK(out.flag(0, 2) == tenon::range_flag::inside);
    CHECK(out.flagged(0) == 2);
    CHECK(out.flagged(1) == 0);
    // Regression values come back in the target's units (kW, roughly 0.3 .. 25 here).
    CHECK(out.at(1, 0) > 0.0);
    CHECK(out.at(1, 0) < 40.0);
}

TEST_CASE("bad raw rows give statuses without throwing, and the throwing calls raise their codes") {
    const auto t = pump_table(200, 8);
    tenon::plan preparation = condition_plan();
    tenon::feature_steps lenient;
    lenient.unseen = tenon::unseen_policy::other_slot;
    lenient.fill = tenon::fill_method::mode;
    preparation.set_steps("fluid", lenient);
    auto model = tenon::fit_model<float>(t, preparation, range(0, 160), range(160, 200), small_settings());
    tenon::predictor<float> p(tenon::make_model_file(model, t, range(0, 160), small_settings()), 4);
    tenon::prediction_view<float> out;

    const tenon::named_value no_head[] = {{"flow", "50"}, {"fluid", "water"}};
    auto s = p.try_predict_named(no_head, 2, out);
    CHECK(s.code == tenon::input_status::missing_column);
    CHECK(p.input_name(s.column) == "head");
    CHECK(std::string(s.code_text()) == "deploy.input.missing_column");

    const std::string_view missing_head[3] = {"50", "NA", "water"};
    CHECK(p.try_predict_cells(missing_head, 1, out).code == tenon::input_status::missing_value);
    const std::string_view text_flow[3] = {"fast", "20", "water"};
    CHECK(p.try_predict_cells(text_flow, 1, out).code == tenon::input_status::not_numeric);
    const std::string_view inf_flow[3] = {"inf", "20", "water"};
    CHECK(p.try_predict_cells(inf_flow, 1, out).code == tenon::input_status::not_numeric);

    // Unseen fluid: the column's policy maps it to the 'other' slot and the cell is flagged.
    const std::string_view oil[3] = {"50", "20", "oil"};
    REQUIRE(p.try_predict_cells(oil, 1, out).ok());
    CHECK(out.flag(0, 2) == tenon::range_flag::unseen_category);
    // A missing fluid is filled with the most frequent one.
    const std::string_view no_fluid[3] = {"50", "20", ""};
    CHECK(p.try_predict_cells(no_fluid, 1, out).ok());

    const pump_reading nan_flow{std::numeric_limits<double>::quiet_NaN(), 20.0, "water"};
    const auto binding = p.bind<pump_reading>();
    s = p.try_predict_rows(binding, &nan_flow, 1, out);
    CHECK(s.code == tenon::input_status::non_finite);

    std::vector<float> features(5 * p.feature_count(), 0.0f);
    CHECK(p.try_predict_prepared(features.data(), 5, out).code == tenon::input_status::shape);  // capacity 4
    features[1] = std::numeric_limits<float>::infinity();
    s = p.try_predict_prepared(features.data(), 1, out);
    CHECK(s.code == tenon::input_status::non_finite);
    CHECK(s.column == 1);
    // Several rows: the first value that is not finite, in row order, is the one reported.
    const std::size_t f = p.feature_count();
    std::fill(features.begin(), features.end(), 0.5f);
    features[3 * f] = std::numeric_limits<float>::infinity();
    features[2 * f + f - 1] = std::numeric_limits<float>::quiet_NaN();
    s = p.try_predict_prepared(features.data(), 4, out);
    CHECK(s.code == tenon::input_status::non_finite);
    CHECK(s.row == 2);
    CHECK(s.column == f - 1);
    features[3 * f] = -std::numeric_limits<float>::infinity();
    CHECK(p.try_predict_prepared(features.data(), 2, out).ok());  // the bad values lie in rows 2 and 3
    s = p.try_predict_prepared(features.data() + 3 * f, 1, out);
    CHECK(s.code == tenon::input_status::non_finite);
    CHECK(s.row == 0);
    CHECK(s.column == 0);

    const auto code_of = [&](auto&& call) {
        try {
            call();
        } catch (const tenon::error& e) {
            return e.code();
        }
        return std::string("no error");
    };
    CHECK(code_of([&] { p.predict_named(no_head, 2); }) == "deploy.input.missing_column");
    CHECK(code_of([&] { p.predict_cells(missing_head, 1); }) == "deploy.input.missing_value");
    CHECK(code_of([&] { p.predict_cells(text_flow, 1); }) == "deploy.input.not_numeric");
    CHECK(code_of([&] { p.predict_rows(binding, &nan_flow, 1); }) == "deploy.input.non_finite");
    CHECK(code_of([&] { p.predict_prepared(features.data(), 5); }) == "deploy.input.shape");
    CHECK_THROWS_WITH_AS(p.predict_named(no_head, 2), doctest::Contains("column 'head'"), tenon::error);

    // The strict steps of condition_plan() refuse an unseen category.
    trained<float> strict_run(condition_plan());
    tenon::predictor<float> strict(strict_run.model);
    CHECK(strict.try_predict_cells(oil, 1, out).code == tenon::input_status::unseen_category);
    CHECK(code_of([&] { strict.predict_cells(oil, 1); }) == "deploy.input.unseen_category");
}

template <>
struct tenon::row_fields<int> {
    static constexpr std::size_t count = 1;
    static const char* name(std::size_t) { return "flow"; }
    static tenon::raw_value get(const int& r, std::size_t) { return tenon::raw_value::of_number(r); }
};

TEST_CASE("binding a row type that lacks a column is refused") {
    trained<float> run(condition_plan());
    tenon::predictor<float> p(run.model);
    CHECK_THROWS_WITH_AS(p.bind<int>(), doctest::Contains("'head'"), tenon::error);
    try {
        p.bind<int>();
    } catch (const tenon::error& e) {
        CHECK(e.code() == "deploy.input.missing_column");
    }
}

#if !defined(TENON_TEST_TSAN)
TEST_CASE_TEMPLATE("after construction a call allocates nothing", T, float, double) {
    trained<T> run(condition_plan());
    tenon::predictor<T> p(tenon::make_model_file(run.model, run.t, run.train, small_settings()), 64);
    const auto features = run.model.plan.template apply<T>(run.t, run.test).features;
    const tenon::named_value named[] = {{"flow", "64"}, {"head", "21.5"}, {"fluid", "glycol"}};
    const std::string_view ordered[3] = {"64", "21.5", "glycol"};
    const auto binding = p.template bind<pump_reading>();
    const pump_reading reading{64.0, 21.5, "glycol"};
    tenon::prediction_view<T> out;
    allocations = 0;
    counting = true;
    bool ok = true;
    for (int repeat = 0; repeat < 3; ++repeat) {
        ok = ok && p.try_predict_prepared(features.data(), features.shape()[0], out).ok();
        ok = ok && p.try_predict_named(named, 3, out).ok();
        ok = ok && p.try_predict_cells(ordered, 1, out).ok();
        ok = ok && p.try_predict_rows(binding, &reading, 1, out).ok();
        p.predict_named(named, 3);
        p.predict_cells(ordered, 1);
    }
    counting = false;
    CHECK(ok);
    CHECK(allocations == 0);
    // The counter does count: a copy of the predictor allocates its buffers.
    counting = true;
    tenon::predictor<T> copy = p;
    counting = false;
    CHECK(allocations > 0);
}
#endif

TEST_CASE("threads predicting with their own copies agree with one thread") {
    trained<float> run(condition_plan());
    tenon::predictor<float> p(run.model, 64);
    const auto features = run.model.plan.apply<float>(run.t, run.test).features;
    const std::size_t rows = features.shape()[0];
    const auto reference = p.predict_prepared(features.data(), rows);
    const std::vector<float> expected(reference.values, reference.values + rows * reference.width);
    std::atomic<int> mismatches{0};
    std::vector<std::thread> threads;
    for (int k = 0; k < 4; ++k)
        threads.emplace_back([&, copy = p]() mutable {
            for (int repeat = 0; repeat < 200; ++repeat) {
                tenon::prediction_view<float> out;
                if (!copy.try_predict_prepared(features.data(), rows, out).ok()) ++mismatches;
                for (std::size_t i = 0; i < expected.size(); ++i)
                    if (!same_bits(out.values[i], expected[i])) ++mismatches;
            }
        });
    for (auto& th : threads) th.join();
    CHECK(mismatches.load() == 0);
}

// Part of tenon_deploy_tests, and the test built with -fsanitize=thread by
// hand (see the deploy report): readers predict while the host swaps models.
TEST_CASE("the holder swaps models while threads keep predicting") {
    const auto t = pump_table(200, 31);
    auto first = tenon::fit_model<float>(t, condition_plan(), range(0, 150), range(150, 200), small_settings(1));
    auto second = tenon::fit_model<float>(t, condition_plan(), range(0, 150), range(150, 200), small_settings(2));
    tenon::predictor<float> p1(first, 8), p2(second, 8);
    const std::string_view row[3] = {"64", "21.5", "glycol"};
    const std::vector<float> out1(p1.predict_cells(row, 1).values, p1.predict_cells(row, 1).values + 3);
    const std::vector<float> out2(p2.predict_cells(row, 1).values, p2.predict_cells(row, 1).values + 3);
    REQUIRE_FALSE(same_bits(out1[0], out2[0]));

    tenon::predictor_holder<float> holder;
    CHECK_FALSE(holder.has_value());
    CHECK_THROWS_WITH_AS(holder.get(), doctest::Contains("no predictor"), tenon::error);
    try {
        holder.get();
    } catch (const tenon::error& e) {
        CHECK(e.code() == "deploy.holder.empty");
    }
    holder.store(p1);
    std::atomic<bool> stop{false};
    std::atomic<int> mixed{0}, calls{0}, swaps_seen{0};
    std::vector<std::thread> readers;
    for (int k = 0; k < 3; ++k)
        readers.emplace_back([&] {
            tenon::predictor<float> local = holder.get(8);
            while (!stop.load()) {
                if (holder.refresh(local)) ++swaps_seen;
                tenon::prediction_view<float> out;
                if (!local.try_predict_cells(row, 1, out).ok()) ++mixed;
                const bool is1 = same_bits(out.values[0], out1[0]) && same_bits(out.values[2], out1[2]);
                const bool is2 = same_bits(out.values[0], out2[0]) && same_bits(out.values[2], out2[2]);
                if (!is1 && !is2) ++mixed;
                ++calls;
            }
        });
    // Each store waits for a few more calls, so readers refresh between
    // swaps however the threads are scheduled.
    while (calls.load() < 3) std::this_thread::yield();
    for (int swap = 0; swap < 200; ++swap) {
        holder.store(swap % 2 ? p1 : p2);
        const int before = calls.load();
        while (calls.load() < before + 3) std::this_thread::yield();
    }
    stop = true;
    for (auto& th : readers) th.join();
    CHECK(mixed.load() == 0);
    CHECK(swaps_seen.load() > 0);
    CHECK(holder.generation() == 201);
    // After the last store (p1, swap 199), a refreshed copy predicts with it.
    tenon::predictor<float> last = holder.get();
    const auto v = last.predict_cells(row, 1);
    CHECK(same_bits(v.values[0], out1[0]));
}

TEST_CASE_TEMPLATE("subnormal inputs are flushed to zero", T, float, double) {
    trained<T> run(power_plan());
    tenon::predictor<T> p(run.model, 4);
    std::vector<T> zeros(p.feature_count(), T(0)), tiny(p.feature_count(), std::numeric_limits<T>::denorm_min() * T(3));
    const auto a = p.predict_prepared(zeros.data(), 1);
    const T zero_out = a.values[0];
    const auto b = p.predict_prepared(tiny.data(), 1);
    CHECK(same_bits(b.values[0], zero_out));
}

TEST_CASE("inside a host's flush_subnormals_scope a call leaves the mode as held, with the same bits") {
    trained<float> run(power_plan());
    tenon::predictor<float> p(run.model, 4);
    tenon::random_engine rng(5);
    std::vector<float> row(p.feature_count());
    for (auto& v : row) v = rng.uniform(-1.0f, 1.0f);
    const float alone = p.predict_prepared(row.data(), 1).values[0];
#if TENON_SIMD_X86
    const unsigned before = _mm_getcsr();
    CHECK((before & 0x8040u) == 0u);  // the test runs with the default mode
#endif
    {
        const tenon::flush_subnormals_scope held;
        CHECK(tenon::detail::flush_scopes_held() == 1);
        CHECK(same_bits(p.predict_prepared(row.data(), 1).values[0], alone));
#if TENON_SIMD_X86
        CHECK((_mm_getcsr() & 0x8040u) == 0x8040u);  // still set after the call
#endif
        {
            const tenon::flush_subnormals_scope nested;
            CHECK(tenon::detail::flush_scopes_held() == 2);
        }
        CHECK(tenon::detail::flush_scopes_held() == 1);
    }
    CHECK(tenon::detail::flush_scopes_held() == 0);
#if TENON_SIMD_X86
    CHECK(_mm_getcsr() == before);  // the host's mode is back
#endif
    CHECK(same_bits(p.predict_prepared(row.data(), 1).values[0], alone));
}

#if TENON_SIMD_X86
TEST_CASE("a host that set the flush bits itself, or only one of them, gets its mode back unchanged") {
    trained<float> run(power_plan());
    tenon::predictor<float> p(run.model, 4);
    std::vector<float> row(p.feature_count(), 0.25f);
    const float alone = p.predict_prepared(row.data(), 1).values[0];
    const unsigned before = _mm_getcsr();
    for (const unsigned bits : {0x8040u, 0x8000u, 0x0040u}) {
        _mm_setcsr(before | bits);
        const float value = p.predict_prepared(row.data(), 1).values[0];
        const unsigned after = _mm_getcsr();
        _mm_setcsr(before);
        // The control bits (6-15); the status flags (0-5) record what the call computed.
        CHECK((after & ~0x3Fu) == ((before | bits) & ~0x3Fu));
        CHECK(same_bits(value, alone));
    }
}
#endif
