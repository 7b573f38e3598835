// Tests of the model file: checksums, round trips, damaged and hostile
// files, versions, unknown sections, atomic saving under injected faults,
// and the committed version-1 fixture.
#include <doctest/doctest.h>

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <map>
#include <set>
#include <string>
#include <vector>

#include <cerrno>
#include <cstring>
#include <iterator>
#include <sys/stat.h>
#include <unistd.h>

#include <tenon/deploy/model_file.hpp>
#include <tenon/deploy/predictor.hpp>
#include <tenon/train/calibration.hpp>

#include "deploy_test_support.hpp"

namespace {

using namespace deploy_test;

template <class T>
tenon::model_file<T> small_model_file(bool with_replay = true) {
    const auto t = pump_table(120, 11);
    const auto train = range(0, 90), validation = range(90, 120);
    auto fitted = tenon::fit_model<T>(t, condition_plan(), train, validation, small_settings());
    tenon::model_file_options o;
    o.replay_rows = with_replay ? 5 : 0;
    o.created_unix_seconds = 1700000000;
    return tenon::make_model_file(fitted, t, train, small_settings(), o);
}

}  // namespace

// The fitted model keeps its training rows and settings, so the short form
// writes the same bytes as the form that is handed them again.
TEST_CASE("make_model_file from what the fitted model keeps equals the form given the rows and settings") {
    using namespace deploy_test;
    const auto t = pump_table(120, 11);
    const auto train = range(0, 90), validation = range(90, 120);
    tenon::model_settings s = small_settings();
    int epochs_seen = 0;
    s.on_epoch = [&](const tenon::epoch_summary&) { return ++epochs_seen > 0; };  // a host control, not kept
    auto fitted = tenon::fit_model<float>(t, condition_plan(), train, validation, s);
    CHECK(fitted.fitted_rows == train);
    CHECK(!fitted.settings.on_epoch);
    CHECK(fitted.settings.seed == s.seed);
    tenon::model_file_options o;
    o.created_unix_seconds = 1700000000;
    const auto given = tenon::model_file_to_bytes(tenon::make_model_file(fitted, t, train, s, o));
    const auto kept = tenon::model_file_to_bytes(tenon::make_model_file(fitted, t, o));
    CHECK(given == kept);
    const auto fewer = pump_table(60, 11);
    CHECK_THROWS_WITH_AS(
        tenon::make_model_file(fitted, fewer, o),
        "[train.option.invalid] make_model_file: the model was fitted on row 60, and the table has 60 rows (pass the table fit_model was given)",
        tenon::error);
}

// Scoring, calibrating and saving read a fitted model and change nothing in
// it: they take it const (this test would not compile otherwise), its
// parameters' gradient buffers keep their values, and the file written from the const
// model is the file written before it was scored.
TEST_CASE("evaluation, calibration and saving take a const fitted model and change nothing in it") {
    using namespace deploy_test;
    const auto t = pump_table(120, 11);
    const auto train = range(0, 90), validation = range(90, 120);
    tenon::model_settings s = small_settings();
    s.ensemble = 2;
    const auto fitted = tenon::fit_model<float>(t, condition_plan(), train, validation, s);
    tenon::model_file_options o;
    o.created_unix_seconds = 1700000000;
    const auto before = tenon::model_file_to_bytes(tenon::make_model_file(fitted, t, o));
    std::vector<std::vector<float>> gradients_before;
    for (const auto* p : fitted.net.parameters()) gradients_before.emplace_back(p->grad().begin(), p->grad().end());
    const tenon::evaluation e = tenon::evaluate_model(fitted, t, validation);
    CHECK(e.rows == 30);
    const tenon::model_calibration c = tenon::calibrate_model(fitted, t, validation);
    CHECK(tenon::score_calibration(fitted, c, t, validation).rows == 30);
    std::vector<std::vector<float>> gradients_after;
    for (const auto* p : fitted.net.parameters()) gradients_after.emplace_back(p->grad().begin(), p->grad().end());
    CHECK(gradients_after == gradients_before);
    CHECK(tenon::model_file_to_bytes(tenon::make_model_file(fitted, t, o)) == before);
}

TEST_CASE("a network records for inference only on a tape set for it, and such a tape refuses backward") {
    using namespace deploy_test;
    const auto t = pump_table(120, 11);
    const auto fitted = tenon::fit_model<float>(t, condition_plan(), range(0, 90), range(90, 120), small_settings());
    tenon::matrix<float> x({2, fitted.plan.feature_count()});
    tenon::tape<float> training_tape;
    CHECK_THROWS_WITH_AS(fitted.net.infer(training_tape, training_tape.input(x)),
                         "[core.argument.invalid] network::infer: the tape must record for inference only (tape::set_inference_only(true))",
                         tenon::error);
    tenon::tape<float> inference_tape;
    inference_tape.set_inference_only(true);
    const auto y = fitted.net.infer(inference_tape, inference_tape.input(x));
    CHECK(y.shape().rows == 2);
    bool refused = false;
    try {
        inference_tape.backward(tenon::sum(y));
    } catch (const tenon::error& e) {
        refused = true;
        CHECK(e.code() == "autodiff.backward.inference_only");
    }
    CHECK(refused);
}

