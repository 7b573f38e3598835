// tenon: the predictor, a deployable, allocation-free evaluator of a model.
//
// Built once from a model file or a fitted model, it compiles the network
// into a list of steps over flat buffers (no tape) and serves raw rows,
// named cells or prepared features: class probabilities or values in the
// target's units, range flags, and a calibrated band where the file has one.
// After construction a call allocates nothing and takes no lock; one
// predictor serves one thread, copies share the compiled model. Each step
// keeps the trainer's bits on tenon's own kernels. Threads, errors,
// subnormals and bits: docs/design/predictor.md.
#pragma once

#include <algorithm>
#include <array>
#include <atomic>
#include <charconv>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <limits>
#include <memory>
#include <optional>
#include <string>
#include <string_view>
#include <utility>
#include <vector>

#if defined(__SSE__) || defined(_M_X64)
#include <xmmintrin.h>
#define TENON_DETAIL_HAS_MXCSR 1
#endif

#include "tenon/core/gemm.hpp"
#include "tenon/core/small_dense.hpp"
#include "tenon/core/activation_functions.hpp"
#include "tenon/core/compiled_once.hpp"
#include "tenon/format/calibration.hpp"
#include "tenon/format/model_file.hpp"
#include "tenon/prep/plan.hpp"
#include "tenon/prep/reference.hpp"

TENON_NAMESPACE_BEGIN

/// Outcome of a non-throwing call.
enum class input_status : std::uint8_t {
    ok = 0,
    missing_column,  // deploy.input.missing_column
    missing_value,  // deploy.input.missing_value
    not_numeric,  // deploy.input.not_numeric
    unseen_category,  // deploy.input.unseen_category
    non_finite,  // deploy.input.non_finite
    shape,  // deploy.input.shape (too many rows, wrong count, no plan)
};

struct predict_status {
    input_status code = input_status::ok;
    std::uint32_t row = 0;  // row of the call
    std::uint32_t column = 0;  // input column (raw calls) or feature (prepared calls)

    bool ok() const noexcept { return code == input_status::ok; }
    /// The stable error code, e.g. "deploy.input.missing_column"; "" when ok.
    const char* code_text() const noexcept {
        switch (code) {
        case input_status::ok: return "";
        case input_status::missing_column: return codes::deploy_input_missing_column;
        case input_status::missing_value: return codes::deploy_input_missing_value;
        case input_status::not_numeric: return codes::deploy_input_not_numeric;
        case input_status::unseen_category: return codes::deploy_input_unseen_category;
        case input_status::non_finite: return codes::deploy_input_non_finite;
        case input_status::shape: return codes::deploy_input_shape;
        }
        return "";
    }
};

/// Where an input cell lies relative to the training rows.
enum class range_flag : std::uint8_t {
    inside = 0,
    below = 1,  // a number below the training minimum
    above = 2,  // a number above the training maximum
    unseen_category = 3,  // a category never seen (encoded by the column's policy)
};

/// A raw cell by column name.
struct named_value {
    std::string_view name;
    std::string_view text;
};

/// A raw cell of a typed row: a number, a text, or missing.
struct raw_value {
    enum class kind_type : std::uint8_t { missing, number, text };
    kind_type kind = kind_type::missing;
    double number = 0.0;
    std::string_view text;

    static raw_value of_number(double v) noexcept { return {kind_type::number, v, {}}; }
    static raw_value of_text(std::string_view t) noexcept { return {kind_type::text, 0.0, t}; }
    static raw_value none() noexcept { return {}; }
};

/// Customization point for a host's row type. Specialize with:
///   static constexpr std::size_t count;             // number of fields
///   static const char* name(std::size_t field);     // a column name
///   static raw_value get(const Row& row, std::size_t field);
template <class Row>
struct row_fields;

/// The result of a call: valid until the next call on the same predictor.
template <class T>
struct prediction_view {
    const T* values = nullptr;  // rows x width: probabilities, or values in original units
    std::size_t rows = 0;
    std::size_t width = 0;
    const range_flag* flags = nullptr;  // rows x columns (empty for prepared calls)
    std::size_t columns = 0;
    /// A seed ensemble's members (1 for one network). `values` is their mean;
    /// `spread` (rows x width) their sample standard deviation (n - 1; zeros
    /// for one member) per output, in the units of `values`; member m's own
    /// outputs are the rows x width block at member_values + m x rows x width.
    std::size_t members = 1;
    const T* spread = nullptr;
    const T* member_values = nullptr;
    /// Regression with a calibrated band: rows x width bounds; else null.
    const T* low = nullptr;
    const T* high = nullptr;
    /// Classification with calibrated sets: rows x set_words bits (class k is
    /// bit k % 64 of word k / 64); else null.
    const std::uint64_t* class_sets = nullptr;
    std::size_t set_words = 0;

    T at(std::size_t row, std::size_t k) const noexcept { return values[row * width + k]; }
    range_flag flag(std::size_t row, std::size_t column) const noexcept { return flags[row * columns + column]; }
    /// Number of flagged cells of a row.
    std::size_t flagged(std::size_t row) const noexcept {
        std::size_t n = 0;
        for (std::size_t k = 0; k < columns; ++k) n += flags[row * columns + k] != range_flag::inside;
        return n;
    }
    bool has_interval() const noexcept { return low != nullptr; }
    bool has_class_sets() const noexcept { return class_sets != nullptr; }
    T low_at(std::size_t row, std::size_t k) const noexcept { return low[row * width + k]; }
    T high_at(std::size_t row, std::size_t k) const noexcept { return high[row * width + k]; }
    /// Whether class k is in the row's set.
    bool in_set(std::size_t row, std::size_t k) const noexcept { return (class_sets[row * set_words + k / 64] >> (k % 64)) & 1u; }
    std::size_t set_size(std::size_t row) const noexcept {
        std::size_t n = 0;
        for (std::size_t k = 0; k < width; ++k) n += in_set(row, k);
        return n;
    }
    /// The most probable class of a row (classification).
    std::size_t best_class(std::size_t row) const noexcept {
        const T* v = values + row * width;
        return static_cast<std::size_t>(std::max_element(v, v + width) - v);
    }
};

/// Field indices of a row type in a predictor's input-column order
/// (predictor::bind<Row>()).
template <class Row>
struct row_binding {
    std::vector<std::size_t> field_of_column;
    const void* model = nullptr;  // the compiled model it was made for
};

