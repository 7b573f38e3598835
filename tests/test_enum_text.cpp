// Enumerators to text and back come from one table per enum (its to_string
// switch, core/enum_text.hpp): every named enumerator parses back to itself,
// texts are unique, and parsing does not stop at a "last" enumerator.
#include <doctest/doctest.h>

#include <set>
#include <string>

#include <tenon/tenon.hpp>

namespace {

template <class E>
void check_round_trip(const char* what) {
    CAPTURE(what);
    std::set<std::string> seen;
    int named = 0;
    for (unsigned v = 0; v < 256; ++v) {
        const auto e = static_cast<E>(v);
        const std::string text = to_string(e);  // found by argument-dependent lookup, as enum_from_text finds it
        if (text == "unknown") continue;
        ++named;
        CAPTURE(text);
        CHECK(seen.insert(text).second);
        E back{};
        REQUIRE(tenon::enum_from_text(text, back));
        CHECK(static_cast<unsigned>(back) == v);
    }
    CHECK(named >= 2);
    E ignored{};
    CHECK_FALSE(tenon::enum_from_text("no-such-name", ignored));
    CHECK_FALSE(tenon::enum_from_text("unknown", ignored));
}

}  // namespace

// A test-local enum with a gap and its last value far from the first: a
// parse loop that stopped at some enumerator, or assumed values 0..n-1,
// would miss `late`.
namespace tenon {
inline namespace TENON_ABI_NAMESPACE {
enum class enum_text_probe : unsigned char { first = 0, second = 1, late = 200 };
inline const char* to_string(enum_text_probe p) noexcept {
    switch (p) {
    case enum_text_probe::first: return "first";
    case enum_text_probe::second: return "second";
    case enum_text_probe::late: return "late";
    }
    return "unknown";
}
}  // namespace TENON_ABI_NAMESPACE
}  // namespace tenon

TEST_CASE("every named enum parses its own texts back, and nothing else") {
    check_round_trip<tenon::activation>("activation");
    check_round_trip<tenon::init_scheme>("init_scheme");
    check_round_trip<tenon::init_distribution>("init_distribution");
    check_round_trip<tenon::loss_kind>("loss_kind");
    check_round_trip<tenon::stop_reason>("stop_reason");
    check_round_trip<tenon::update_kind>("update_kind");
    check_round_trip<tenon::gate_metric>("gate_metric");
    check_round_trip<tenon::drift_status>("drift_status");
    check_round_trip<tenon::kernel_path>("kernel_path");
    check_round_trip<tenon::fill_method>("fill_method");
    check_round_trip<tenon::column_kind>("column_kind");
    check_round_trip<tenon::scaling_method>("scaling_method");
    check_round_trip<tenon::screening_reason>("screening_reason");
    check_round_trip<tenon::time_format>("time_format");
    check_round_trip<tenon::enum_text_probe>("enum_text_probe");
}

TEST_CASE("a value added past the others parses, and the choices list it") {
    tenon::enum_text_probe p{};
    REQUIRE(tenon::enum_from_text("late", p));
    CHECK(p == tenon::enum_text_probe::late);
    CHECK(tenon::enum_choices<tenon::enum_text_probe>() == "first, second, late");
    // The messages of the parse functions list the choices from the same table.
    CHECK_THROWS_WITH(tenon::parse_update_kind("sgd"),
                      "[train.option.invalid] unknown optimizer 'sgd' (gd, momentum, nesterov, adam, adamw, rmsprop, adagrad)");
    CHECK_THROWS_WITH(tenon::parse_activation("swish"),
                      doctest::Contains("(identity, tanh, sigmoid, relu, leaky_relu, elu, softplus, gelu, gelu_tanh, softmax, log_softmax)"));
}