namespace {

std::string temp_path(const std::string& name) { return std::string("/tmp/tenon_deploy_test_") + std::to_string(::getpid()) + "_" + name; }

// Puts a valid header checksum back after a test edited the header on purpose.
void reseal_header(std::vector<std::uint8_t>& b) {
    const std::uint32_t crc = tenon::crc32(b.data(), 20);
    for (int k = 0; k < 4; ++k) b[20 + static_cast<std::size_t>(k)] = static_cast<std::uint8_t>(crc >> (8 * k));
}

std::string code_of_loading(const std::vector<std::uint8_t>& bytes, const tenon::model_limits& limits = {}) {
    try {
        tenon::model_file_from_bytes<float>(bytes, limits);
    } catch (const tenon::error& e) {
        return e.code();
    }
    return "loaded";
}

}  // namespace

// CRC-32 from its definition, one bit at a time: the message's polynomial,
// bits taken least significant first (reflected), divided by the generator
// 0x04C11DB7 (0xEDB88320 reflected), with the register starting at all ones
// and the remainder inverted (IEEE 802.3's frame check sequence).
namespace {
std::uint32_t crc32_by_division(const unsigned char* data, std::size_t size) {
    std::uint32_t r = 0xFFFFFFFFu;
    for (std::size_t i = 0; i < size; ++i) {
        r ^= data[i];
        for (int bit = 0; bit < 8; ++bit) r = (r & 1u) ? (r >> 1) ^ 0xEDB88320u : r >> 1;
    }
    return ~r;
}
}  // namespace

TEST_CASE("CRC-32 gives the IEEE 802.3 check value and continues across pieces") {
    const char* digits = "123456789";
    const auto* bytes = reinterpret_cast<const unsigned char*>(digits);
    // The check value of CRC-32 over "123456789" is 0xCBF43926 (Williams
    // 1993, "A Painless Guide to CRC Error Detection Algorithms", the CRC-32
    // parameter set in its catalogue of standards; from memory), and the
    // division above computes it independently.
    CHECK(crc32_by_division(bytes, 9) == 0xCBF43926u);
    CHECK(tenon::crc32(digits, 9) == 0xCBF43926u);
    CHECK(tenon::crc32_update(tenon::crc32(digits, 4), digits + 4, 5) == 0xCBF43926u);
    CHECK(tenon::crc32(digits, 0) == 0u);
    // Every length of a longer message with all byte values, against the division.
    std::vector<unsigned char> all(600);
    for (std::size_t i = 0; i < all.size(); ++i) all[i] = static_cast<unsigned char>(i * 7 + 3);
    for (std::size_t n = 0; n <= all.size(); n += 37) CHECK(tenon::crc32(all.data(), n) == crc32_by_division(all.data(), n));
}

TEST_CASE("FNV-1a 64 gives the published values for the empty string and 'a'") {
    // The 64-bit FNV prime is 2^40 + 2^8 + 0xB3 and the offset basis is the
    // FNV-0 hash (start at 0; multiply, then xor each byte) of the 32 bytes
    // "chongo <Landon Curt Noll> /\../\" (Fowler, Noll & Vo; IETF draft
    // draft-eastlake-fnv, "The FNV Non-Cryptographic Hash Algorithm", the
    // sections on the FNV primes and offset bases; from memory). Both are
    // derived here; the published basis 0xcbf29ce484222325 and FNV-1a 64 of
    // "a" 0xaf63dc4c8601ec8c (from memory) must come out.
    const std::uint64_t prime = (1ull << 40) + (1ull << 8) + 0xB3u;
    CHECK(prime == 1099511628211ull);
    const std::string signature = "chongo <Landon Curt Noll> /\\../\\";
    REQUIRE(signature.size() == 32);
    std::uint64_t basis = 0;
    for (const char c : signature) basis = (basis * prime) ^ static_cast<unsigned char>(c);
    CHECK(basis == 0xcbf29ce484222325ull);
    const std::uint64_t of_a = (basis ^ static_cast<unsigned char>('a')) * prime;  // FNV-1a: xor, then multiply
    CHECK(of_a == 0xaf63dc4c8601ec8cull);

    tenon::fnv1a_64 h;
    CHECK(h.value() == basis);
    h.add("a", 1);
    CHECK(h.value() == of_a);
}

TEST_CASE("the training fingerprint depends on the training cells only") {
    const auto t = pump_table(50, 3), same = pump_table(50, 3), other = pump_table(50, 4);
    CHECK(tenon::training_fingerprint(t, range(0, 40)) == tenon::training_fingerprint(same, range(0, 40)));
    CHECK(tenon::training_fingerprint(t, range(0, 40)) != tenon::training_fingerprint(t, range(0, 39)));
    CHECK(tenon::training_fingerprint(t, range(0, 40)) != tenon::training_fingerprint(other, range(0, 40)));
}