namespace detail {

template <class T>
T flush_subnormal(T v) noexcept {
    return std::abs(v) < std::numeric_limits<T>::min() ? T(0) : v;
}

// Sets MXCSR's flush-to-zero (bit 15) and denormals-are-zero (bit 6) bits
// for a scope and restores the host's value (Intel 64 and IA-32
// Architectures Software Developer's Manual, vol. 1, section 10.2.3); while
// the thread holds a flush_subnormals_scope (core/simd.hpp) the bits are
// already set, and reading and writing the register again is skipped; where
// the host has set both bits itself, the register is read but not written.
class denormal_guard {
public:
#if defined(TENON_DETAIL_HAS_MXCSR)
    denormal_guard() noexcept : set_(flush_scopes_held() == 0) {
        if (set_) {
            saved_ = _mm_getcsr();
            set_ = (saved_ & mxcsr_flush_bits) != mxcsr_flush_bits;  // a host that flushes already: nothing to write
            if (set_) _mm_setcsr(saved_ | mxcsr_flush_bits);
        }
    }
    ~denormal_guard() {
        if (set_) _mm_setcsr(saved_);
    }

private:
    bool set_;
    unsigned int saved_ = 0;
#else
    denormal_guard() noexcept {}
#endif
};

enum class step_kind : std::uint8_t { dense, activate, layer_norm, batch_norm, add };

struct program_step {
    step_kind kind = step_kind::dense;
    std::size_t in = 0, in2 = 0, out = 0;  // buffer ids
    std::size_t inputs = 0, outputs = 0;  // widths
    std::size_t a = 0, b = 0, c = 0, d = 0;  // offsets into the value store (weights, bias, gain, ...)
    std::size_t scratch = 0;  // buffer id of a scratch row block (layer normalization)
    bool has_bias = false;
    activation function = activation::identity;
    double coefficient = 0.0;
    double epsilon = 0.0;
    // Set by specialise_steps for a dense step (run as one dense_rows pass):
    bool relu_after = false;  // the relu step that followed is fused in
    bool has_addend = false;  // the sum step that followed is fused in:
    std::size_t addend = 0;  //   the buffer added to the result
    std::size_t t = 0;  // offset of W transposed (outputs x inputs) when outputs < thin_columns
    small_dense_version version = small_dense_version::portable;  // the row loop for calls of few rows
    // Set by group_steps: this dense step and the group - 1 after it have the
    // same shape and read nothing the others write; calls of few rows (and
    // layers of fewer than thin_columns outputs) run them in one dense_group.
    std::size_t group = 1;
};

// Most dense steps group_steps puts in one group.
inline constexpr std::size_t most_grouped = 8;

struct column_info {
    std::string name;
    column_kind kind = column_kind::numeric;
    time_format time_form = time_format::detect;  // date/time: how raw cells are written
    time_encoding time = time_encoding::value;  // date/time: scaled stamp and/or cyclic values
    fill_value fill;
    bool indicator = false;
    scaling scale;
    one_hot_layout one_hot;
    std::size_t offset = 0;
    std::size_t width = 0;
    bool has_range = false;
    double minimum = 0.0, maximum = 0.0;
};

template <class T>
struct compiled_model {
    std::optional<measured_plan> plan;
    std::vector<column_info> columns;
    std::vector<std::string> missing_tokens;
    std::size_t feature_count = 0;
    std::size_t output_count = 0;
    bool classification = false;
    bool regression = false;
    scaling target_scale;
    std::vector<std::string> class_names;
    std::vector<feature_reference> references;
    std::optional<interval_calibration> interval;  // regression only
    std::optional<class_calibration> classes;  // classification only
    std::vector<program_step> steps;
    std::vector<std::size_t> buffer_widths;  // buffer 0 holds the prepared features
    std::size_t output_buffer = 0;
    std::vector<std::size_t> member_buffers;  // output buffers of a seed ensemble's other members
    std::vector<T> store;  // every weight, flushed of subnormals
    // Set by specialise_steps where every step is a dense step with a fixed
    // row kernel (core/small_dense.hpp): a call of one row runs only these,
    // one kernel call per step, in the order of `steps`.
    struct row_step {
        row_kernel<T> kernel = nullptr;
        std::size_t in = 0, out = 0, addend = SIZE_MAX;  // buffer ids (addend: none)
        std::size_t inputs = 0, weights = 0, bias = SIZE_MAX;  // width, offsets into the store (bias: none)
        bool relu = false;
    };
    std::vector<row_step> row_program;

    std::size_t put(const matrix<T>& m) {
        const std::size_t at = store.size();
        for (std::size_t k = 0; k < m.size(); ++k) store.push_back(flush_subnormal(m.data()[k]));
        return at;
    }
    std::size_t put_values(const std::vector<T>& v) {
        const std::size_t at = store.size();
        store.insert(store.end(), v.begin(), v.end());
        return at;
    }
    std::size_t new_buffer(std::size_t width) {
        buffer_widths.push_back(width);
        return buffer_widths.size() - 1;
    }

    // The weights in the order check_weights_fit() verified: parameters
    // from `parameter`, state buffers from `state` (both advance).
    struct weight_cursor {
        const std::vector<named_matrix<T>>& weights;
        std::size_t parameter = 0;
        std::size_t state = 0;
        const matrix<T>& next_parameter() { return weights[parameter++].values; }
        const matrix<T>& next_state() { return weights[state++].values; }
    };

    // Appends the steps of the layers in `children` (enclosing block
    // `prefix`) reading buffer `in`; returns the output buffer. The weights
    // are consumed in the order architecture_weights() lists them, which
    // check_weights_fit() has checked against the stored names and shapes.
    std::size_t compile_chain(const std::vector<layer_record>& children, const std::string& prefix, std::size_t in, weight_cursor& w) {
        for (const layer_record& r : children) in = compile_record(r, prefix.empty() ? r.name : prefix + "." + r.name, in, w);
        return in;
    }

