// tenon: the architecture record, as a model file's section ARCH holds it.
//
// A layer_record gives a layer's kind, name, named numbers (sizes, options)
// and texts, and nested records for blocks; the architecture only, not the
// weights. Layers describe themselves with one (layers/), the network
// factory rebuilds layers from one, and the predictor (serve/) compiles one
// straight into its program. write_record()/read_record() turn it into bytes
// and back exactly.
#pragma once

#include <cmath>
#include <cstddef>
#include <cstdint>
#include <limits>
#include <string>
#include <utility>
#include <vector>

#include "tenon/core/activation_functions.hpp"
#include "tenon/core/bytes.hpp"
#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"

TENON_NAMESPACE_BEGIN

/// The architecture of one layer: kind, name, options and nested layers.
struct layer_record {
    std::string kind;
    std::string name;
    std::vector<std::pair<std::string, double>> numbers;
    std::vector<std::pair<std::string, std::string>> texts;
    std::vector<layer_record> children;

    layer_record& set_number(const std::string& key, double value) {
        for (auto& e : numbers)
            if (e.first == key) {
                e.second = value;
                return *this;
            }
        numbers.emplace_back(key, value);
        return *this;
    }
    layer_record& set_text(const std::string& key, std::string value) {
        for (auto& e : texts)
            if (e.first == key) {
                e.second = std::move(value);
                return *this;
            }
        texts.emplace_back(key, std::move(value));
        return *this;
    }
    bool has(const std::string& key) const noexcept {
        for (const auto& e : numbers)
            if (e.first == key) return true;
        for (const auto& e : texts)
            if (e.first == key) return true;
        return false;
    }
    /// The number stored under `key`; raises model.record.missing_field.
    double number(const std::string& key) const {
        for (const auto& e : numbers)
            if (e.first == key) return e.second;
        missing(key);
    }
    /// A number that must be a whole count (0 <= n < 2^53).
    std::size_t count(const std::string& key) const {
        const double v = number(key);
        if (!(v >= 0.0 && v < 9007199254740992.0 && std::floor(v) == v)) {
            raise(codes::model_record_malformed,
                  "layer record '" + name + "' (" + kind + "): field '" + key + "' must be a whole non-negative count, got " + std::to_string(v));
        }
        return static_cast<std::size_t>(v);
    }
    const std::string& text(const std::string& key) const {
        for (const auto& e : texts)
            if (e.first == key) return e.second;
        missing(key);
    }

    friend bool operator==(const layer_record& a, const layer_record& b) {
        return a.kind == b.kind && a.name == b.name && a.numbers == b.numbers && a.texts == b.texts && a.children == b.children;
    }
    friend bool operator!=(const layer_record& a, const layer_record& b) { return !(a == b); }

private:
    [[noreturn]] void missing(const std::string& key) const {
        raise(codes::model_record_missing_field, "layer record '" + name + "' (" + kind + ") has no field '" + key + "'");
    }
};

namespace detail {
inline constexpr std::uint32_t record_magic = 0x4C6E6574u;  // "teNL" little-endian: tenon layer record
inline constexpr std::uint8_t record_format = 1;
inline constexpr int record_max_depth = 16;

inline void write_record_body(byte_writer& w, const layer_record& r) {
    w.text(r.kind);
    w.text(r.name);
    w.u32(static_cast<std::uint32_t>(r.numbers.size()));
    for (const auto& e : r.numbers) {
        w.text(e.first);
        w.f64(e.second);
    }
    w.u32(static_cast<std::uint32_t>(r.texts.size()));
    for (const auto& e : r.texts) {
        w.text(e.first);
        w.text(e.second);
    }
    w.u32(static_cast<std::uint32_t>(r.children.size()));
    for (const auto& c : r.children) write_record_body(w, c);
}

inline layer_record read_record_body(byte_reader& in, int depth) {
    if (depth > record_max_depth) in.fail("layers nested deeper than " + std::to_string(record_max_depth) + " levels");
    layer_record r;
    r.kind = in.text();
    r.name = in.text();
    const std::size_t n_numbers = in.count(12, "numbers");  // key length (4) + value (8)
    r.numbers.reserve(n_numbers);
    for (std::size_t i = 0; i < n_numbers; ++i) {
        std::string key = in.text();
        const double v = in.f64();
        r.numbers.emplace_back(std::move(key), v);
    }
    const std::size_t n_texts = in.count(8, "texts");
    r.texts.reserve(n_texts);
    for (std::size_t i = 0; i < n_texts; ++i) {
        std::string key = in.text();
        std::string value = in.text();
        r.texts.emplace_back(std::move(key), std::move(value));
    }
    const std::size_t n_children = in.count(20, "nested layers");
    r.children.reserve(n_children);
    for (std::size_t i = 0; i < n_children; ++i) r.children.push_back(read_record_body(in, depth + 1));
    return r;
}
}  // namespace detail