TEST_CASE_TEMPLATE("a model file round-trips every section exactly", T, float, double) {
    auto m = small_model_file<T>();
    const auto bytes = tenon::model_file_to_bytes(m);
    const auto back = tenon::model_file_from_bytes<T>(bytes);
    CHECK(back.format_version == 1);  // no calibration: version 1, which older readers load
    CHECK(back.architecture == m.architecture);
    REQUIRE(back.weights.size() == m.weights.size());
    for (std::size_t i = 0; i < m.weights.size(); ++i) {
        CHECK(back.weights[i].name == m.weights[i].name);
        REQUIRE(back.weights[i].values.size() == m.weights[i].values.size());
        for (std::size_t k = 0; k < m.weights[i].values.size(); ++k)
            CHECK(same_bits(back.weights[i].values.data()[k], m.weights[i].values.data()[k]));
    }
    REQUIRE(back.plan);
    CHECK(back.plan->to_bytes() == m.plan->to_bytes());
    REQUIRE(back.metadata);
    CHECK(back.metadata->created_unix_seconds == 1700000000);
    CHECK(back.metadata->data_fingerprint == m.metadata->data_fingerprint);
    CHECK(back.metadata->library_version == tenon::version_string());
    CHECK(back.metadata->loss == "cross-entropy");
    CHECK(back.metadata->epochs_run == m.metadata->epochs_run);
    CHECK(back.metadata->metric("best_validation_loss") == m.metadata->metric("best_validation_loss"));
    CHECK(back.metadata->settings == m.metadata->settings);
    CHECK(back.references == m.references);
    REQUIRE(back.replay);
    CHECK(back.replay->rows() == 5);
    CHECK(back.replay->cells == m.replay->cells);
    CHECK(back.replay->columns == std::vector<std::string>{"flow", "head", "fluid", "power", "condition"});
    CHECK(back.replay->rows_seen == 90);  // the reservoir's state (section RSVR)
    CHECK(back.replay->capacity == 5);
    REQUIRE(back.replay->engine);
    CHECK(back.replay->engine->words == m.replay->engine->words);
    CHECK(tenon::model_file_to_bytes(back) == bytes);  // a second save writes the same bytes
    // The file header says which scalar type the weights have.
    CHECK(bytes[16] == sizeof(T));
    const auto summary = tenon::inspect_model_bytes(bytes);
    CHECK(summary.scalar_bytes == sizeof(T));
    CHECK(summary.sections.size() == 9);  // ARCH WGHT ENSM PLAN META REFS RPLY RSVR REFD
    CHECK(summary.sections[2].id == "ENSM");  // the seed ensemble's other members (5 by default here)
    CHECK(summary.sections[2].required);
    CHECK(back.members.size() == m.members.size());
    CHECK(back.members.size() == 4);
    CHECK(summary.references == m.references);  // REFD read into the summaries
    CHECK(summary.replay_rows_seen == 90);
    CHECK(summary.replay_rows == 5);
}

TEST_CASE("reference summaries hold the training range, deciles, histogram and category counts") {
    const auto m = small_model_file<float>(false);
    REQUIRE(m.references.size() == 3);  // flow, head, fluid: the plan's input columns
    const auto& flow = m.references[0];
    CHECK(flow.column == "flow");
    CHECK(flow.present == 90);
    REQUIRE(flow.deciles.size() == 11);
    CHECK(flow.deciles.front() == flow.minimum);
    CHECK(flow.deciles.back() == flow.maximum);
    std::uint64_t total = 0;
    for (auto c : flow.histogram) total += c;
    CHECK(flow.histogram.size() == 10);
    CHECK(total == 90);
    const auto& fluid = m.references[2];
    CHECK(fluid.kind == tenon::column_kind::categorical);
    std::uint64_t fluids = 0;
    for (const auto& kv : fluid.categories) fluids += kv.second;
    CHECK(fluids == 90);
    CHECK(fluid.categories.front().first == "brine");  // sorted by text
}

TEST_CASE("every single-byte change of a small model file is refused with a deploy error") {
    const auto bytes = tenon::model_file_to_bytes(small_model_file<float>());
    INFO("file bytes: " << bytes.size());
    std::map<std::string, std::size_t> codes_seen;
    for (std::size_t i = 0; i < bytes.size(); ++i) {
        for (std::uint8_t change : {std::uint8_t(0xFF), std::uint8_t(0x01)}) {
            auto damaged = bytes;
            damaged[i] = static_cast<std::uint8_t>(damaged[i] ^ change);
            const std::string code = code_of_loading(damaged);
            ++codes_seen[code];
            if (code.rfind("deploy.model.", 0) != 0) FAIL("byte " << i << " changed by ^" << int(change) << " gave '" << code << "'");
        }
    }
    CHECK(codes_seen.count("loaded") == 0);
    CHECK(codes_seen["deploy.model.checksum"] > 0);
    CHECK(codes_seen["deploy.model.magic"] == 16);  // the 8 magic bytes, two changes each
    MESSAGE("single-byte changes tried: " << 2 * bytes.size() << " of a " << bytes.size() << "-byte file");
}