    std::size_t compile_record(const layer_record& r, const std::string& name, std::size_t in, weight_cursor& w) {
        const std::size_t width = buffer_widths[in];
        program_step s;
        s.in = in;
        s.inputs = width;
        if (r.kind == "dense") {
            if (r.count("inputs") != width)
                raise(codes::deploy_model_shape_mismatch,
                      "predictor: dense layer '" + name + "' takes " + std::to_string(r.count("inputs")) + " inputs, it is given " +
                          std::to_string(width));
            s.kind = step_kind::dense;
            s.outputs = r.count("outputs");
            s.a = put(w.next_parameter());
            s.has_bias = r.number("bias") != 0.0;
            if (s.has_bias) s.b = put(w.next_parameter());
        } else if (r.kind == "activation") {
            const activation function = parse_activation(r.text("function"));
            if (function == activation::identity) return in;
            s.kind = step_kind::activate;
            s.outputs = width;
            s.function = function;
            s.coefficient = r.number("coefficient");
        } else if (r.kind == "dropout") {
            return in;  // inference passes values through
        } else if (r.kind == "layer_norm") {
            if (r.count("width") != width)
                raise(codes::deploy_model_shape_mismatch,
                      "predictor: layer normalization '" + name + "' does not fit width " + std::to_string(width));
            s.kind = step_kind::layer_norm;
            s.outputs = width;
            s.epsilon = r.number("epsilon");
            s.a = put(w.next_parameter());
            s.b = put(w.next_parameter());
            s.scratch = new_buffer(width);
        } else if (r.kind == "batch_norm") {
            if (r.count("width") != width)
                raise(codes::deploy_model_shape_mismatch,
                      "predictor: batch normalization '" + name + "' does not fit width " + std::to_string(width));
            s.kind = step_kind::batch_norm;
            s.outputs = width;
            s.epsilon = r.number("epsilon");
            const matrix<T>& gain = w.next_parameter();
            const matrix<T>& bias = w.next_parameter();
            const matrix<T>& mean = w.next_state();
            const matrix<T>& variance = w.next_state();
            // The tape computes pow(population_variance + epsilon, -0.5) per column; so does this, once.
            const T eps = static_cast<T>(s.epsilon);
            std::vector<T> inv(width);
            for (std::size_t j = 0; j < width; ++j) inv[j] = std::pow(variance.data()[j] + eps, T(-0.5));
            s.a = put(mean);
            s.b = put_values(inv);
            s.c = put(gain);
            s.d = put(bias);
        } else if (r.kind == "residual") {
            const std::size_t inner = compile_chain(r.children, name, in, w);
            if (buffer_widths[inner] != width)
                raise(codes::deploy_model_shape_mismatch, "predictor: residual block '" + name + "' changes the width");
            s.kind = step_kind::add;
            s.in2 = inner;
            s.outputs = width;
        } else if (r.kind == "linear_bypass") {
            const std::size_t outputs = r.count("outputs");
            if (r.count("inputs") != width)
                raise(codes::deploy_model_shape_mismatch,
                      "predictor: linear bypass '" + name + "' takes " + std::to_string(r.count("inputs")) + " inputs, it is given " +
                          std::to_string(width));
            const std::size_t inner = compile_chain(r.children, name, in, w);
            if (buffer_widths[inner] != outputs)
                raise(codes::deploy_model_shape_mismatch, "predictor: linear bypass '" + name + "' inner output has the wrong width");
            // The linear path x W (a dense step without bias), then f(x) + x W as the tape adds them.
            program_step path;
            path.kind = step_kind::dense;
            path.in = in;
            path.inputs = width;
            path.outputs = outputs;
            path.a = put(w.next_parameter());  // the block's own parameter follows its layers'
            path.out = new_buffer(path.outputs);
            steps.push_back(path);
            s.kind = step_kind::add;
            s.in = inner;
            s.in2 = path.out;
            s.inputs = outputs;
            s.outputs = outputs;
        } else {
            raise(codes::deploy_predictor_unsupported_layer, "predictor: layer '" + name + "' of kind '" + r.kind + "' cannot be evaluated");
        }
        s.out = new_buffer(s.outputs);
        steps.push_back(s);
        return s.out;
    }
};

// Raises deploy.predictor.unsupported_layer for a layer kind the predictor
// cannot evaluate (a host's own layer, or a kind from a newer tenon).
inline void require_known_kinds(const std::vector<layer_record>& children, const std::string& prefix) {
    for (const layer_record& r : children) {
        const std::string name = prefix.empty() ? r.name : prefix + "." + r.name;
        if (r.kind == "residual" || r.kind == "linear_bypass")
            require_known_kinds(r.children, name);
        else if (r.kind != "dense" && r.kind != "activation" && r.kind != "dropout" && r.kind != "layer_norm" && r.kind != "batch_norm")
            raise(codes::deploy_predictor_unsupported_layer,
                  "predictor: layer '" + name + "' of kind '" + r.kind +
                      "' cannot be evaluated (dense, activation, dropout, layer_norm, batch_norm, residual, linear_bypass)");
    }
}

// A seed ensemble's networks in lockstep: the first step of every member,
// then the second of every member, and so on, when all members have as many
// steps and each reads only the prepared features (buffer 0) and its own
// earlier results. Each member's values are computed as before; the
// processor then finds the independent chains of additions of several
// members next to each other in the instruction stream and overlaps them
// (a member's one-row layers are bound by the latency of those chains).
template <class T>
std::vector<program_step> interleave_members(std::vector<program_step> steps, const compiled_model<T>& m) {
    if (m.member_buffers.empty()) return steps;
    std::vector<std::size_t> ends{m.output_buffer};
    ends.insert(ends.end(), m.member_buffers.begin(), m.member_buffers.end());
    std::vector<std::vector<program_step>> chains;
    std::vector<std::size_t> owner(m.buffer_widths.size(), SIZE_MAX);  // chain that writes each buffer
    std::size_t chain = 0;
    std::vector<program_step> current;
    for (const program_step& s : steps) {
        if (chain >= ends.size()) return steps;
        const auto reads_own = [&](std::size_t b) { return b == 0 || owner[b] == chain; };
        if (!reads_own(s.in) || (s.kind == step_kind::add && !reads_own(s.in2)) ||
            (s.kind == step_kind::dense && s.has_addend && !reads_own(s.addend)))
            return steps;
        if (owner[s.out] != SIZE_MAX || s.out == 0) return steps;
        owner[s.out] = chain;
        if (s.kind == step_kind::layer_norm) owner[s.scratch] = chain;
        current.push_back(s);
        if (s.out == ends[chain]) {
            chains.push_back(std::move(current));
            current.clear();
            ++chain;
        }
    }
    if (chains.size() != ends.size() || !current.empty()) return steps;
    for (const auto& c : chains)
        if (c.size() != chains[0].size()) return steps;
    std::vector<program_step> lockstep;
    for (std::size_t l = 0; l < chains[0].size(); ++l)
        for (const auto& c : chains) lockstep.push_back(c[l]);
    return lockstep;
}

// Groups runs of dense steps of the same inputs and outputs where no step
// reads or overwrites a buffer an earlier one of the run writes or reads,
// such as one layer of every member of a seed ensemble after
// interleave_members: dense_group (core/small_dense.hpp) computes them side
// by side, each value as it would be computed alone.
inline void group_steps(std::vector<program_step>& steps) {
    for (std::size_t i = 0; i < steps.size();) {
        program_step& s = steps[i];
        std::size_t g = 1;
        while (s.kind == step_kind::dense && i + g < steps.size() && g < most_grouped) {
            const program_step& next = steps[i + g];
            if (next.kind != step_kind::dense || next.inputs != s.inputs || next.outputs != s.outputs) break;
            bool independent = true;
            for (std::size_t e = i; e < i + g; ++e) {
                const program_step& earlier = steps[e];
                const auto touches = [&](std::size_t b) {
                    return b == earlier.out || b == earlier.in || (earlier.has_addend && b == earlier.addend);
                };
                if (next.in == earlier.out || (next.has_addend && next.addend == earlier.out) || touches(next.out)) independent = false;
            }
            if (!independent) break;
            ++g;
        }
        s.group = g;
        if (g > 1) s.version = best_group_version();
        i += g;
    }
}

// The specialisation pass, run once when a model is compiled: each dense
// step takes the relu step and then the sum step (a linear bypass's
// f(x) + x W) that directly follow it and read only its result, so the
// three run as one pass of dense_rows (core/small_dense.hpp) with the
// values in registers; a dense step with fewer than thin_columns outputs
// gets its weights transposed, so each output's dot product reads them
// contiguously. Where every step then is a dense step of a width with a
// fixed row kernel (fixed_row_kernel: 1 output, or whole vectors of them),
// the row program lists one kernel call per step for calls of one row; the
// members of an ensemble run one after another there, their chains left to
// the processor to overlap. The arithmetic of every value is unchanged.
template <class T>
void specialise_steps(compiled_model<T>& m) {
    std::vector<std::size_t> readers(m.buffer_widths.size(), 0);
    for (const program_step& s : m.steps) {
        ++readers[s.in];
        if (s.kind == step_kind::add) ++readers[s.in2];
    }
    ++readers[m.output_buffer];  // read by the caller
    for (std::size_t b : m.member_buffers) ++readers[b];
    std::vector<program_step> steps;
    for (std::size_t i = 0; i < m.steps.size(); ++i) {
        program_step s = m.steps[i];
        if (s.kind == step_kind::dense) {
            while (i + 1 < m.steps.size() && readers[s.out] == 1) {
                const program_step& next = m.steps[i + 1];
                if (!s.relu_after && !s.has_addend && next.kind == step_kind::activate && next.function == activation::relu && next.in == s.out) {
                    s.relu_after = true;
                } else if (!s.has_addend && next.kind == step_kind::add && next.in != next.in2 && (next.in == s.out || next.in2 == s.out)) {
                    s.has_addend = true;
                    s.addend = next.in == s.out ? next.in2 : next.in;
                } else {
                    break;
                }
                s.out = next.out;
                ++i;
            }
            if (s.outputs > 1 && s.outputs < thin_columns<T>) {
                s.t = m.store.size();
                for (std::size_t j = 0; j < s.outputs; ++j)
                    for (std::size_t p = 0; p < s.inputs; ++p) {
                        const T v = m.store[s.a + p * s.outputs + j];
                        m.store.push_back(v);
                    }
            } else {
                s.t = s.a;
            }
            s.version = best_small_dense_version();
        }
        steps.push_back(s);
    }
    m.steps = interleave_members(std::move(steps), m);
    group_steps(m.steps);
    for (const program_step& s : m.steps) {
        const row_kernel<T> kernel = s.kind == step_kind::dense ? fixed_row_kernel<T>(s.outputs, best_small_dense_version()) : nullptr;
        if (!kernel) {
            m.row_program.clear();
            break;
        }
        m.row_program.push_back({kernel, s.in, s.out, s.has_addend ? s.addend : SIZE_MAX, s.inputs, s.t, s.has_bias ? s.b : SIZE_MAX, s.relu_after});
    }
}

inline bool parse_for_kind(const column_info& c, std::string_view cell, double& value) noexcept {
    return c.kind == column_kind::datetime ? parse_datetime(cell, c.time_form, value) : parse_number(cell, value);
}

}  // namespace detail

