// tenon: the layer interface and the architecture record.
//
// A layer turns a batch x features value on a tape into another one. It owns
// its parameters (named "<layer>.<role>", e.g. "hidden1.weights", with a
// block's name as a further prefix) and its state buffers (non-trainable
// values saved with the weights). describe() gives a layer_record, the
// architecture without the weights, from which network.hpp rebuilds the
// layer and which turns into bytes and back exactly. More:
// docs/design/layers.md.
#pragma once

#include <cmath>
#include <cstddef>
#include <cstdint>
#include <string>
#include <utility>
#include <vector>

#include "tenon/autodiff/operations.hpp"
#include "tenon/core/bytes.hpp"

TENON_NAMESPACE_BEGIN

/// Training mode uses batch statistics and dropout; inference mode uses
/// population estimates and passes values through dropout unchanged.
enum class run_mode : std::uint8_t { training, inference };

/// The architecture of one layer: kind, name, options and nested layers.
struct layer_record {
    std::string kind;
    std::string name;
    std::vector<std::pair<std::string, double>> numbers;
    std::vector<std::pair<std::string, std::string>> texts;
    std::vector<layer_record> children;

    layer_record& set_number(const std::string& key, double value) {
        for (auto& e : numbers)
            if (e.first == key) { e.second = value; return *this; }
        numbers.emplace_back(key, value);
        return *this;
    }
    layer_record& set_text(const std::string& key, std::string value) {
        for (auto& e : texts)
            if (e.first == key) { e.second = std::move(value); return *this; }
        texts.emplace_back(key, std::move(value));
        return *this;
    }
    bool has(const std::string& key) const noexcept {
        for (const auto& e : numbers) if (e.first == key) return true;
        for (const auto& e : texts) if (e.first == key) return true;
        return false;
    }
    /// The number stored under `key`; raises model.record.missing_field.
    double number(const std::string& key) const {
        for (const auto& e : numbers) if (e.first == key) return e.second;
        missing(key);
    }
    /// A number that must be a whole count (0 <= n < 2^53).
    std::size_t count(const std::string& key) const {
        const double v = number(key);
        if (!(v >= 0.0 && v < 9007199254740992.0 && std::floor(v) == v)) {
            raise(codes::model_record_malformed, "layer record '" + name + "' (" + kind + "): field '" + key +
                                                     "' must be a whole non-negative count, got " + std::to_string(v));
        }
        return static_cast<std::size_t>(v);
    }
    const std::string& text(const std::string& key) const {
        for (const auto& e : texts) if (e.first == key) return e.second;
        missing(key);
    }

    friend bool operator==(const layer_record& a, const layer_record& b) {
        return a.kind == b.kind && a.name == b.name && a.numbers == b.numbers && a.texts == b.texts &&
               a.children == b.children;
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
    for (const auto& e : r.numbers) { w.text(e.first); w.f64(e.second); }
    w.u32(static_cast<std::uint32_t>(r.texts.size()));
    for (const auto& e : r.texts) { w.text(e.first); w.text(e.second); }
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

/// The interface every layer implements.
template <class T>
class layer {
    TENON_REQUIRE_SCALAR(T);

public:
    layer() = default;
    layer(const layer&) = delete;
    layer& operator=(const layer&) = delete;
    virtual ~layer() = default;

    /// Records the layer's computation on `t` and returns its output.
    virtual var<T> forward(tape<T>& t, var<T> input, run_mode mode) = 0;

    /// Short kind name, e.g. "dense"; the factory in network.hpp dispatches on it.
    virtual const char* kind() const noexcept = 0;

    /// The architecture (kind, name, sizes, options); no weights.
    virtual layer_record describe() const = 0;

    /// The number of output columns for `input_width` input columns; raises
    /// core.shape.mismatch when the layer cannot take that width.
    virtual std::size_t output_width(std::size_t input_width) const = 0;

    /// Appends the learned parameters (what update rules change).
    virtual void collect_parameters(std::vector<parameter<T>*>& out) { (void)out; }
    /// Appends the non-trainable state buffers (e.g. population estimates).
    virtual void collect_state(std::vector<parameter<T>*>& out) { (void)out; }

    const std::string& name() const noexcept { return name_; }
    /// The name with the enclosing blocks' names in front, e.g. "block1.dense1".
    std::string qualified_name() const { return prefix_.empty() ? name_ : prefix_ + "." + name_; }

    void set_name(std::string name) {
        name_ = std::move(name);
        renamed();
    }
    /// Set by containers: the qualified name of the enclosing block.
    void set_prefix(std::string prefix) {
        prefix_ = std::move(prefix);
        renamed();
    }

protected:
    // Layers move (a network takes them by value) but do not copy: a copy
    // would share nothing yet carry the same parameter names.
    layer(layer&&) noexcept = default;
    layer& operator=(layer&&) noexcept = default;

    /// Called after the (qualified) name changed: rename parameters here.
    virtual void renamed() {}

    layer_record base_record() const {
        layer_record r;
        r.kind = kind();
        r.name = name_;
        return r;
    }

    /// Raises core.shape.mismatch unless the input has `expected` columns.
    void require_width(std::size_t actual, std::size_t expected) const {
        if (actual != expected) {
            raise(codes::shape_mismatch, std::string(kind()) + " layer '" + qualified_name() + "' input: expected " +
                                             std::to_string(expected) + " columns, got " + std::to_string(actual));
        }
    }

private:
    std::string name_;
    std::string prefix_;
};

TENON_NAMESPACE_END