TEST_CASE("a changed weight byte is refused by the WGHT section's checksum") {
    const auto bytes = tenon::model_file_to_bytes(small_model_file<float>(false));
    const auto summary = tenon::inspect_model_bytes(bytes);
    const auto weights = std::find_if(summary.sections.begin(), summary.sections.end(), [](const auto& s) { return s.id == "WGHT"; });
    REQUIRE(weights != summary.sections.end());
    REQUIRE(weights->length > 8);
    auto damaged = bytes;
    // A byte in the middle of the payload: the section's framing stays valid.
    damaged[static_cast<std::size_t>(weights->offset + weights->length / 2)] ^= 0x10;
    CHECK(code_of_loading(damaged) == "deploy.model.checksum");
    CHECK_THROWS_WITH_AS(tenon::model_file_from_bytes<float>(damaged), doctest::Contains("section 'WGHT' fails its checksum"), tenon::error);
    CHECK(code_of_loading(bytes) == "loaded");
}

TEST_CASE("every truncation of a small model file is refused") {
    const auto bytes = tenon::model_file_to_bytes(small_model_file<double>(false));
    std::size_t truncated = 0;
    for (std::size_t n = 0; n < bytes.size(); ++n) {
        const std::vector<std::uint8_t> cut(bytes.begin(), bytes.begin() + static_cast<std::ptrdiff_t>(n));
        std::string code;
        try {
            tenon::model_file_from_bytes<double>(cut);
            code = "loaded";
        } catch (const tenon::error& e) {
            code = e.code();
        }
        if (code != "deploy.model.truncated") FAIL("a file cut to " << n << " bytes gave '" << code << "'");
        ++truncated;
    }
    CHECK(truncated == bytes.size());
}

TEST_CASE("the header checks give their own codes: magic, version, byte order, scalar type") {
    const auto bytes = tenon::model_file_to_bytes(small_model_file<float>(false));
    const std::string csv = "flow,head\n1,2\n";
    CHECK(code_of_loading(std::vector<std::uint8_t>(csv.begin(), csv.end())) == "deploy.model.magic");
    CHECK(code_of_loading({}) == "deploy.model.truncated");

    auto newer = bytes;
    newer[8] = static_cast<std::uint8_t>(tenon::model_format_version + 1);  // a version newer than this build
    reseal_header(newer);
    CHECK(code_of_loading(newer) == "deploy.model.version");
    CHECK_THROWS_WITH_AS(tenon::model_file_from_bytes<float>(newer), doctest::Contains("newer than this build"), tenon::error);

    auto swapped = bytes;
    std::swap(swapped[12], swapped[15]);
    std::swap(swapped[13], swapped[14]);
    reseal_header(swapped);
    CHECK(code_of_loading(swapped) == "deploy.model.byte_order");
    // A file written with the other byte order: every number of the header
    // reversed (version, mark, section count and the checksum itself; the
    // magic and scalar size are single bytes). Refused at its byte-order
    // mark, not as damaged nor as a newer version.
    auto big_endian = bytes;
    std::swap(big_endian[8], big_endian[9]);
    std::reverse(big_endian.begin() + 12, big_endian.begin() + 16);
    std::swap(big_endian[18], big_endian[19]);
    std::reverse(big_endian.begin() + 20, big_endian.begin() + 24);
    CHECK(code_of_loading(big_endian) == "deploy.model.byte_order");
    CHECK_THROWS_WITH_AS(tenon::model_file_from_bytes<float>(big_endian),
                         doctest::Contains("the byte-order mark reads 0x04030201 instead of 0x01020304"), tenon::error);

    auto bad_scalar = bytes;
    bad_scalar[16] = 2;
    reseal_header(bad_scalar);
    CHECK(code_of_loading(bad_scalar) == "deploy.model.malformed");

    CHECK_THROWS_WITH_AS(tenon::model_file_from_bytes<double>(bytes), doctest::Contains("stored as float"), tenon::error);
    try {
        tenon::model_file_from_bytes<double>(bytes);
    } catch (const tenon::error& e) {
        CHECK(e.code() == "deploy.model.scalar_type");
    }
}

TEST_CASE("unknown optional sections are skipped, unknown required ones refused") {
    auto bytes = tenon::model_file_to_bytes(small_model_file<float>(false));
    const std::vector<std::uint8_t> payload = {1, 2, 3};
    auto with_optional = bytes;
    tenon::detail::append_section(with_optional, "XTRA", false, payload);
    with_optional[18] = static_cast<std::uint8_t>(with_optional[18] + 1);
    reseal_header(with_optional);
    const auto m = tenon::model_file_from_bytes<float>(with_optional);
    CHECK(m.skipped_sections == std::vector<std::string>{"XTRA"});

    auto with_required = bytes;
    tenon::detail::append_section(with_required, "XTRA", true, payload);
    with_required[18] = static_cast<std::uint8_t>(with_required[18] + 1);
    reseal_header(with_required);
    CHECK(code_of_loading(with_required) == "deploy.model.unknown_required_section");

    auto duplicate = bytes;
    tenon::detail::append_section(duplicate, "META", false, payload);
    duplicate[18] = static_cast<std::uint8_t>(duplicate[18] + 1);
    reseal_header(duplicate);
    CHECK(code_of_loading(duplicate) == "deploy.model.malformed");

    auto trailing = bytes;
    trailing.push_back(0);
    CHECK(code_of_loading(trailing) == "deploy.model.malformed");
}