template <class T>
class predictor_holder;

/// The entry points (construction from a file, the predict calls) are
/// defined after the class, not inline, so serve.hpp's compiled-once mode
/// can keep them out of every serving unit but one.
template <class T>
class predictor {
    TENON_REQUIRE_SCALAR(T);

public:
    /// From a loaded model file (the plan, reference summaries and
    /// calibration come with it).
    explicit predictor(const model_file<T>& file, std::size_t capacity = 64);
    /// From a trainer's result or a network (train/authoring.hpp declares
    /// serving_form() for fitted_model<T> and network<T>; a serving program
    /// that includes only <tenon/serve.hpp> never instantiates this). A
    /// fitted model brings its plan but no reference summaries, so nothing
    /// is flagged: build from make_model_file(...) to get them.
    template <class Source, class = decltype(serving_form(std::declval<Source&>()))>
    explicit predictor(Source& source, std::size_t capacity = 64) : capacity_(capacity) {
        const model_file<T> file = serving_form(source);
        model_ = build_program(file, file.plan ? &*file.plan : nullptr, {});
        allocate();
    }
    /// From a network alone (prepared features in, network outputs out) or
    /// with a plan and references (see the constructor above).
    template <class Network, class = decltype(serving_form(std::declval<Network&>()))>
    predictor(Network& net, const measured_plan* plan, const std::vector<feature_reference>& references, std::size_t capacity = 64)
        : capacity_(capacity) {
        model_ = build_program(serving_form(net), plan, references);
        allocate();
    }

    predictor(const predictor&) = default;
    predictor(predictor&&) noexcept = default;
    /// Copy and swap: if the copy's buffers cannot be allocated, this
    /// predictor keeps its model and buffers.
    predictor& operator=(const predictor& other);
    predictor& operator=(predictor&&) noexcept = default;

    /// Runs one pass over `capacity` rows of zeros. The matrix kernel
    /// (core/gemm.hpp) keeps per-thread scratch that grows on first use, so
    /// a thread that did not construct this predictor calls warm_up() once
    /// before its first allocation-free call. Construction, holder get() and
    /// refresh() warm up the calling thread.
    void warm_up() noexcept;

    // --- what it expects and gives ---------------------------------------------------------
    std::size_t capacity() const noexcept { return capacity_; }
    bool has_plan() const noexcept { return model_->plan.has_value(); }
    /// Raw columns, in the order predict_cells expects.
    std::size_t input_count() const noexcept { return model_->columns.size(); }
    const std::string& input_name(std::size_t k) const noexcept { return model_->columns[k].name; }
    std::size_t feature_count() const noexcept { return model_->feature_count; }
    std::size_t output_count() const noexcept { return model_->output_count; }
    /// Networks averaged: 1, or a seed ensemble's member count.
    std::size_t member_count() const noexcept { return 1 + model_->member_buffers.size(); }
    bool is_classification() const noexcept { return model_->classification; }
    const std::vector<std::string>& class_names() const noexcept { return model_->class_names; }
    const std::vector<feature_reference>& references() const noexcept { return model_->references; }
    /// The calibration in use (from the model file's section CALB).
    const std::optional<interval_calibration>& interval() const noexcept { return model_->interval; }
    const std::optional<class_calibration>& class_sets() const noexcept { return model_->classes; }

    /// Maps a row type's fields to the input columns (allocates; do it once).
    /// Raises deploy.input.missing_column when a column has no field.
    template <class Row>
    row_binding<Row> bind() const {
        row_binding<Row> b;
        b.model = model_.get();
        for (const auto& c : model_->columns) {
            std::size_t found = row_fields<Row>::count;
            for (std::size_t f = 0; f < row_fields<Row>::count; ++f)
                if (c.name == row_fields<Row>::name(f)) found = f;
            if (found == row_fields<Row>::count)
                raise(codes::deploy_input_missing_column, "predictor: the row type has no field for column '" + c.name + "'");
            b.field_of_column.push_back(found);
        }
        return b;
    }

    // --- non-throwing calls (noexcept, no allocation) -----------------------------------------
    /// `rows` rows of feature_count() prepared features.
    predict_status try_predict_prepared(const T* features, std::size_t rows, prediction_view<T>& out) noexcept;

    /// `rows` raw rows of input_count() cell texts each, in input-column order.
    predict_status try_predict_cells(const std::string_view* cells, std::size_t rows, prediction_view<T>& out) noexcept;

    /// One raw row as (name, text) cells in any order; extra cells are ignored.
    predict_status try_predict_named(const named_value* cells, std::size_t count, prediction_view<T>& out) noexcept;

    /// `count` typed rows through a binding made by bind<Row>().
    template <class Row>
    predict_status try_predict_rows(const row_binding<Row>& binding, const Row* rows, std::size_t count, prediction_view<T>& out) noexcept {
        if (count > capacity_ || !model_->plan || binding.model != model_.get()) return {input_status::shape, static_cast<std::uint32_t>(count), 0};
        for (std::size_t i = 0; i < count; ++i)
            for (std::size_t k = 0; k < input_count(); ++k) {
                const predict_status s = prepare_cell(i, k, row_fields<Row>::get(rows[i], binding.field_of_column[k]));
                if (!s.ok()) return s;
            }
        run(count, out);
        return {};
    }

    // --- throwing calls --------------------------------------------------------------------------
    prediction_view<T> predict_prepared(const T* features, std::size_t rows);
    prediction_view<T> predict_cells(const std::string_view* cells, std::size_t rows);
    prediction_view<T> predict_named(const named_value* cells, std::size_t count);
    prediction_view<T> predict_named(const std::vector<named_value>& cells) { return predict_named(cells.data(), cells.size()); }
    template <class Row>
    prediction_view<T> predict_rows(const row_binding<Row>& binding, const Row* rows, std::size_t count) {
        if (binding.model != model_.get())
            raise(codes::deploy_input_shape, "predictor: the row binding was made for another model; call bind() on this predictor");
        prediction_view<T> out;
        check(try_predict_rows(binding, rows, count, out), count, false);
        return out;
    }

    /// The message a status would raise with.
    std::string describe(const predict_status& s, std::size_t rows = 0, bool prepared = false) const;

private:
    friend class predictor_holder<T>;
    using model_type = detail::compiled_model<T>;

    predictor(std::shared_ptr<const model_type> m, std::size_t capacity) : model_(std::move(m)), capacity_(capacity) { allocate(); }

    void check(const predict_status& s, std::size_t rows, bool prepared) const {
        if (!s.ok()) raise(s.code_text(), describe(s, rows, prepared));
    }