/// Appends a record to a byte writer (magic, format, body).
inline void write_record(byte_writer& w, const layer_record& r) {
    w.u32(detail::record_magic);
    w.u8(detail::record_format);
    detail::write_record_body(w, r);
}

/// Reads a record written by write_record(); raises model.record.truncated or
/// model.record.malformed on bad bytes.
inline layer_record read_record(byte_reader& in) {
    if (in.u32() != detail::record_magic) in.fail("not a tenon layer record (bad magic)");
    const std::uint8_t format = in.u8();
    if (format != detail::record_format) in.fail("layer record format " + std::to_string(format) + " is not supported");
    return detail::read_record_body(in, 0);
}

inline std::vector<std::uint8_t> to_bytes(const layer_record& r) {
    std::vector<std::uint8_t> out;
    byte_writer w(out);
    write_record(w, r);
    return out;
}

/// The record in `bytes`, which must hold exactly one record.
inline layer_record record_from_bytes(const std::vector<std::uint8_t>& bytes) {
    byte_reader in(bytes, "layer record");
    layer_record r = read_record(in);
    if (!in.at_end()) in.fail(std::to_string(in.remaining()) + " bytes follow the record");
    return r;
}

/// The values (weights, biases, state buffers) the layers of record `r` would
/// hold, counted without building them; saturates at SIZE_MAX. A reader can
/// compare a stored architecture with the weights stored beside it before
/// allocating anything (a damaged or crafted record may declare layers of
/// any size).
inline std::size_t record_value_count(const layer_record& r) {
    constexpr std::size_t most = std::numeric_limits<std::size_t>::max();
    const auto add = [](std::size_t a, std::size_t b) { return a > most - b ? most : a + b; };
    const auto mul = [](std::size_t a, std::size_t b) { return a != 0 && b > most / a ? most : a * b; };
    if (r.kind == "dense") return add(mul(r.count("inputs"), r.count("outputs")), r.number("bias") != 0.0 ? r.count("outputs") : 0);
    if (r.kind == "layer_norm") return mul(2, r.count("width"));  // gain, bias
    if (r.kind == "batch_norm") return mul(4, r.count("width"));  // gain, bias, population mean and variance
    std::size_t total = 0;  // network and residual: their children; activation and dropout hold none
    if (r.kind == "linear_bypass") total = mul(r.count("inputs"), r.count("outputs"));
    for (const auto& c : r.children) total = add(total, record_value_count(c));
    return total;
}

/// One weight matrix an architecture implies: its qualified name
/// ("<block>.<layer>.<role>") and its shape.
struct weight_slot {
    std::string name;
    std::size_t rows = 0;
    std::size_t cols = 0;
    bool state = false;  // a state buffer (population estimates), not a learned parameter
};