TEST_CASE("lengths and counts are checked against the limits and the bytes before allocating") {
    const auto bytes = tenon::model_file_to_bytes(small_model_file<float>(false));
    tenon::model_limits small;
    small.max_section_bytes = 16;
    CHECK(code_of_loading(bytes, small) == "deploy.model.oversize");
    tenon::model_limits tiny_file;
    tiny_file.max_file_bytes = 100;
    CHECK(code_of_loading(bytes, tiny_file) == "deploy.model.oversize");
    tenon::model_limits few_sections;
    few_sections.max_sections = 1;
    CHECK(code_of_loading(bytes, few_sections) == "deploy.model.oversize");

    // A hostile file with valid checksums: a weights section declaring 2^32 - 1 matrices.
    std::vector<std::uint8_t> hostile(tenon::detail::model_magic, tenon::detail::model_magic + 8);
    const std::uint8_t header_rest[] = {1, 0, 0, 0, 4, 3, 2, 1, 4, 0, 2, 0};
    hostile.insert(hostile.end(), header_rest, header_rest + 12);
    hostile.resize(24);
    reseal_header(hostile);
    tenon::detail::append_section(hostile, "ARCH", true, tenon::to_bytes(tenon::make_mlp<float>({2, 1}, tenon::activation::relu, {}, 0).describe()));
    tenon::detail::append_section(hostile, "WGHT", true, {0xFF, 0xFF, 0xFF, 0xFF});
    CHECK(code_of_loading(hostile) == "deploy.model.malformed");

    // The same container without its weights section.
    std::vector<std::uint8_t> no_weights(hostile.begin(), hostile.begin() + 24);
    no_weights[18] = 1;
    reseal_header(no_weights);
    tenon::detail::append_section(no_weights, "ARCH", true,
                                  tenon::to_bytes(tenon::make_mlp<float>({2, 1}, tenon::activation::relu, {}, 0).describe()));
    CHECK(code_of_loading(no_weights) == "deploy.model.missing_section");
}

TEST_CASE("weights that do not fit the architecture are refused when the network is rebuilt") {
    auto m = small_model_file<float>(false);
    // The same number of values, transposed: only the per-weight check sees it.
    const auto s = tenon::shape_of(m.weights[0].values);
    REQUIRE(s.rows != s.cols);
    m.weights[0].values = tenon::matrix<float>({s.cols, s.rows});
    const auto back = tenon::model_file_from_bytes<float>(tenon::model_file_to_bytes(m));
    CHECK_THROWS_WITH_AS(tenon::rebuild_network(back), doctest::Contains("hidden1.weights"), tenon::error);
    try {
        tenon::rebuild_network(back);
    } catch (const tenon::error& e) {
        CHECK(e.code() == "deploy.model.shape_mismatch");
    }
}

TEST_CASE("an architecture declaring more weights than the file stores is refused before anything is allocated") {
    // A dense layer of 2^31 x 2^31 inputs and outputs (2^62 values, 16 EiB
    // in float) beside the small model's weights: rebuilt naively it would
    // ask the allocator for all of it.
    auto m = small_model_file<float>(false);
    tenon::layer_record huge;
    huge.kind = "dense";
    huge.name = "hidden1";
    huge.set_number("inputs", 2147483648.0).set_number("outputs", 2147483648.0).set_number("bias", 1.0);
    m.architecture.children.at(0) = huge;
    try {
        tenon::rebuild_network(m);
        FAIL("the architecture was accepted");
    } catch (const tenon::error& e) {
        CHECK(e.code() == "deploy.model.shape_mismatch");
        // 2^62 + 2^31 values of the huge layer, and the other layers' few
        // (where size_t has 32 bits, past what it counts).
        CHECK(std::string(e.what()).find(sizeof(std::size_t) >= 8 ? "the architecture declares 461168602057487"
                                                                  : "the architecture declares more than 2^32") != std::string::npos);
    }
    // Past 2^64 (2^32 where size_t has 32 bits) the count saturates and says so.
    huge.set_number("inputs", 9007199254740991.0).set_number("outputs", 9007199254740991.0);
    m.architecture.children.at(0) = huge;
    CHECK_THROWS_WITH_AS(tenon::rebuild_network(m), doctest::Contains(sizeof(std::size_t) >= 8 ? "more than 2^64" : "more than 2^32"), tenon::error);
}

TEST_CASE("loading a file that does not exist names it") {
    CHECK_THROWS_WITH_AS(tenon::load_model_file<float>("/nonexistent/model.tnm"), doctest::Contains("/nonexistent/model.tnm"), tenon::error);
    try {
        tenon::load_model_file<float>("/nonexistent/model.tnm");
    } catch (const tenon::error& e) {
        CHECK(e.code() == "deploy.file.io");
    }
}