    static std::shared_ptr<const model_type> build_program(const model_file<T>& file, const measured_plan* plan,
                                                           const std::vector<feature_reference>& refs,
                                                           const model_calibration* calibration = nullptr) {
        // Kinds, then names and shapes for every member, before anything is compiled.
        detail::require_known_kinds(file.architecture.children, std::string());
        const std::vector<weight_slot> slots = check_weights_fit(file.architecture, file.weights);
        for (const auto& member : file.members) check_weights_fit(file.architecture, member);
        const auto parameters = static_cast<std::size_t>(std::count_if(slots.begin(), slots.end(), [](const weight_slot& w) { return !w.state; }));
        auto m = std::make_shared<model_type>();
        std::size_t width = 0;
        if (plan) {
            m->plan.emplace(*plan);
            width = plan->feature_count();
            m->missing_tokens = plan->missing_tokens();
            for (const auto& name : plan->input_columns()) {
                detail::column_info c;
                c.name = name;
                c.kind = plan->feature_kind(name);
                c.fill = plan->feature_fill(name);
                c.indicator = plan->feature_has_indicator(name);
                c.offset = plan->feature_offset(name);
                if (c.kind == column_kind::categorical) {
                    c.one_hot = plan->feature_categories(name);
                    c.width = c.one_hot.width();
                } else {
                    c.scale = plan->feature_scaling(name);
                    c.time_form = plan->feature_time_form(name);
                    c.time = plan->feature_time_encoding(name);
                    c.width = (c.time != time_encoding::cycles ? 1 : 0) + (c.time != time_encoding::value ? 6 : 0);
                }
                c.width += c.indicator ? 1 : 0;
                for (const auto& r : refs)
                    if (r.column == name && r.kind != column_kind::categorical && r.present > 0) {
                        c.has_range = true;
                        c.minimum = r.minimum;
                        c.maximum = r.maximum;
                    }
                m->columns.push_back(std::move(c));
            }
            if (plan->has_target()) {
                m->classification = plan->target_type() == target_kind::classification;
                m->regression = !m->classification;
                if (m->classification)
                    m->class_names = plan->class_names();
                else
                    m->target_scale = plan->target_scaling();
            }
        } else {
            for (const layer_record& r : file.architecture.children) {
                if (r.kind == "dense" || r.kind == "linear_bypass") width = r.count("inputs");
                if (width != 0) break;
            }
            if (width == 0)
                raise(codes::deploy_model_shape_mismatch,
                      "predictor: without a plan the first layer must be dense or a linear bypass to fix the input width");
        }
        m->references = refs;
        m->feature_count = width;
        std::size_t buffer = m->new_buffer(width);
        typename model_type::weight_cursor first{file.weights, 0, parameters};
        buffer = m->compile_chain(file.architecture.children, std::string(), buffer, first);
        m->output_buffer = buffer;
        m->output_count = m->buffer_widths[buffer];
        // A seed ensemble's other members read the same prepared features (buffer 0).
        for (const auto& member : file.members) {
            typename model_type::weight_cursor cursor{member, 0, parameters};
            const std::size_t b = m->compile_chain(file.architecture.children, std::string(), 0, cursor);
            if (m->buffer_widths[b] != m->output_count)
                raise(codes::deploy_model_shape_mismatch,
                      "predictor: an ensemble member gives " + std::to_string(m->buffer_widths[b]) + " outputs, the first gives " +
                          std::to_string(m->output_count));
            m->member_buffers.push_back(b);
        }
        if (m->classification && m->output_count != m->class_names.size())
            raise(codes::deploy_model_shape_mismatch,
                  "predictor: the network gives " + std::to_string(m->output_count) + " outputs for " + std::to_string(m->class_names.size()) +
                      " classes");
        if (m->regression && m->output_count != 1)
            raise(codes::deploy_model_shape_mismatch,
                  "predictor: the network gives " + std::to_string(m->output_count) + " outputs for one regression target");
        // A calibration is used only for the kind of target it was fitted for.
        if (calibration && m->regression) m->interval = calibration->interval;
        if (calibration && m->classification) m->classes = calibration->classes;
        detail::specialise_steps(*m);
        return m;
    }

    // Sizes the buffers for model_. They are built aside and swapped in, so
    // an allocation failure leaves the previous buffers in place (the
    // callers then keep or restore the model they fit).
    void allocate() {
        if (capacity_ == 0) raise(codes::core_argument_invalid, "predictor: the capacity must be at least one row");
        std::vector<std::vector<T>> buffers(model_->buffer_widths.size());
        for (std::size_t b = 0; b < buffers.size(); ++b) buffers[b].assign(capacity_ * model_->buffer_widths[b], T(0));
        std::vector<T> outputs(capacity_ * model_->output_count, T(0));
        const std::size_t members = 1 + model_->member_buffers.size();
        std::vector<T> member_values(members > 1 ? members * capacity_ * model_->output_count : 0, T(0));
        std::vector<T> spread(capacity_ * model_->output_count, T(0));
        std::vector<range_flag> flags(capacity_ * std::max<std::size_t>(1, input_count()), range_flag::inside);
        std::vector<std::array<char, 32>> text(input_count());
        std::vector<T> low(model_->interval ? capacity_ * model_->output_count : 0), high(low.size());
        std::vector<std::uint64_t> sets(model_->classes ? capacity_ * class_set_words(model_->output_count) : 0);
        low_.swap(low);
        high_.swap(high);
        sets_.swap(sets);
        buffers_.swap(buffers);
        outputs_.swap(outputs);
        member_values_.swap(member_values);
        spread_.swap(spread);
        flags_.swap(flags);
        text_.swap(text);
        warm_up();
    }

    // Prepares cell (row i, input column k) into buffer 0, as measured_plan::apply_cells does.
    predict_status prepare_cell(std::size_t i, std::size_t k, const raw_value& v) noexcept {
        const detail::column_info& c = model_->columns[k];
        T* out = buffers_[0].data() + i * model_->feature_count + c.offset;
        range_flag& flag = flags_[i * input_count() + k];
        flag = range_flag::inside;
        const auto at = [&](input_status code) { return predict_status{code, static_cast<std::uint32_t>(i), static_cast<std::uint32_t>(k)}; };
        std::string_view cell;
        bool missing = v.kind == raw_value::kind_type::missing;
        if (v.kind == raw_value::kind_type::text) {
            cell = detail::trim_blanks(v.text);
            missing = is_missing_cell(cell, model_->missing_tokens);
        } else if (v.kind == raw_value::kind_type::number && !std::isfinite(v.number)) {
            return at(input_status::non_finite);
        }
        if (c.kind == column_kind::categorical) {
            if (v.kind == raw_value::kind_type::number) {
                const auto r = std::to_chars(text_[k].data(), text_[k].data() + text_[k].size(), v.number);
                cell = std::string_view(text_[k].data(), static_cast<std::size_t>(r.ptr - text_[k].data()));
            }
            std::int64_t index = -1;
            if (missing) {
                if (c.fill.method == fill_method::none) return at(input_status::missing_value);
                index = c.one_hot.find(c.fill.text);
            } else {
                index = c.one_hot.find(cell);
            }
            if (index < 0) {
                if (c.one_hot.policy() == unseen_policy::fail) return at(input_status::unseen_category);
                flag = range_flag::unseen_category;
            }
            c.one_hot.encode(index, out, c.name, cell);  // cannot raise: index >= 0 or the policy is not fail
            if (c.indicator) out[c.width - 1] = missing ? T(1) : T(0);
            return {};
        }
        double value = 0.0;
        if (missing) {
            if (c.fill.method == fill_method::none) return at(input_status::missing_value);
            value = c.fill.number;
        } else if (v.kind == raw_value::kind_type::number) {
            value = v.number;
        } else if (!detail::parse_for_kind(c, cell, value)) {
            return at(input_status::not_numeric);
        }
        std::size_t slot = 0;
        if (c.time != time_encoding::cycles) {
            const T prepared = static_cast<T>(c.scale.forward(value));
            if (!std::isfinite(prepared)) return at(input_status::non_finite);
            out[slot++] = detail::flush_subnormal(prepared);
        }
        if (c.time != time_encoding::value) {
            if (!std::isfinite(value)) return at(input_status::non_finite);
            double cycles[6];
            time_cycles(value, cycles);  // as measured_plan::apply_cells, so both paths give the same features
            for (double x : cycles) out[slot++] = detail::flush_subnormal(static_cast<T>(x));
        }
        if (c.indicator) out[slot] = missing ? T(1) : T(0);
        if (!missing && c.has_range) flag = value < c.minimum ? range_flag::below : value > c.maximum ? range_flag::above : range_flag::inside;
        return {};
    }