namespace detail {

/// The current name of a stored parameter or state buffer: the batch-norm
/// estimates that earlier files stored as "<layer>.running_mean" and
/// "<layer>.running_variance" become "<layer>.population_mean" and
/// "<layer>.population_variance"; every other name is returned unchanged.
inline std::string current_state_name(const std::string& stored) {
    static const struct {
        const char* earlier;
        const char* current;
    } renamed[] = {{"running_mean", "population_mean"}, {"running_variance", "population_variance"}};
    for (const auto& r : renamed) {
        const std::string earlier(r.earlier);
        const std::size_t dot = stored.rfind('.');
        const std::string last = dot == std::string::npos ? stored : stored.substr(dot + 1);
        if (last == earlier) return stored.substr(0, stored.size() - earlier.size()) + r.current;
    }
    return stored;
}

inline void check_record_name(const layer_record& r, std::vector<std::string>& siblings) {
    if (r.name.empty()) raise(codes::model_layer_option, "layer record of kind '" + r.kind + "' has an empty name");
    if (r.name.find('.') != std::string::npos) raise(codes::model_layer_option, "layer record: layer name '" + r.name + "' must not contain '.'");
    for (const auto& n : siblings)
        if (n == r.name) raise(codes::model_network_duplicate_name, "layer record: a layer named '" + r.name + "' already exists");
    siblings.push_back(r.name);
}

inline void check_record_options(const layer_record& r) {
    const auto positive = [&](const char* what, const char* a, const char* b) {
        if (r.count(a) == 0 || r.count(b) == 0)
            raise(codes::model_layer_option,
                  std::string(what) + ": inputs and outputs must be positive, got " + std::to_string(r.count(a)) + " x " +
                      std::to_string(r.count(b)));
    };
    const auto width_and_epsilon = [&](const char* what) {
        if (r.count("width") == 0) raise(codes::model_layer_option, std::string(what) + ": the width must be positive, got 0");
        const double e = r.number("epsilon");
        if (!(e > 0.0 && std::isfinite(e)))
            raise(codes::model_layer_option, std::string(what) + ": epsilon must be positive and finite, got " + std::to_string(e));
    };
    if (r.kind == "dense") {
        positive("dense layer", "inputs", "outputs");
        r.number("bias");
    } else if (r.kind == "activation") {
        parse_activation(r.text("function"));
        if (!std::isfinite(r.number("coefficient")))
            raise(codes::model_layer_option,
                  "activation layer (" + r.text("function") + "): the coefficient must be finite, got " + std::to_string(r.number("coefficient")));
    } else if (r.kind == "dropout") {
        const double rate = r.number("rate");
        if (!(rate >= 0.0 && rate < 1.0)) raise(codes::model_layer_option, "dropout layer: the rate must be in [0, 1), got " + std::to_string(rate));
    } else if (r.kind == "layer_norm") {
        width_and_epsilon("layer normalization");
    } else if (r.kind == "batch_norm") {
        width_and_epsilon("batch normalization");
    } else if (r.kind == "linear_bypass") {
        positive("linear bypass", "inputs", "outputs");
    } else if (r.kind != "residual") {
        raise(codes::model_record_unknown_kind,
              "layer record '" + r.name + "': kind '" + r.kind +
                  "' is not known (dense, activation, dropout, layer_norm, batch_norm, residual, linear_bypass)");
    }
}

// Appends the parameters (state == false) or state buffers (state == true)
// of the layers in `children`, whose enclosing block is `prefix`, in the
// order the layers collect them.
inline void collect_slots(const std::vector<layer_record>& children, const std::string& prefix, bool state, std::vector<weight_slot>& out,
                          int depth) {
    if (depth > record_max_depth) raise(codes::model_record_malformed, "layers nested deeper than " + std::to_string(record_max_depth) + " levels");
    std::vector<std::string> siblings;
    for (const layer_record& r : children) {
        check_record_name(r, siblings);
        check_record_options(r);
        const std::string q = prefix.empty() ? r.name : prefix + "." + r.name;
        const auto add = [&](const char* role, std::size_t rows, std::size_t cols, bool is_state) {
            if (is_state == state) out.push_back({q + "." + role, rows, cols, is_state});
        };
        if (r.kind == "dense") {
            add("weights", r.count("inputs"), r.count("outputs"), false);
            if (r.number("bias") != 0.0) add("bias", 1, r.count("outputs"), false);
        } else if (r.kind == "layer_norm") {
            add("gain", 1, r.count("width"), false);
            add("bias", 1, r.count("width"), false);
        } else if (r.kind == "batch_norm") {
            add("gain", 1, r.count("width"), false);
            add("bias", 1, r.count("width"), false);
            add("population_mean", 1, r.count("width"), true);
            add("population_variance", 1, r.count("width"), true);
        } else if (r.kind == "residual" || r.kind == "linear_bypass") {
            collect_slots(r.children, q, state, out, depth + 1);
            if (r.kind == "linear_bypass") add("linear_weights", r.count("inputs"), r.count("outputs"), false);
        }
    }
}

}  // namespace detail

/// The weight matrices a network's architecture holds, in the order a model
/// file stores them: every layer's parameters in layer order, then every
/// layer's state buffers. Checks each record's kind, name and options as the
/// layers do when they are built; raises model.record.* or
/// model.layer.option codes. Call record_value_count() first on untrusted
/// records: this builds a list as long as the layers.
inline std::vector<weight_slot> architecture_weights(const layer_record& network_record) {
    if (network_record.kind != "network")
        raise(codes::model_record_unknown_kind, "network record: expected kind 'network', got '" + network_record.kind + "'");
    std::vector<weight_slot> slots;
    detail::collect_slots(network_record.children, std::string(), false, slots, 0);
    detail::collect_slots(network_record.children, std::string(), true, slots, 0);
    return slots;
}

TENON_NAMESPACE_END