namespace {

struct simulated_crash {};

// Passes operations to the host's file system until operation number
// `fail_at`, which fails (returns false, after writing half the bytes for a
// write) or, with `crash`, throws as if the process died there (no cleanup).
class faulty_file_system : public tenon::file_system {
public:
    faulty_file_system(int fail_at, bool crash) : fail_at_(fail_at), crash_(crash) {}
    int operations = 0;

    int create(const std::string& path) override { return step() ? real_.create(path) : -1; }
    bool write(int h, const std::uint8_t* data, std::size_t size) override {
        if (step()) return real_.write(h, data, size);
        real_.write(h, data, size / 2);
        return false;
    }
    bool sync(int h) override { return step() && real_.sync(h); }
    bool close(int h) override {
        if (!step()) {
            real_.close(h);
            return false;
        }
        return real_.close(h);
    }
    bool rename(const std::string& a, const std::string& b) override { return step() && real_.rename(a, b); }
    bool sync_directory(const std::string& d) override { return step() && real_.sync_directory(d); }
    bool remove(const std::string& p) override { return real_.remove(p); }
    bool set_permissions(int h, const std::string& target) override { return real_.set_permissions(h, target); }

private:
    bool step() {
        const bool fail = operations++ == fail_at_;
        if (fail && crash_) throw simulated_crash{};
        return !fail;
    }
    int fail_at_;
    bool crash_;
    tenon::native_file_system real_;
};

}  // namespace

TEST_CASE("a failure or crash at any step of saving leaves a complete, loadable file") {
    auto old_model = small_model_file<float>(false);
    auto new_model = old_model;
    new_model.metadata->seed = 99;  // tells the two files apart
    const std::string path = temp_path("atomic.tnm");
    const auto old_bytes = tenon::model_file_to_bytes(old_model);
    const auto new_bytes = tenon::model_file_to_bytes(new_model);
    std::size_t scenarios = 0;
    for (const bool crash : {false, true}) {
        for (int fail_at = 0; fail_at < 6; ++fail_at) {  // create, write, fsync, close, rename, fsync of the directory
            tenon::save_model_file(path, old_model);
            faulty_file_system fs(fail_at, crash);
            bool raised = false;
            try {
                tenon::save_model_file(path, new_model, fs);
            } catch (const simulated_crash&) {
                raised = true;
            } catch (const tenon::error& e) {
                raised = true;
                CHECK(e.code() == "deploy.file.io");
            }
            CHECK(raised);
            const auto loaded = tenon::load_model_file<float>(path);
            const std::uint64_t seed = loaded.metadata->seed;
            // Before the rename the old file stays; from the rename on, the new one is complete.
            if (fail_at < 5)
                CHECK(seed == old_model.metadata->seed);
            else
                CHECK(seed == 99);
            ++scenarios;
        }
    }
    // And the ordinary path replaces the file.
    tenon::save_model_file(path, new_model);
    CHECK(tenon::load_model_file<float>(path).metadata->seed == 99);
    CHECK(old_bytes != new_bytes);
    std::remove(path.c_str());
    // Simulated crashes leave their temporary files behind (a real crash
    // would too); only they remain, and the loader never looks at them.
    std::size_t strays = 0;
    const std::string stray_prefix = "." + std::filesystem::path(path).filename().string() + ".tenon-";
    for (const auto& entry : std::filesystem::directory_iterator(std::filesystem::path(path).parent_path())) {
        const std::string name = entry.path().filename().string();
        if (name.rfind(stray_prefix, 0) == 0) {
            ++strays;
            std::filesystem::remove(entry.path());
        }
    }
    CHECK(strays == 4);  // crashes at write, fsync, close and rename
    CHECK(scenarios == 12);
}

namespace {

// The host's file system with fixed "random" bits: every temporary name is
// known in advance, as a hostile user sharing the directory would wish.
class predictable_file_system : public tenon::native_file_system {
public:
    std::uint64_t random_bits() override { return 0x1234; }
    std::vector<unsigned> created_modes;
    int create(const std::string& path) override {
        const int h = tenon::native_file_system::create(path);
        struct stat st {};
        if (h >= 0 && ::fstat(h, &st) == 0) created_modes.push_back(st.st_mode & 07777);
        return h;
    }
};

std::vector<std::uint8_t> text_bytes(const std::string& text) { return std::vector<std::uint8_t>(text.begin(), text.end()); }

std::string file_text(const std::string& path) {
    std::ifstream in(path, std::ios::binary);
    return std::string(std::istreambuf_iterator<char>(in), std::istreambuf_iterator<char>());
}

}  // namespace