    void run(std::size_t rows, prediction_view<T>& out) noexcept {
        const detail::denormal_guard guard;
        const model_type& m = *model_;
        const T* store = m.store.data();
        const auto finish_of = [&](const detail::program_step& s) noexcept {
            return detail::dense_finish<T>{s.has_bias ? store + s.b : nullptr, s.relu_after, s.has_addend ? buffers_[s.addend].data() : nullptr};
        };
        // One row: the kernels fixed at load (specialise_steps), and no step below.
        const bool row_program = rows == 1 && !m.row_program.empty();
        if (row_program)
            for (const auto& r : m.row_program)
                r.kernel(buffers_[r.in].data(), store + r.weights, r.inputs, r.bias == SIZE_MAX ? nullptr : store + r.bias, r.relu,
                         r.addend == SIZE_MAX ? nullptr : buffers_[r.addend].data(), buffers_[r.out].data());
        for (std::size_t step = row_program ? m.steps.size() : 0; step < m.steps.size(); ++step) {
            const detail::program_step& s = m.steps[step];
            const T* x = buffers_[s.in].data();
            T* y = buffers_[s.out].data();
            const std::size_t w = s.outputs, size = rows * w;
            switch (s.kind) {
            case detail::step_kind::dense: {
                // The sum, bias, flush, fused relu and fused sum in one pass
                // (specialise_steps), for the steps of its group at once
                // where gemm would take the unpacked loops.
                if (s.group == 1 && rows < detail::always_thin_rows<T>) {
                    detail::small_dense<T>(rows, s.inputs, w, x, store + s.a, store + s.t, finish_of(s), y, s.version);
                } else if (rows < detail::always_thin_rows<T> || w < detail::thin_columns<T>) {
                    const T* xs[detail::most_grouped];
                    const T* ws[detail::most_grouped];
                    const T* wts[detail::most_grouped];
                    const T* biases[detail::most_grouped];
                    bool relus[detail::most_grouped];
                    const T* addends[detail::most_grouped];
                    T* ys[detail::most_grouped];
                    for (std::size_t g = 0; g < s.group; ++g) {
                        const detail::program_step& t = m.steps[step + g];
                        xs[g] = buffers_[t.in].data();
                        ws[g] = store + t.a;
                        wts[g] = store + t.t;
                        biases[g] = t.has_bias ? store + t.b : nullptr;
                        relus[g] = t.relu_after;
                        addends[g] = t.has_addend ? buffers_[t.addend].data() : nullptr;
                        ys[g] = buffers_[t.out].data();
                    }
                    detail::dense_group<T>(rows, s.group, {xs, ws, wts, biases, relus, addends, ys}, s.inputs, w, s.version);
                    step += s.group - 1;
                } else {
                    detail::dense_rows<T>(rows, s.inputs, w, x, store + s.a, store + s.t, finish_of(s), y);
                }
                continue;  // flushed already
            }
            case detail::step_kind::activate: activate_values(s, x, y, rows); break;
            case detail::step_kind::layer_norm: {
                // As layers/normalization.hpp records it: centred = x - mean_row,
                // variance = mean_row(centred^2), y = centred * (variance + eps)^-0.5 * gain + bias.
                // Each operation is its own pass through memory, as on the tape, so a
                // compiler cannot fuse a multiply and an add into one rounding (FMA).
                const T eps = static_cast<T>(s.epsilon), count = static_cast<T>(w);
                const T* gain = store + s.a;
                const T* bias = store + s.b;
                T* squares = buffers_[s.scratch].data();
                for (std::size_t i = 0; i < rows; ++i) {
                    const T* xi = x + i * w;
                    T* yi = y + i * w;
                    T* qi = squares + i * w;
                    T mean = T(0);
                    for (std::size_t j = 0; j < w; ++j) mean += xi[j];
                    mean /= count;
                    for (std::size_t j = 0; j < w; ++j) yi[j] = xi[j] - mean;
                    for (std::size_t j = 0; j < w; ++j) qi[j] = yi[j] * yi[j];
                    T variance = T(0);
                    for (std::size_t j = 0; j < w; ++j) variance += qi[j];
                    variance /= count;
                    const T inv = std::pow(variance + eps, T(-0.5));
                    for (std::size_t j = 0; j < w; ++j) yi[j] = yi[j] * inv;
                    for (std::size_t j = 0; j < w; ++j) yi[j] = yi[j] * gain[j];
                    for (std::size_t j = 0; j < w; ++j) yi[j] = yi[j] + bias[j];
                }
                break;
            }
            case detail::step_kind::batch_norm: {
                const T* mean = store + s.a;
                const T* inv = store + s.b;
                const T* gain = store + s.c;
                const T* bias = store + s.d;
                for (std::size_t k = 0; k < size; ++k) y[k] = x[k] - mean[k % w];
                for (std::size_t k = 0; k < size; ++k) y[k] = y[k] * inv[k % w];
                for (std::size_t k = 0; k < size; ++k) y[k] = y[k] * gain[k % w];
                for (std::size_t k = 0; k < size; ++k) y[k] = y[k] + bias[k % w];
                break;
            }
            case detail::step_kind::add: {
                const T* fx = buffers_[s.in2].data();
                for (std::size_t k = 0; k < size; ++k) y[k] = x[k] + fx[k];
                break;
            }
            }
            for (std::size_t k = 0; k < size; ++k) y[k] = detail::flush_subnormal(y[k]);
        }
        const std::size_t w = m.output_count, size = rows * w;
        const std::size_t members = 1 + m.member_buffers.size();
        T* o = outputs_.data();
        // Each member's probabilities (classification) or prepared values;
        // the mean sums them in member order and divides by the count, as
        // fit_model's predict_prepared does. One calibrated network's
        // probabilities are tempered here (as tempered_softmax_rows in
        // train/calibration.hpp); an ensemble's mean is tempered below.
        const bool temper_member = m.classification && m.classes && members == 1;
        const auto member_outputs = [&](std::size_t k, T* q) noexcept {
            const T* z = buffers_[k == 0 ? m.output_buffer : m.member_buffers[k - 1]].data();
            if (temper_member) {
                const T t = static_cast<T>(m.classes->temperature);
                for (std::size_t i = 0; i < rows; ++i) {
                    const T* zi = z + i * w;
                    T* qi = q + i * w;
                    const T mx = *std::max_element(zi, zi + w);
                    T sum = T(0);
                    for (std::size_t j = 0; j < w; ++j) sum += (qi[j] = std::exp((zi[j] - mx) / t));
                    for (std::size_t j = 0; j < w; ++j) qi[j] /= sum;
                }
            } else if (m.classification) {
                // As softmax_rows in train/trainer.hpp: shifted by the row maximum.
                for (std::size_t i = 0; i < rows; ++i) {
                    const T* zi = z + i * w;
                    T* qi = q + i * w;
                    const T mx = *std::max_element(zi, zi + w);
                    T sum = T(0);
                    for (std::size_t j = 0; j < w; ++j) sum += (qi[j] = std::exp(zi[j] - mx));
                    for (std::size_t j = 0; j < w; ++j) qi[j] /= sum;
                }
            } else {
                std::copy(z, z + size, q);
            }
        };
        const auto to_target_units = [&](T* v) noexcept {
            if (m.regression)
                for (std::size_t k = 0; k < size; ++k) v[k] = static_cast<T>(m.target_scale.inverse(static_cast<double>(v[k])));
        };
        T* spread = spread_.data();
        const T* member_values = o;
        if (members == 1) {
            member_outputs(0, o);
            to_target_units(o);
            std::fill(spread, spread + size, T(0));
        } else {
            T* mv = member_values_.data();
            for (std::size_t k = 0; k < members; ++k) member_outputs(k, mv + k * size);
            std::copy(mv, mv + size, o);
            for (std::size_t k = 1; k < members; ++k)
                for (std::size_t e = 0; e < size; ++e) o[e] += mv[k * size + e];
            for (std::size_t e = 0; e < size; ++e) o[e] /= static_cast<T>(members);
            to_target_units(o);
            for (std::size_t k = 0; k < members; ++k) to_target_units(mv + k * size);
            // Sample standard deviation (n - 1) about the mean, in the outputs' units.
            for (std::size_t e = 0; e < size; ++e) {
                T squares = T(0);
                for (std::size_t k = 0; k < members; ++k) squares += (mv[k * size + e] - o[e]) * (mv[k * size + e] - o[e]);
                spread[e] = std::sqrt(squares / static_cast<T>(members - 1));
            }
            member_values = mv;
            if (m.classification && m.classes) temper_mean(rows, o);
        }
        out.members = members;
        out.spread = spread;
        out.member_values = member_values;
        out.values = o;
        out.rows = rows;
        out.width = w;
        out.flags = flags_.data();
        out.columns = input_count();
        attach_uncertainty(rows, members > 1 ? spread : nullptr, out);
    }

    // An ensemble's calibrated probabilities: softmax(log(mean) / temperature)
    // per row, in place (as ensemble_logits and tempered_softmax_rows in
    // train/calibration.hpp); for one member this is plain temperature scaling.
    void temper_mean(std::size_t rows, T* o) const noexcept {
        const model_type& m = *model_;
        const std::size_t w = m.output_count;
        const T t = static_cast<T>(m.classes->temperature), tiny = std::numeric_limits<T>::min();
        for (std::size_t i = 0; i < rows; ++i) {
            T* qi = o + i * w;
            for (std::size_t j = 0; j < w; ++j) qi[j] = std::log(std::max(qi[j], tiny));
            const T mx = *std::max_element(qi, qi + w);
            T sum = T(0);
            for (std::size_t j = 0; j < w; ++j) sum += (qi[j] = std::exp((qi[j] - mx) / t));
            for (std::size_t j = 0; j < w; ++j) qi[j] /= sum;
        }
    }

    // The band or class sets of the outputs just computed. `spread` is the
    // per-row spread in the target's units (rows values) for the normalized
    // band, e.g. the standard deviation of an ensemble's members; null:
    // the calibration's fixed half width (the single-network fallback).
    void attach_uncertainty(std::size_t rows, const T* spread, prediction_view<T>& out) noexcept {
        const model_type& m = *model_;
        out.low = out.high = nullptr;
        out.class_sets = nullptr;
        out.set_words = 0;
        if (m.interval && m.output_count == 1) {
            interval_bounds(*m.interval, outputs_.data(), spread, rows, low_.data(), high_.data());
            out.low = low_.data();
            out.high = high_.data();
        } else if (m.classes) {
            class_set_bits(*m.classes, outputs_.data(), rows, m.output_count, sets_.data());
            out.class_sets = sets_.data();
            out.set_words = class_set_words(m.output_count);
        }
    }

    // The formulas of autodiff/tape.hpp's forward pass, value for value.
    static void activate_values(const detail::program_step& s, const T* x, T* y, std::size_t rows) noexcept {
        const std::size_t w = s.outputs, size = rows * w;
        const T a = static_cast<T>(s.coefficient);
        switch (s.function) {
        case activation::identity: std::copy(x, x + size, y); return;
        case activation::tanh:
            for (std::size_t k = 0; k < size; ++k) y[k] = std::tanh(x[k]);
            return;
        case activation::sigmoid:
            for (std::size_t k = 0; k < size; ++k) y[k] = detail::stable_sigmoid(x[k]);
            return;
        case activation::relu:
            for (std::size_t k = 0; k < size; ++k) y[k] = x[k] > T(0) ? x[k] : T(0);
            return;
        case activation::leaky_relu:
            for (std::size_t k = 0; k < size; ++k) y[k] = x[k] > T(0) ? x[k] : a * x[k];
            return;
        case activation::elu:
            for (std::size_t k = 0; k < size; ++k) y[k] = x[k] > T(0) ? x[k] : a * std::expm1(x[k]);
            return;
        case activation::softplus:
            for (std::size_t k = 0; k < size; ++k) y[k] = detail::stable_softplus(x[k]);
            return;
        case activation::gelu:
            for (std::size_t k = 0; k < size; ++k) y[k] = T(0.5) * x[k] * (T(1) + std::erf(x[k] * T(detail::inv_sqrt2)));
            return;
        case activation::gelu_tanh:
            for (std::size_t k = 0; k < size; ++k) {
                const T u = T(detail::gelu_sqrt_2_over_pi) * (x[k] + T(detail::gelu_cubic) * x[k] * x[k] * x[k]);
                y[k] = T(0.5) * x[k] * (T(1) + std::tanh(u));
            }
            return;
        case activation::softmax:
        case activation::log_softmax:
            for (std::size_t i = 0; i < rows; ++i) {
                const T* row = x + i * w;
                T* yi = y + i * w;
                T mx = row[0];
                for (std::size_t j = 1; j < w; ++j) mx = row[j] > mx ? row[j] : mx;
                T sum = T(0);
                for (std::size_t j = 0; j < w; ++j) sum += std::exp(row[j] - mx);
                const T log_sum = std::log(sum);
                for (std::size_t j = 0; j < w; ++j) {
                    const T l = (row[j] - mx) - log_sum;
                    yi[j] = s.function == activation::softmax ? std::exp(l) : l;
                }
            }
            return;
        }
    }

    std::shared_ptr<const model_type> model_;
    std::size_t capacity_ = 0;
    std::vector<std::vector<T>> buffers_;
    std::vector<T> outputs_;
    std::vector<T> member_values_;  // members x rows x width (an ensemble only)
    std::vector<T> spread_;  // rows x width
    std::vector<range_flag> flags_;
    std::vector<T> low_, high_;  // the band (regression with an interval)
    std::vector<std::uint64_t> sets_;  // class-set bits (classification with sets)
    std::vector<std::array<char, 32>> text_;  // numbers given for categorical columns, as text
    std::uint64_t generation_ = 0;  // of the holder it was refreshed from
};

template <class T>
predictor<T>::predictor(const model_file<T>& file, std::size_t capacity) : capacity_(capacity) {
    model_ = build_program(file, file.plan ? &*file.plan : nullptr, file.references, file.calibration ? &*file.calibration : nullptr);
    allocate();
}

template <class T>
predictor<T>& predictor<T>::operator=(const predictor& other) {
    if (this != &other) {
        predictor copy(other);
        *this = std::move(copy);
    }
    return *this;
}

template <class T>
void predictor<T>::warm_up() noexcept {
    std::fill(buffers_[0].begin(), buffers_[0].end(), T(0));
    prediction_view<T> ignored;
    run(capacity_, ignored);
}