TEST_CASE("a symlink planted at a temporary name is never written through, and the save fails rather than follow it") {
    const std::string path = temp_path("planted.tnm"), victim = temp_path("victim.txt");
    std::ofstream(victim) << "precious";
    tenon::write_file_atomically(path, text_bytes("old"));
    predictable_file_system fs;
    const std::string known =
        "/tmp/." + std::filesystem::path(path).filename().string() + ".tenon-" + std::to_string(::getpid()) + "-0000000000001234.tmp";
    REQUIRE(::symlink(victim.c_str(), known.c_str()) == 0);
    // Every name is taken (all 16 tries give the same one): EEXIST, nothing
    // written, and the planted link, which the run did not create, stays.
    CHECK_THROWS_WITH_AS(tenon::write_file_atomically(path, text_bytes("new"), fs), doctest::Contains(std::strerror(EEXIST)), tenon::error);
    CHECK(file_text(victim) == "precious");
    CHECK(file_text(path) == "old");
    struct stat st {};
    CHECK(::lstat(known.c_str(), &st) == 0);
    CHECK(S_ISLNK(st.st_mode));
    CHECK(fs.created_modes.empty());
    // Names of the former scheme ("NAME.tmp-PID-N") are no longer used:
    // links planted there are left alone and the save succeeds.
    std::vector<std::string> old_names;
    for (int n = 0; n < 64; ++n) {
        old_names.push_back(path + ".tmp-" + std::to_string(::getpid()) + "-" + std::to_string(n));
        REQUIRE(::symlink(victim.c_str(), old_names.back().c_str()) == 0);
    }
    tenon::write_file_atomically(path, text_bytes("new"));
    CHECK(file_text(path) == "new");
    CHECK(file_text(victim) == "precious");
    for (const auto& name : old_names) std::remove(name.c_str());
    std::remove(known.c_str());
    std::remove(victim.c_str());
    std::remove(path.c_str());
}

TEST_CASE("temporary files are created 0600, and the saved file keeps the mode of the one it replaces") {
    const std::string path = temp_path("mode.tnm");
    std::remove(path.c_str());
    predictable_file_system fs;
    tenon::write_file_atomically(path, text_bytes("first"), fs);
    REQUIRE(fs.created_modes.size() == 1);
    CHECK(fs.created_modes[0] == 0600);
    // A new file: 0666 less the umask (POSIX open(), O_CREAT: "the access
    // permission bits ... modified by the file mode creation mask").
    const mode_t mask = ::umask(022);
    ::umask(mask);
    struct stat st {};
    REQUIRE(::stat(path.c_str(), &st) == 0);
    CHECK((st.st_mode & 07777) == (0666 & ~mask));
    // A replaced file keeps its bits, read-only ones included.
    REQUIRE(::chmod(path.c_str(), 0440) == 0);
    tenon::write_file_atomically(path, text_bytes("second"), fs);
    REQUIRE(::stat(path.c_str(), &st) == 0);
    CHECK((st.st_mode & 07777) == 0440);
    CHECK(file_text(path) == "second");
    CHECK(fs.created_modes.size() == 2);
    std::remove(path.c_str());
}

TEST_CASE("reading a model names a directory as one and gives the system's reason for a missing file") {
    CHECK_THROWS_WITH_AS(tenon::read_file_bounded("/tmp", 1 << 20), "[deploy.file.io] '/tmp' is a directory, not a file to read", tenon::error);
    CHECK_THROWS_WITH_AS(tenon::read_file_bounded("/nonexistent/tenon/m.tnm", 1 << 20),
                         "[deploy.file.io] cannot open '/nonexistent/tenon/m.tnm' for reading (No such file or directory)",  // glibc's text of ENOENT
                         tenon::error);
}

// The committed version-1 fixture: written once by tenon_deploy_fixture_writer
// (tests/fixtures/deploy/write_fixture.cpp). Every later version must load it
// and give these predictions bit for bit.
TEST_CASE("the version-1 fixture file loads and predicts exactly what it did when written") {
    const std::string path = std::string(TENON_SOURCE_DIR) + "/tests/fixtures/deploy/pump_v1_float.tnm";
    const auto m = tenon::load_model_file<float>(path);
    CHECK(m.format_version == 1);
    REQUIRE(m.plan);
    REQUIRE(m.metadata);
    CHECK(m.metadata->seed == 2024);
    // The fixture stores the last epoch's training loss under the earlier
    // key "final_train_loss"; it is read under the current name.
    CHECK(std::isfinite(m.metadata->metric("final_training_loss")));
    for (const auto& kv : m.metadata->metrics) CHECK(kv.first != "final_train_loss");
    CHECK(m.history.empty());  // written before section HIST existed
    tenon::predictor<float> p(m);
    REQUIRE(p.is_classification());
    CHECK(p.class_names() == std::vector<std::string>{"cavitating", "ok", "worn"});
    const std::string_view rows[3][3] = {{"35", "12.5", "water"}, {"70", "33", "glycol"}, {"110", "8", "brine"}};
    // Probabilities written by the fixture writer, as exact hex floats.
    const float expected[3][3] = {
#include "fixtures/deploy/pump_v1_float_expected.inc"
    };
    for (int i = 0; i < 3; ++i) {
        const auto out = p.predict_cells(rows[i], 1);
        for (int k = 0; k < 3; ++k) CHECK(same_bits(out.at(0, static_cast<std::size_t>(k)), expected[i][k]));
    }
}