template <class T>
predict_status predictor<T>::try_predict_prepared(const T* features, std::size_t rows, prediction_view<T>& out) noexcept {
    if (rows > capacity_) return {input_status::shape, static_cast<std::uint32_t>(rows), 0};
    const std::size_t f = model_->feature_count;
    T* x = buffers_[0].data();
    // Copied and checked in one pass without an early exit, so the compiler
    // can use vectors; the first value that is not finite is looked up only
    // when there is one.
    const std::size_t n = rows * f;
    unsigned bad = 0;
    for (std::size_t i = 0; i < n; ++i) {
        const T v = features[i];
        bad |= static_cast<unsigned>(!(std::abs(v) <= std::numeric_limits<T>::max()));  // inf or NaN
        x[i] = detail::flush_subnormal(v);
    }
    if (bad != 0)
        for (std::size_t i = 0; i < n; ++i)
            if (!std::isfinite(features[i])) return {input_status::non_finite, static_cast<std::uint32_t>(i / f), static_cast<std::uint32_t>(i % f)};
    run(rows, out);
    out.flags = nullptr;
    out.columns = 0;
    return {};
}

template <class T>
predict_status predictor<T>::try_predict_cells(const std::string_view* cells, std::size_t rows, prediction_view<T>& out) noexcept {
    if (rows > capacity_ || !model_->plan) return {input_status::shape, static_cast<std::uint32_t>(rows), 0};
    const std::size_t n = input_count();
    for (std::size_t i = 0; i < rows; ++i)
        for (std::size_t k = 0; k < n; ++k) {
            const predict_status s = prepare_cell(i, k, raw_value::of_text(cells[i * n + k]));
            if (!s.ok()) return s;
        }
    run(rows, out);
    return {};
}

template <class T>
predict_status predictor<T>::try_predict_named(const named_value* cells, std::size_t count, prediction_view<T>& out) noexcept {
    if (!model_->plan) return {input_status::shape, 0, 0};
    const std::size_t n = input_count();
    for (std::size_t k = 0; k < n; ++k) {
        const std::string& name = model_->columns[k].name;
        std::size_t found = count;
        for (std::size_t j = 0; j < count; ++j)
            if (cells[j].name == name) {
                found = j;
                break;
            }
        if (found == count) return {input_status::missing_column, 0, static_cast<std::uint32_t>(k)};
        const predict_status s = prepare_cell(0, k, raw_value::of_text(cells[found].text));
        if (!s.ok()) return s;
    }
    run(1, out);
    return {};
}

template <class T>
prediction_view<T> predictor<T>::predict_prepared(const T* features, std::size_t rows) {
    prediction_view<T> out;
    check(try_predict_prepared(features, rows, out), rows, true);
    return out;
}

template <class T>
prediction_view<T> predictor<T>::predict_cells(const std::string_view* cells, std::size_t rows) {
    prediction_view<T> out;
    check(try_predict_cells(cells, rows, out), rows, false);
    return out;
}

template <class T>
prediction_view<T> predictor<T>::predict_named(const named_value* cells, std::size_t count) {
    prediction_view<T> out;
    check(try_predict_named(cells, count, out), 1, false);
    return out;
}

template <class T>
std::string predictor<T>::describe(const predict_status& s, std::size_t rows, bool prepared) const {
    const std::string at = "predictor, row " + std::to_string(s.row);
    const std::string col = prepared ? "feature " + std::to_string(s.column)
                                     : (s.column < input_count() ? "column '" + model_->columns[s.column].name + "'" : "a column");
    switch (s.code) {
    case input_status::ok: return "ok";
    case input_status::missing_column: return at + ": the row has no cell for " + col;
    case input_status::missing_value: return at + ", " + col + ": the cell is missing and the plan has no fill for it";
    case input_status::not_numeric: return at + ", " + col + ": the cell is not a finite number or date/time";
    case input_status::unseen_category: return at + ", " + col + ": the category was not seen in the training rows (policy: fail)";
    case input_status::non_finite: return at + ", " + col + ": the value is NaN or infinite";
    case input_status::shape:
        return !model_->plan && !prepared ? std::string("predictor: the model has no preparation plan; use predict_prepared")
                                          : "predictor: " + std::to_string(rows) + " rows exceed the capacity of " + std::to_string(capacity_);
    }
    return "unknown";
}

/// Publishes predictors to many threads, read-copy-update style. The host
/// calls store() with a new predictor at any time; each thread keeps its own
/// predictor copy (from get()) and calls refresh(copy) before predicting.
/// refresh() costs one atomic load while nothing changed; after a store it
/// takes the new model (allocating the copy's buffers once, and taking the
/// standard library's internal lock of std::atomic_load for shared_ptr,
/// C++17 [util.smartptr.shared.atomic]). A thread still predicting with the
/// old model keeps it alive through its shared_ptr until it refreshes, so a
/// swap never disturbs a running call.
template <class T>
class predictor_holder {
public:
    predictor_holder() = default;
    explicit predictor_holder(const predictor<T>& initial) { store(initial); }

    void store(const predictor<T>& next) {
        std::atomic_store(&current_, next.model_);
        generation_.fetch_add(1, std::memory_order_acq_rel);
    }
    bool has_value() const noexcept { return generation_.load(std::memory_order_acquire) != 0; }
    /// How many times store() was called.
    std::uint64_t generation() const noexcept { return generation_.load(std::memory_order_acquire); }

    /// A predictor (with its own buffers of `capacity` rows) on the current model.
    predictor<T> get(std::size_t capacity = 64) const {
        const std::uint64_t g = generation_.load(std::memory_order_acquire);
        std::shared_ptr<const detail::compiled_model<T>> m = std::atomic_load(&current_);
        if (!m) raise(codes::deploy_holder_empty, "predictor_holder: no predictor has been stored yet");
        predictor<T> p(std::move(m), capacity);
        p.generation_ = g;
        return p;
    }

    /// Moves `local` to the current model if a newer one was stored; true
    /// when it changed.
    bool refresh(predictor<T>& local) const {
        const std::uint64_t g = generation_.load(std::memory_order_acquire);
        if (g == local.generation_) return false;
        std::shared_ptr<const detail::compiled_model<T>> m = std::atomic_load(&current_);
        if (!m) raise(codes::deploy_holder_empty, "predictor_holder: no predictor has been stored yet");
        if (m != local.model_) {
            // If the new buffers cannot be allocated, `local` keeps the old
            // model with its buffers and the exception propagates.
            std::shared_ptr<const detail::compiled_model<T>> previous = std::move(local.model_);
            local.model_ = std::move(m);
#if TENON_HAS_EXCEPTIONS
            try {
                local.allocate();
            } catch (...) {
                local.model_ = std::move(previous);
                throw;
            }
#else
            local.allocate();
#endif
        }
        local.generation_ = g;
        return true;
    }

private:
    std::shared_ptr<const detail::compiled_model<T>> current_;
    std::atomic<std::uint64_t> generation_{0};
};

TENON_NAMESPACE_END

// The compiled-once mode (core/compiled_once.hpp).
#if defined(TENON_DETAIL_SERVE_INSTANCE)
TENON_NAMESPACE_BEGIN
#define TENON_DETAIL_PREDICTOR_INSTANCES(T) TENON_DETAIL_SERVE_INSTANCE class predictor<T>;
TENON_DETAIL_PREDICTOR_INSTANCES(float)
TENON_DETAIL_PREDICTOR_INSTANCES(double)
#undef TENON_DETAIL_PREDICTOR_INSTANCES
TENON_NAMESPACE_END
#endif