// Model files cross processors: the version-1 fixture above (written on
// x86-64) and, in a cross build, a file the build host writes just before
// this test (tenon_host_model_file in tests/CMakeLists.txt runs
// write_fixture.cpp compiled for the build host into TENON_HOST_MODEL_DIR).
// The predictor's probabilities may differ from the writer's by the
// rounding of the math library's exp and of a fused multiply-add (README,
// "Across processors"): within 1e-5, relative to the largest probability.
TEST_CASE("a model file written on the build host loads here and predicts what the host predicted, within 1e-5") {
    const char* dir = std::getenv("TENON_HOST_MODEL_DIR");
    if (!dir) {
        MESSAGE("TENON_HOST_MODEL_DIR is not set: only cross builds run this (ctest test tenon_host_model_file)");
        return;
    }
    const auto m = tenon::load_model_file<float>(std::string(dir) + "/pump_v1_float.tnm");
    tenon::predictor<float> p(m);
    // The host's predictions, "{%af, %af, %af}," lines after one comment line.
    std::ifstream expected_file(std::string(dir) + "/pump_v1_float_expected.inc");
    REQUIRE(expected_file);
    std::string line;
    std::getline(expected_file, line);
    const std::string_view rows[3][3] = {{"35", "12.5", "water"}, {"70", "33", "glycol"}, {"110", "8", "brine"}};
    int checked = 0;
    float largest = 0.0f;
    for (int i = 0; i < 3 && std::getline(expected_file, line); ++i) {
        float expected[3];
        REQUIRE(std::sscanf(line.c_str(), " {%af, %af, %af},", &expected[0], &expected[1], &expected[2]) == 3);
        const auto out = p.predict_cells(rows[i], 1);
        for (int k = 0; k < 3; ++k) {
            const float difference = std::fabs(out.at(0, static_cast<std::size_t>(k)) - expected[k]);
            CHECK(difference <= 1e-5f);
            largest = std::max(largest, difference);
            ++checked;
        }
    }
    CHECK(checked == 9);
    MESSAGE("largest difference from the build host's probabilities: " << largest);
}

TEST_CASE_TEMPLATE("a model file written with the earlier batch-normalization names still loads", T, float, double) {
    // Files written before the renaming stored the batch-norm coefficient as
    // "momentum" in the architecture and the estimates as "running_mean" and
    // "running_variance" among the weights. Such bytes are built here from a
    // network's own record and weights, with only the names changed.
    tenon::random_engine engine(17);
    tenon::network<T> net;
    net.add(tenon::dense<T>(3, 4, engine), "in");
    net.add(tenon::batch_norm<T>(4, 0.25), "bn");
    net.add(tenon::dense<T>(4, 2, engine), "out");
    net.find("bn.population_mean").assign(tenon::make_matrix<T>({{T(0.5), T(-1), T(2), T(0)}}));
    net.find("bn.population_variance").assign(tenon::make_matrix<T>({{T(1.5), T(0.25), T(4), T(1)}}));
    net.set_mode(tenon::run_mode::inference);

    tenon::model_file<T> earlier = tenon::capture_network(net);
    tenon::layer_record& bn = earlier.architecture.children.at(1);
    REQUIRE(bn.kind == "batch_norm");
    for (auto& field : bn.numbers)
        if (field.first == "batch_weight") field.first = "momentum";
    REQUIRE(!bn.has("batch_weight"));
    std::size_t renamed = 0;
    for (auto& w : earlier.weights) {
        const std::string before = w.name;
        if (w.name == "bn.population_mean") w.name = "bn.running_mean";
        if (w.name == "bn.population_variance") w.name = "bn.running_variance";
        if (w.name != before) ++renamed;
    }
    REQUIRE(renamed == 2);
    const auto bytes = tenon::model_file_to_bytes(earlier);
    const std::string text(bytes.begin(), bytes.end());
    REQUIRE(text.find("running_mean") != std::string::npos);  // the bytes hold the earlier names
    REQUIRE(text.find("momentum") != std::string::npos);

    const auto back = tenon::model_file_from_bytes<T>(bytes);
    std::vector<std::string> names;
    for (const auto& w : back.weights) names.push_back(w.name);
    CHECK(names ==
          std::vector<std::string>{"in.weights", "in.bias", "bn.gain", "bn.bias", "out.weights", "out.bias", "bn.population_mean",
                                   "bn.population_variance"});
    tenon::network<T> rebuilt = tenon::rebuild_network(back);
    CHECK(rebuilt.describe() == net.describe());  // the coefficient 0.25 arrived as batch_weight
    CHECK(rebuilt.find("bn.population_variance").value() == net.find("bn.population_variance").value());
    const tenon::matrix<T> x = tenon::make_matrix<T>({{T(0.3), T(-1.2), T(2)}, {T(1), T(0), T(-0.5)}});
    tenon::tape<T> t1, t2;
    const tenon::matrix<T> expected = net.forward(t1, x).value();
    const tenon::matrix<T> got = rebuilt.forward(t2, x).value();
    for (std::size_t k = 0; k < expected.size(); ++k) CHECK(same_bits(got.data()[k], expected.data()[k]));
}
