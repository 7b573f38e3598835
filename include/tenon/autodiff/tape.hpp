// tenon: the reverse-mode autodiff tape.
//
// Recording is eager: each operation computes its value when recorded and
// appends a node (kind, input ids, constants, value buffer). backward(loss)
// walks the nodes in reverse and adds each node's contribution to its inputs'
// gradients, so a value used twice receives both (reverse accumulation;
// Griewank & Walther, "Evaluating Derivatives", 2nd ed. 2008, ch. 3); any
// graph works. clear() keeps every node's buffers, so a step that records the
// same operations and shapes again allocates nothing. Parameter nodes refer
// to the parameter, and backward adds into parameter::grad().
#pragma once

#include <array>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <limits>
#include <string>
#include <vector>

#include "tenon/autodiff/custom_operation.hpp"
#include "tenon/autodiff/parameter.hpp"
#include "tenon/core/activation_functions.hpp"
#include "tenon/core/elementwise.hpp"
#include "tenon/core/gemm.hpp"
#include "tenon/core/matrix.hpp"

TENON_NAMESPACE_BEGIN

/// Kinds of recorded operations.
enum class op_kind : std::uint8_t {
    input,  // constant leaf, copied onto the tape
    variable,  // leaf copied onto the tape that receives a gradient
    parameter,  // leaf referring to a parameter
    add,
    subtract,
    multiply,
    divide,
    matmul,
    scale,
    shift,
    sum_all,
    mean_all,
    sum_axis,
    mean_axis,
    exp,
    log,
    square,
    sqrt,
    abs,
    pow,
    tanh,
    sigmoid,
    relu,
    leaky_relu,
    elu,
    softplus,
    gelu_erf,
    gelu_tanh,
    logsumexp_rows,
    log_softmax_rows,
    clamp,
    stop_gradient,
    custom,
    affine_activation,  // f(x W + b) in one node (fused; see tape::affine_activation)
    softmax_cross_entropy,  // -sum(Q * log_softmax_rows(z)) in one node (fused)
};

inline const char* op_name(op_kind k) noexcept {
    switch (k) {
    case op_kind::input: return "input";
    case op_kind::variable: return "variable";
    case op_kind::parameter: return "parameter";
    case op_kind::add: return "add";
    case op_kind::subtract: return "subtract";
    case op_kind::multiply: return "multiply";
    case op_kind::divide: return "divide";
    case op_kind::matmul: return "matmul";
    case op_kind::scale: return "scale";
    case op_kind::shift: return "shift";
    case op_kind::sum_all: return "sum";
    case op_kind::mean_all: return "mean";
    case op_kind::sum_axis: return "sum_axis";
    case op_kind::mean_axis: return "mean_axis";
    case op_kind::exp: return "exp";
    case op_kind::log: return "log";
    case op_kind::square: return "square";
    case op_kind::sqrt: return "sqrt";
    case op_kind::abs: return "abs";
    case op_kind::pow: return "pow";
    case op_kind::tanh: return "tanh";
    case op_kind::sigmoid: return "sigmoid";
    case op_kind::relu: return "relu";
    case op_kind::leaky_relu: return "leaky_relu";
    case op_kind::elu: return "elu";
    case op_kind::softplus: return "softplus";
    case op_kind::gelu_erf: return "gelu";
    case op_kind::gelu_tanh: return "gelu_tanh";
    case op_kind::logsumexp_rows: return "logsumexp_rows";
    case op_kind::log_softmax_rows: return "log_softmax_rows";
    case op_kind::clamp: return "clamp";
    case op_kind::stop_gradient: return "stop_gradient";
    case op_kind::custom: return "custom";
    case op_kind::affine_activation: return "affine_activation";
    case op_kind::softmax_cross_entropy: return "softmax_cross_entropy";
    }
    return "unknown";
}

template <class T>
class tape;

/// A value recorded on a tape: a cheap handle (tape, node id, generation).
template <class T>
class var {
public:
    var() = default;

    tape<T>* owner() const noexcept { return tape_; }
    std::uint32_t id() const noexcept { return id_; }
    std::uint64_t generation() const noexcept { return generation_; }
    bool valid() const noexcept { return tape_ != nullptr; }

    const matrix<T>& value() const;
    shape2 shape() const { return shape_of(value()); }

private:
    friend class tape<T>;
    var(tape<T>* t, std::uint32_t id, std::uint64_t generation) noexcept : tape_(t), id_(id), generation_(generation) {}

    tape<T>* tape_ = nullptr;
    std::uint32_t id_ = 0;
    std::uint64_t generation_ = 0;
};

namespace detail {

inline constexpr std::size_t max_operands = 4;

template <class T>
struct tape_node {
    op_kind kind = op_kind::input;
    std::uint8_t input_count = 0;
    bool needs_grad = false;
    bool grad_ready = false;
    bool reached = false;  // during backward(): lies on a path to the loss
    std::array<std::uint32_t, max_operands> inputs{};
    T a = T(0);  // operation constant (scale factor, slope, exponent, lower bound)
    T b = T(0);  // second constant (upper bound)
    int axis = 0;
    bool transpose_a = false;
    bool transpose_b = false;
    op_kind unit = op_kind::input;  // affine_activation: the activation applied
    matrix<T> value;
    matrix<T> grad;
    matrix<T> scratch;  // affine_activation: d(loss)/d(x W + b) during backward; a half of x W during forward (core/gemm.hpp: splits_inner)
    parameter<T>* param = nullptr;
    const custom_operation<T>* custom = nullptr;
};

}  // namespace detail

template <class T>
class tape {
    TENON_REQUIRE_SCALAR(T);

public:
    tape() = default;
    tape(const tape&) = delete;
    tape& operator=(const tape&) = delete;

    /// Forgets the recording, keeping every buffer for the next step. Values
    /// recorded before clear() become invalid (using one is an error).
    void clear() noexcept {
        count_ = 0;
        ++generation_;
    }

    /// Number of nodes recorded since the last clear().
    std::size_t size() const noexcept { return count_; }

    /// When on, every recorded value and every gradient is checked for NaN and
    /// infinity, and the first offender raises autodiff.non_finite naming the
    /// operation. Off by default: it costs a pass over every buffer.
    void set_check_finite(bool on) noexcept { check_finite_ = on; }
    bool check_finite() const noexcept { return check_finite_; }

    /// Matrix products recorded on this tape (forward and backward) split
    /// across `workers` (core/parallel.hpp); nullptr (the default) keeps them
    /// on the calling thread. Results do not depend on the thread count.
    /// The executor must outlive its use by the tape.
    void set_executor(executor* workers) noexcept { workers_ = workers; }
    executor* workers() const noexcept { return workers_; }

    // ----- leaves ------------------------------------------------------------

    /// Records a constant (no gradient), copying it onto the tape.
    var<T> input(const matrix<T>& m) { return leaf(op_kind::input, m.data(), shape_of(m)); }
    /// Records a constant from a row-major buffer of rows x cols values.
    var<T> input(const T* data, std::size_t rows, std::size_t cols) { return leaf(op_kind::input, data, {rows, cols}); }
    /// Records a constant of shape `s` whose row-major values `write(T* data)`
    /// stores into the tape's own buffer, e.g. a mini-batch gathered from
    /// shuffled rows straight into place instead of gathered and then copied.
    /// `write` must store all s.rows * s.cols values.
    template <class Writer>
    var<T> input_from(shape2 s, Writer&& write) {
        auto& n = push(op_kind::input, nullptr, 0, s);
        write(n.value.data());
        n.needs_grad = false;
        return finish(n);
    }
    /// Records a leaf that receives a gradient (read it with grad()).
    var<T> variable(const matrix<T>& m) { return leaf(op_kind::variable, m.data(), shape_of(m)); }
    /// A 1x1 constant.
    var<T> scalar(T v) { return leaf(op_kind::input, &v, {1, 1}); }

    /// A tape for inference only records parameters without gradients:
    /// track() then reads a parameter and never touches its gradient buffer,
    /// so recording a network in inference mode changes nothing in it (the
    /// promise network::infer() builds on). backward() is refused.
    void set_inference_only(bool on) noexcept { inference_only_ = on; }
    bool inference_only() const noexcept { return inference_only_; }

    /// Records a reference to a parameter; backward adds into its grad().
    var<T> track(parameter<T>& p) {
        const shape2 s = p.shape();
        if (inference_only_) {
            auto& n = push(op_kind::parameter, {}, 0, s, /*allocate_value=*/false);
            n.param = &p;
            n.needs_grad = false;
            return finish(n);
        }
        if (shape_of(p.grad()) != s) {
            ensure_shape(p.grad(), s);
            p.clear_gradient();
        }
        auto& n = push(op_kind::parameter, {}, 0, s, /*allocate_value=*/false);
        n.param = &p;
        n.needs_grad = p.trainable();
        return finish(n);
    }

    // ----- operations (see operations.hpp for the free-function spelling) ---

    var<T> binary(op_kind kind, var<T> x, var<T> y) {
        if (kind != op_kind::add && kind != op_kind::subtract && kind != op_kind::multiply && kind != op_kind::divide) {
            raise_wrong_kind("binary", kind);
        }
        const shape2 sx = shape_of(value_of(x)), sy = shape_of(value_of(y));
        const shape2 out = broadcast_shape(sx, sy, kind);
        const std::uint32_t ids[2] = {x.id(), y.id()};
        auto& n = push(kind, ids, 2, out);
        return finish(n);
    }

    var<T> matmul(var<T> x, var<T> y, bool transpose_x, bool transpose_y) {
        const shape2 sx = shape_of(value_of(x)), sy = shape_of(value_of(y));
        const shape2 ox = transpose_x ? shape2{sx.cols, sx.rows} : sx;
        const shape2 oy = transpose_y ? shape2{sy.cols, sy.rows} : sy;
        if (ox.cols != oy.rows) {
            raise(codes::core_shape_mismatch,
                  std::string("matmul: inner dimensions differ: left operand ") + to_string(sx) + (transpose_x ? " (transposed)" : "") +
                      ", right operand " + to_string(sy) + (transpose_y ? " (transposed)" : ""));
        }
        const std::uint32_t ids[2] = {x.id(), y.id()};
        auto& n = push(op_kind::matmul, ids, 2, {ox.rows, oy.cols});
        n.transpose_a = transpose_x;
        n.transpose_b = transpose_y;
        return finish(n);
    }

    var<T> unary(op_kind kind, var<T> x, T a = T(0), T b = T(0)) {
        if (!is_unary(kind)) raise_wrong_kind("unary", kind);
        const shape2 sx = shape_of(value_of(x));
        shape2 out = sx;
        if (kind == op_kind::sum_all || kind == op_kind::mean_all) out = {1, 1};
        if (kind == op_kind::logsumexp_rows) out = {sx.rows, 1};
        if ((kind == op_kind::logsumexp_rows || kind == op_kind::log_softmax_rows) && sx.cols == 0) {
            raise(codes::core_shape_mismatch, std::string(op_name(kind)) + ": needs at least one column, got " + to_string(sx));
        }
        if (kind == op_kind::clamp && !(a <= b)) {
            raise(codes::core_argument_invalid, "clamp: lower bound " + std::to_string(a) + " exceeds upper bound " + std::to_string(b));
        }
        const std::uint32_t ids[1] = {x.id()};
        auto& n = push(kind, ids, 1, out);
        n.a = a;
        n.b = b;
        if (kind == op_kind::stop_gradient) n.needs_grad = false;
        return finish(n);
    }

    /// Sum or mean over one axis: axis 0 sums over rows (result 1 x cols),
    /// axis 1 over columns (result rows x 1).
    var<T> reduce_axis(op_kind kind, var<T> x, int axis) {
        if (kind != op_kind::sum_axis && kind != op_kind::mean_axis) raise_wrong_kind("reduce_axis", kind);
        const shape2 sx = shape_of(value_of(x));
        if (axis != 0 && axis != 1) {
            raise(codes::core_argument_invalid,
                  std::string(op_name(kind)) + ": axis must be 0 (over rows) or 1 (over columns), got " + std::to_string(axis));
        }
        const std::uint32_t ids[1] = {x.id()};
        auto& n = push(kind, ids, 1, axis == 0 ? shape2{1, sx.cols} : shape2{sx.rows, 1});
        n.axis = axis;
        return finish(n);
    }

    /// Whether affine_activation() accepts `unit` with constant `coefficient`:
    /// the activations whose derivative follows from their output alone
    /// (relu; leaky_relu with slope >= 0; elu with alpha >= 0; tanh; sigmoid),
    /// so the fused node keeps no pre-activation buffer.
    static bool fusable_activation(op_kind unit, T coefficient) noexcept {
        switch (unit) {
        case op_kind::relu:
        case op_kind::tanh:
        case op_kind::sigmoid: return true;
        case op_kind::leaky_relu:
        case op_kind::elu: return coefficient >= T(0);
        default: return false;
        }
    }

    /// f(x W + b) recorded as one node: the product, then one pass adding the
    /// bias row and applying f; backward forms d = g * f'(y) once, takes the
    /// bias gradient as d's column sums and the product's gradients from d.
    /// The same values, in the same order, as matmul, add and the activation
    /// recorded separately (so the results are the same bits). `bias` is a
    /// 1 x outputs row or an empty var (no bias); `unit` and `coefficient`
    /// must pass fusable_activation() (the coefficient is the slope of
    /// leaky_relu or the alpha of elu).
    var<T> affine_activation(var<T> x, var<T> weights, var<T> bias, op_kind unit, T coefficient = T(0)) {
        if (!fusable_activation(unit, coefficient)) {
            raise(codes::core_argument_invalid,
                  std::string("affine_activation: activation '") + op_name(unit) + "' with coefficient " + std::to_string(coefficient) +
                      " is not fused (relu, tanh, sigmoid, leaky_relu or elu with a coefficient >= 0 are)");
        }
        const shape2 sx = shape_of(value_of(x)), sw = shape_of(value_of(weights));
        if (sx.cols != sw.rows) {
            raise(codes::core_shape_mismatch, "affine_activation: inner dimensions differ: input " + to_string(sx) + ", weights " + to_string(sw));
        }
        std::uint32_t ids[3] = {x.id(), weights.id(), 0};
        std::size_t count = 2;
        if (bias.valid()) {
            const shape2 sb = shape_of(value_of(bias));
            if (sb != shape2{1, sw.cols}) {
                raise(codes::core_shape_mismatch, "affine_activation: bias " + to_string(sb) + " is not a 1 x " + std::to_string(sw.cols) + " row");
            }
            ids[2] = bias.id();
            count = 3;
        }
        auto& n = push(op_kind::affine_activation, ids, count, {sx.rows, sw.cols});
        n.unit = unit;
        n.a = coefficient;
        return finish(n);
    }

    /// -sum_ij Q_ij log softmax(z_i)_j (1x1) recorded as one node: per row
    /// one pass for the maximum, one for the sum of exponentials and one for
    /// the loss; backward dz_ij = g ((sum_k Q_ik) softmax_ij - Q_ij), which
    /// for a one-hot row weighted by w is w (softmax - onehot) (Bishop 2006,
    /// "Pattern Recognition and Machine Learning", eq. 4.109 for the
    /// unweighted case). The same values, in the same order, as
    /// -sum(log_softmax_rows(z) * Q) recorded as separate nodes.
    var<T> softmax_cross_entropy(var<T> logits, var<T> weights) {
        const shape2 sz = shape_of(value_of(logits)), sq = shape_of(value_of(weights));
        if (sz != sq) {
            raise(codes::core_shape_mismatch,
                  "softmax_cross_entropy: logits " + to_string(sz) + " and weights " + to_string(sq) + " differ in shape");
        }
        if (sz.cols == 0) raise(codes::core_shape_mismatch, "softmax_cross_entropy: needs at least one column, got " + to_string(sz));
        const std::uint32_t ids[2] = {logits.id(), weights.id()};
        auto& n = push(op_kind::softmax_cross_entropy, ids, 2, {1, 1});
        return finish(n);
    }

    /// Records a host-defined operation with up to four inputs.
    var<T> apply(const custom_operation<T>& op, std::initializer_list<var<T>> operands) {
        if (operands.size() > detail::max_operands) {
            raise(codes::autodiff_custom_too_many_inputs,
                  std::string("custom operation '") + op.name() + "': " + std::to_string(operands.size()) + " inputs given, at most " +
                      std::to_string(detail::max_operands) + " supported");
        }
        std::uint32_t ids[detail::max_operands] = {};
        const matrix<T>* values[detail::max_operands] = {};
        std::size_t i = 0;
        for (const var<T>& v : operands) {
            values[i] = &value_of(v);
            ids[i++] = v.id();
        }
        const shape2 out = op.output_shape(operand_list<T>{values, i});
        auto& n = push(op_kind::custom, ids, i, out, true, &op);
        return finish(n);
    }

    // ----- reading back -----------------------------------------------------

    const matrix<T>& value(var<T> v) const { return value_of(v); }

    /// Gradient of the last backward() with respect to v (zero if v did not
    /// influence the loss). For a parameter node this is the parameter's grad.
    const matrix<T>& grad(var<T> v) {
        const auto& n = node_of(v);
        if (n.kind == op_kind::parameter) return n.param->grad();
        auto& node = nodes_[v.id()];
        if (!node.grad_ready) {
            ensure_shape(node.grad, shape_of(node.value));
            std::fill(node.grad.data(), node.grad.data() + node.grad.size(), T(0));
            node.grad_ready = true;
        }
        return node.grad;
    }

    /// Reverse pass from a 1x1 value: adds d(loss)/d(parameter) into every
    /// tracked trainable parameter's grad() and fills the nodes' gradients.
    void backward(var<T> loss) {
        if (inference_only_)
            raise(codes::autodiff_backward_inference_only,
                  "backward from operation #" + std::to_string(loss.id()) +
                      ": the tape records for inference only (set_inference_only), so no parameter has a gradient");
        const auto& l = node_of(loss);
        if (shape_of(value_of(loss)) != shape2{1, 1}) {
            raise(codes::autodiff_backward_not_scalar,
                  std::string("backward from operation #") + std::to_string(loss.id()) + " (" + node_name(loss.id()) + ") of shape " +
                      to_string(shape_of(value_of(loss))) + ": reduce it to 1x1 first, e.g. with sum() or mean()");
        }
        const std::size_t last = loss.id();
        // Nodes recorded after the loss do not influence it: forget gradients
        // an earlier backward() left there, so grad() reads zero for them.
        for (std::size_t i = last + 1; i < count_; ++i) nodes_[i].grad_ready = false;
        for (std::size_t i = 0; i <= last; ++i) {
            auto& n = nodes_[i];
            n.grad_ready = false;
            n.reached = false;
            if (n.needs_grad && n.kind != op_kind::parameter) {
                ensure_shape(n.grad, shape_of(n.value));
                std::fill(n.grad.data(), n.grad.data() + n.grad.size(), T(0));
                n.grad_ready = true;
            }
        }
        if (!l.needs_grad) return;
        grad_target(loss.id())->data()[0] += T(1);
        nodes_[last].reached = true;
        for (std::size_t i = last + 1; i-- > 0;) {
            auto& n = nodes_[i];
            if (!n.needs_grad || n.kind == op_kind::input || n.kind == op_kind::variable || n.kind == op_kind::parameter) continue;
            // A node off every path to the loss has a zero gradient; running
            // its backward anyway would cost time and turn 0 * f'(x) into NaN
            // where f'(x) is infinite (log or sqrt of 0 in a side branch).
            if (!n.reached) continue;
            for (std::size_t k = 0; k < n.input_count; ++k) nodes_[n.inputs[k]].reached = true;
            backward_node(n);
            if (check_finite_) check_input_grads(i);
        }
    }

private:
    friend class var<T>;

    const detail::tape_node<T>& node_of(var<T> v) const {
        if (v.owner() != this || v.generation() != generation_ || v.id() >= count_) {
            raise(codes::autodiff_value_foreign,
                  v.owner() != this ? "value #" + std::to_string(v.id()) + " was recorded on another tape"
                                    : "value #" + std::to_string(v.id()) + " was recorded before the tape was cleared");
        }
        return nodes_[v.id()];
    }

    const matrix<T>& value_of(var<T> v) const {
        const auto& n = node_of(v);
        return n.kind == op_kind::parameter ? n.param->value() : n.value;
    }
    const matrix<T>& value_at(std::uint32_t id) const {
        const auto& n = nodes_[id];
        return n.kind == op_kind::parameter ? n.param->value() : n.value;
    }
    // Where gradients for node `id` accumulate, or null if it needs none.
    matrix<T>* grad_target(std::uint32_t id) {
        auto& n = nodes_[id];
        if (!n.needs_grad) return nullptr;
        return n.kind == op_kind::parameter ? &n.param->grad() : &n.grad;
    }

    detail::tape_node<T>& push(op_kind kind, const std::uint32_t* ids, std::size_t count, shape2 out, bool allocate_value = true,
                               const custom_operation<T>* custom = nullptr) {
        if (count_ == nodes_.size()) nodes_.emplace_back();
        auto& n = nodes_[count_];
        n.kind = kind;
        n.input_count = static_cast<std::uint8_t>(count);
        n.needs_grad = false;
        n.grad_ready = false;
        n.param = nullptr;
        n.custom = custom;
        n.a = n.b = T(0);
        n.axis = 0;
        n.transpose_a = n.transpose_b = false;
        n.unit = op_kind::input;
        for (std::size_t i = 0; i < count; ++i) {
            n.inputs[i] = ids[i];
            n.needs_grad = n.needs_grad || nodes_[ids[i]].needs_grad;
        }
        if (allocate_value) ensure_shape(n.value, out);
        return n;
    }

    var<T> finish(detail::tape_node<T>& n) {
        const auto id = static_cast<std::uint32_t>(count_);
        ++count_;
        if (n.kind != op_kind::input && n.kind != op_kind::variable && n.kind != op_kind::parameter) forward_node(n);
        if (check_finite_) check_value(id);
        return var<T>(this, id, generation_);
    }

    var<T> leaf(op_kind kind, const T* data, shape2 s) {
        auto& n = push(kind, nullptr, 0, s);
        std::copy(data, data + s.size(), n.value.data());
        n.needs_grad = (kind == op_kind::variable);
        return finish(n);
    }

    static shape2 broadcast_shape(shape2 x, shape2 y, op_kind kind) {
        auto fit = [](std::size_t p, std::size_t q, std::size_t& out) {
            if (p == q || q == 1) {
                out = p;
                return true;
            }
            if (p == 1) {
                out = q;
                return true;
            }
            return false;
        };
        shape2 out;
        if (!fit(x.rows, y.rows, out.rows) || !fit(x.cols, y.cols, out.cols)) {
            raise(codes::core_shape_mismatch,
                  std::string(op_name(kind)) + ": shapes " + to_string(x) + " and " + to_string(y) +
                      " do not broadcast (each dimension must match or be 1)");
        }
        return out;
    }

    // The recording functions take the kind as an argument; a kind they do
    // not compute would make forward read operands that do not exist.
    static bool is_unary(op_kind k) noexcept {
        switch (k) {
        case op_kind::scale:
        case op_kind::shift:
        case op_kind::sum_all:
        case op_kind::mean_all:
        case op_kind::exp:
        case op_kind::log:
        case op_kind::square:
        case op_kind::sqrt:
        case op_kind::abs:
        case op_kind::pow:
        case op_kind::tanh:
        case op_kind::sigmoid:
        case op_kind::relu:
        case op_kind::leaky_relu:
        case op_kind::elu:
        case op_kind::softplus:
        case op_kind::gelu_erf:
        case op_kind::gelu_tanh:
        case op_kind::logsumexp_rows:
        case op_kind::log_softmax_rows:
        case op_kind::clamp:
        case op_kind::stop_gradient: return true;
        default: return false;
        }
    }
    [[noreturn]] static void raise_wrong_kind(const char* recorder, op_kind k) {
        raise(codes::core_argument_invalid,
              std::string("tape::") + recorder + ": operation '" + op_name(k) + "' is not recorded by " + recorder +
                  "(); use its own function (see operations.hpp)");
    }

    // The name reports use: the operation's, or a custom operation's own.
    const char* node_name(std::size_t id) const noexcept {
        const auto& n = nodes_[id];
        return (n.kind == op_kind::custom && n.custom) ? n.custom->name() : op_name(n.kind);
    }

    void check_value(std::uint32_t id) const {
        const auto& m = value_at(id);
        for (std::size_t k = 0; k < m.size(); ++k) {
            if (!std::isfinite(m.data()[k])) {
                const std::size_t c = m.shape()[1];
                raise(codes::autodiff_non_finite,
                      "operation #" + std::to_string(id) + " (" + node_name(id) + ") produced " + std::to_string(m.data()[k]) + " at row " +
                          std::to_string(k / c) + ", column " + std::to_string(k % c));
            }
        }
    }

    void check_input_grads(std::size_t id) {  // id: the node whose backward just ran
        const auto& n = nodes_[id];
        for (std::size_t i = 0; i < n.input_count; ++i) {
            const matrix<T>* g = grad_target(n.inputs[i]);
            if (!g) continue;
            for (std::size_t k = 0; k < g->size(); ++k) {
                if (!std::isfinite(g->data()[k])) {
                    raise(codes::autodiff_non_finite,
                          "backward through operation #" + std::to_string(id) + " (" + node_name(id) + ") produced a gradient of " +
                              std::to_string(g->data()[k]) + " for its input #" + std::to_string(n.inputs[i]));
                }
            }
        }
    }

    // Broadcast index helpers: element (i, j) of the output reads element
    // (i or 0, j or 0) of an operand whose dimension is 1.
    struct bview {
        std::size_t rstride, cstride;
        explicit bview(shape2 s) : rstride(s.rows == 1 ? 0 : s.cols), cstride(s.cols == 1 ? 0 : 1) {}
        std::size_t at(std::size_t i, std::size_t j) const noexcept { return i * rstride + j * cstride; }
    };

    void forward_node(detail::tape_node<T>& n) {
        matrix<T>& out = n.value;
        T* o = out.data();
        const std::size_t size = out.size();
        const std::size_t rows = out.shape()[0], cols = out.shape()[1];
        switch (n.kind) {
        case op_kind::add:
        case op_kind::subtract:
        case op_kind::multiply:
        case op_kind::divide: {
            const matrix<T>& x = value_at(n.inputs[0]);
            const matrix<T>& y = value_at(n.inputs[1]);
            const bview vx(shape_of(x)), vy(shape_of(y));
            const T* px = x.data();
            const T* py = y.data();
            switch (n.kind) {
            case op_kind::add: combine(vx, vy, px, py, o, rows, cols, [](T u, T v) { return u + v; }); return;
            case op_kind::subtract: combine(vx, vy, px, py, o, rows, cols, [](T u, T v) { return u - v; }); return;
            case op_kind::multiply: combine(vx, vy, px, py, o, rows, cols, [](T u, T v) { return u * v; }); return;
            default: combine(vx, vy, px, py, o, rows, cols, [](T u, T v) { return u / v; }); return;
            }
        }
        case op_kind::matmul: {
            const matrix<T>& x = value_at(n.inputs[0]);
            const matrix<T>& y = value_at(n.inputs[1]);
            const std::size_t k = n.transpose_a ? x.shape()[0] : x.shape()[1];
            gemm<T>(n.transpose_a, n.transpose_b, rows, cols, k, T(1), x.data(), x.shape()[1], y.data(), y.shape()[1], T(0), o, cols, workers_);
            return;
        }
        case op_kind::sum_all:
        case op_kind::mean_all: {
            const matrix<T>& x = value_at(n.inputs[0]);
            T s = T(0);
            for (std::size_t k = 0; k < x.size(); ++k) s += x.data()[k];
            o[0] = (n.kind == op_kind::mean_all && x.size() > 0) ? s / static_cast<T>(x.size()) : s;
            return;
        }
        case op_kind::sum_axis:
        case op_kind::mean_axis: {
            const matrix<T>& x = value_at(n.inputs[0]);
            const std::size_t xr = x.shape()[0], xc = x.shape()[1];
            const T* px = x.data();
            std::fill(o, o + size, T(0));
            if (n.axis == 0) {
                for (std::size_t i = 0; i < xr; ++i)
                    for (std::size_t j = 0; j < xc; ++j) o[j] += px[i * xc + j];
            } else {
                for (std::size_t i = 0; i < xr; ++i)
                    for (std::size_t j = 0; j < xc; ++j) o[i] += px[i * xc + j];
            }
            if (n.kind == op_kind::mean_axis) {
                const std::size_t count = n.axis == 0 ? xr : xc;
                if (count > 0)
                    for (std::size_t k = 0; k < size; ++k) o[k] /= static_cast<T>(count);
            }
            return;
        }
        case op_kind::logsumexp_rows:
        case op_kind::log_softmax_rows: {
            // Shifted by the row maximum so that exp never overflows:
            // logsumexp(x) = m + log(sum_j exp(x_j - m)), m = max_j x_j.
            const matrix<T>& x = value_at(n.inputs[0]);
            const std::size_t xc = x.shape()[1];
            const T* px = x.data();
            for (std::size_t i = 0; i < x.shape()[0]; ++i) {
                const T* row = px + i * xc;
                T m = row[0];
                for (std::size_t j = 1; j < xc; ++j) m = row[j] > m ? row[j] : m;
                T s = T(0);
                for (std::size_t j = 0; j < xc; ++j) s += std::exp(row[j] - m);
                const T log_s = std::log(s);
                if (n.kind == op_kind::logsumexp_rows) {
                    o[i] = m + log_s;
                } else {
                    // (x_j - m) - log s, not x_j - (m + log s): for large
                    // |m| the sum m + log s would round log s away.
                    for (std::size_t j = 0; j < xc; ++j) o[i * xc + j] = (row[j] - m) - log_s;
                }
            }
            return;
        }
        case op_kind::affine_activation: {
            const matrix<T>& x = value_at(n.inputs[0]);
            const matrix<T>& w = value_at(n.inputs[1]);
            const std::size_t k = x.shape()[1];
            const T* pb = n.input_count == 3 ? value_at(n.inputs[2]).data() : nullptr;
            if (detail::splits_inner<T>(rows, cols, k)) {
                // x W as the sum of its two halves over k (core/gemm.hpp:
                // detail::gemm_inner_halves), the second half in the scratch
                // matrix (backward() reuses it), then the sum, bias and
                // activation by bands of rows. Each thread then reads
                // only the rows of W whose update it runs.
                ensure_shape(n.scratch, shape2{rows, cols});
                detail::gemm_inner_halves<T>(rows, cols, k, x.data(), k, w.data(), cols, o, n.scratch.data(), workers_);
                const std::size_t threads = workers_ ? workers_->concurrency() : 1;
                inner_sum sum{&n, pb, o, n.scratch.data(), cols, detail::gemm_split<T>::rows_of(rows, kernel_path::blas, threads)};
                if (sum.bands.parts > 1)
                    workers_->run(sum.bands.parts, &inner_sum::run_part, &sum);
                else
                    inner_sum::run_part(&sum, 0);
                return;
            }
            gemm<T>(false, false, rows, cols, k, T(1), x.data(), k, w.data(), cols, T(0), o, cols, workers_);
            activate(n, pb, o, rows, cols);
            return;
        }
        case op_kind::softmax_cross_entropy: {
            const matrix<T>& z = value_at(n.inputs[0]);
            const T* pq = value_at(n.inputs[1]).data();
            const std::size_t zc = z.shape()[1];
            const T* pz = z.data();
            // Accumulated row-major like sum_all over log_softmax * Q.
            T total = T(0);
            for (std::size_t i = 0; i < z.shape()[0]; ++i) {
                const T* row = pz + i * zc;
                T m = row[0];
                for (std::size_t j = 1; j < zc; ++j) m = row[j] > m ? row[j] : m;
                T s = T(0);
                for (std::size_t j = 0; j < zc; ++j) s += std::exp(row[j] - m);
                const T log_s = std::log(s);
                for (std::size_t j = 0; j < zc; ++j) total += ((row[j] - m) - log_s) * pq[i * zc + j];
            }
            o[0] = -total;
            return;
        }
        case op_kind::custom: {
            const matrix<T>* values[detail::max_operands] = {};
            for (std::size_t i = 0; i < n.input_count; ++i) values[i] = &value_at(n.inputs[i]);
            n.custom->forward(operand_list<T>{values, n.input_count}, out);
            return;
        }
        default: break;
        }
        // Elementwise unary operations.
        // One loop per kind (the kind is chosen once, not per value), so the
        // simple ones vectorize.
        const T* px = value_at(n.inputs[0]).data();
        const T a = n.a, b = n.b;
        switch (n.kind) {
        case op_kind::scale: map(px, o, size, [a](T x) { return a * x; }); return;
        case op_kind::shift: map(px, o, size, [a](T x) { return x + a; }); return;
        case op_kind::exp: map(px, o, size, [](T x) { return std::exp(x); }); return;
        case op_kind::log: map(px, o, size, [](T x) { return std::log(x); }); return;
        case op_kind::square: map(px, o, size, [](T x) { return x * x; }); return;
        case op_kind::sqrt: map(px, o, size, [](T x) { return std::sqrt(x); }); return;
        case op_kind::abs: map(px, o, size, [](T x) { return std::abs(x); }); return;
        case op_kind::pow: map(px, o, size, [a](T x) { return std::pow(x, a); }); return;
        case op_kind::tanh: map(px, o, size, [](T x) { return std::tanh(x); }); return;
        case op_kind::sigmoid: map(px, o, size, [](T x) { return detail::stable_sigmoid(x); }); return;
        case op_kind::relu: map(px, o, size, [](T x) { return x > T(0) ? x : T(0); }); return;
        case op_kind::leaky_relu: map(px, o, size, [a](T x) { return x > T(0) ? x : a * x; }); return;
        case op_kind::elu: map(px, o, size, [a](T x) { return x > T(0) ? x : a * std::expm1(x); }); return;
        case op_kind::softplus: map(px, o, size, [](T x) { return detail::stable_softplus(x); }); return;
        case op_kind::gelu_erf: map(px, o, size, [](T x) { return T(0.5) * x * (T(1) + std::erf(x * T(detail::inv_sqrt2))); }); return;
        case op_kind::gelu_tanh:
            map(px, o, size, [](T x) {
                const T u = T(detail::gelu_sqrt_2_over_pi) * (x + T(detail::gelu_cubic) * x * x * x);
                return T(0.5) * x * (T(1) + std::tanh(u));
            });
            return;
        case op_kind::clamp: map(px, o, size, [a, b](T x) { return x < a ? a : (x > b ? b : x); }); return;
        default: map(px, o, size, [](T x) { return x; }); return;
        }
    }

    // The activation of an affine_activation node on rows of its output:
    // o_ij = f(o_ij + b_j) in place (b null: f(o_ij)).
    static void activate(const detail::tape_node<T>& n, const T* pb, T* o, std::size_t rows, std::size_t cols) noexcept {
        switch (n.unit) {
        case op_kind::relu: detail::bias_relu_rows(pb, o, rows, cols); return;
        case op_kind::leaky_relu: {
            const T a = n.a;
            bias_map(pb, o, rows, cols, [a](T z) { return z > T(0) ? z : a * z; });
            return;
        }
        case op_kind::elu: {
            const T a = n.a;
            bias_map(pb, o, rows, cols, [a](T z) { return z > T(0) ? z : a * std::expm1(z); });
            return;
        }
        case op_kind::tanh: bias_map(pb, o, rows, cols, [](T z) { return std::tanh(z); }); return;
        default: bias_map(pb, o, rows, cols, [](T z) { return detail::stable_sigmoid(z); }); return;
        }
    }

    // The second step of an affine_activation node computed in two halves
    // over k: o = f(o + partial + b), band `index` of rows.
    struct inner_sum {
        const detail::tape_node<T>* n;
        const T* pb;
        T* o;
        const T* partial;
        std::size_t cols;
        detail::gemm_split<T> bands;

        static void run_part(void* context, std::size_t index) noexcept {
            const inner_sum& s = *static_cast<const inner_sum*>(context);
            const std::size_t first = s.bands.edge(index) * s.cols, last = s.bands.edge(index + 1) * s.cols;
            detail::add_into(s.partial + first, s.o + first, last - first);
            activate(*s.n, s.pb, s.o + first, (last - first) / s.cols, s.cols);
        }
    };

    // o_ij = f(o_ij + b_j) in place (b null: f(o_ij)), one pass.
    template <class F>
    static void bias_map(const T* b, T* o, std::size_t rows, std::size_t cols, F f) noexcept {
        if (!b) {
            for (std::size_t k = 0; k < rows * cols; ++k) o[k] = f(o[k]);
            return;
        }
        for (std::size_t i = 0; i < rows; ++i) {
            T* oi = o + i * cols;
            for (std::size_t j = 0; j < cols; ++j) oi[j] = f(oi[j] + b[j]);
        }
    }

    template <class F>
    static void map(const T* px, T* o, std::size_t size, F f) noexcept {
        for (std::size_t k = 0; k < size; ++k) o[k] = f(px[k]);
    }

    // o = x (op) y with broadcasting; the common layouts (equal shapes, a
    // row added to every row) get loops without index arithmetic.
    template <class F>
    static void combine(const bview& vx, const bview& vy, const T* px, const T* py, T* o, std::size_t rows, std::size_t cols, F f) noexcept {
        const bool x_full = vx.rstride == cols && vx.cstride == 1, y_full = vy.rstride == cols && vy.cstride == 1;
        if (x_full && y_full) {
            for (std::size_t k = 0; k < rows * cols; ++k) o[k] = f(px[k], py[k]);
        } else if (x_full && vy.rstride == 0 && vy.cstride == 1) {
            for (std::size_t i = 0; i < rows; ++i)
                for (std::size_t j = 0; j < cols; ++j) o[i * cols + j] = f(px[i * cols + j], py[j]);
        } else {
            for (std::size_t i = 0; i < rows; ++i)
                for (std::size_t j = 0; j < cols; ++j) o[i * cols + j] = f(px[vx.at(i, j)], py[vy.at(i, j)]);
        }
    }

    void backward_node(detail::tape_node<T>& n) {
        const matrix<T>& gm = n.grad;
        const T* g = gm.data();
        const std::size_t rows = n.value.shape()[0], cols = n.value.shape()[1];
        switch (n.kind) {
        case op_kind::add:
        case op_kind::subtract:
        case op_kind::multiply:
        case op_kind::divide: {
            const matrix<T>& x = value_at(n.inputs[0]);
            const matrix<T>& y = value_at(n.inputs[1]);
            matrix<T>* gx = grad_target(n.inputs[0]);
            matrix<T>* gy = grad_target(n.inputs[1]);
            const bview vx(shape_of(x)), vy(shape_of(y));
            const bool x_full = vx.rstride == cols && vx.cstride == 1;
            const bool y_row = vy.cstride == 1 && (vy.rstride == 0 || vy.rstride == cols);
            if ((n.kind == op_kind::add || n.kind == op_kind::subtract) && x_full && y_row) {
                // The bias-add layout: the same sums in the same order
                // as the general loop below, without its index arithmetic.
                const T sign = n.kind == op_kind::add ? T(1) : T(-1);
                T* pgx = gx ? gx->data() : nullptr;
                T* pgy = gy ? gy->data() : nullptr;
                for (std::size_t i = 0; i < rows; ++i) {
                    const T* gi = g + i * cols;
                    if (pgx)
                        for (std::size_t j = 0; j < cols; ++j) pgx[i * cols + j] += gi[j];
                    if (pgy) {
                        T* target = pgy + i * vy.rstride;
                        if (sign > T(0)) {
                            for (std::size_t j = 0; j < cols; ++j) target[j] += gi[j];
                        } else {
                            for (std::size_t j = 0; j < cols; ++j) target[j] += -gi[j];
                        }
                    }
                }
                return;
            }
            for (std::size_t i = 0; i < rows; ++i) {
                for (std::size_t j = 0; j < cols; ++j) {
                    const T gij = g[i * cols + j];
                    const std::size_t ix = vx.at(i, j), iy = vy.at(i, j);
                    const T u = x.data()[ix], v = y.data()[iy];
                    T dx, dy;
                    switch (n.kind) {
                    case op_kind::add:
                        dx = gij;
                        dy = gij;
                        break;
                    case op_kind::subtract:
                        dx = gij;
                        dy = -gij;
                        break;
                    case op_kind::multiply:
                        dx = gij * v;
                        dy = gij * u;
                        break;
                    default:
                        dx = gij / v;
                        dy = -gij * u / (v * v);
                        break;
                    }
                    if (gx) gx->data()[ix] += dx;
                    if (gy) gy->data()[iy] += dy;
                }
            }
            return;
        }
        case op_kind::matmul: {
            // C = op(A) op(B); dA and dB follow from dC by the product rule
            // (see DEVELOPERS.md, "matmul backward", for the four cases).
            const matrix<T>& x = value_at(n.inputs[0]);
            const matrix<T>& y = value_at(n.inputs[1]);
            matrix<T>* gx = grad_target(n.inputs[0]);
            matrix<T>* gy = grad_target(n.inputs[1]);
            const std::size_t m = rows, nn = cols;
            const std::size_t k = n.transpose_a ? x.shape()[0] : x.shape()[1];
            const std::size_t ldx = x.shape()[1], ldy = y.shape()[1];
            if (gx) {
                if (!n.transpose_a)
                    gemm<T>(false, !n.transpose_b, m, k, nn, T(1), g, nn, y.data(), ldy, T(1), gx->data(), k, workers_);
                else
                    gemm<T>(n.transpose_b, true, k, m, nn, T(1), y.data(), ldy, g, nn, T(1), gx->data(), m, workers_);
            }
            if (gy) {
                if (!n.transpose_b)
                    gemm<T>(!n.transpose_a, false, k, nn, m, T(1), x.data(), ldx, g, nn, T(1), gy->data(), nn, workers_);
                else
                    gemm<T>(true, n.transpose_a, nn, k, m, T(1), g, nn, x.data(), ldx, T(1), gy->data(), k, workers_);
            }
            return;
        }
        case op_kind::sum_all:
        case op_kind::mean_all: {
            matrix<T>* gx = grad_target(n.inputs[0]);
            const std::size_t count = gx->size();
            const T d = (n.kind == op_kind::mean_all && count > 0) ? g[0] / static_cast<T>(count) : g[0];
            for (std::size_t k = 0; k < count; ++k) gx->data()[k] += d;
            return;
        }
        case op_kind::sum_axis:
        case op_kind::mean_axis: {
            matrix<T>* gx = grad_target(n.inputs[0]);
            const std::size_t xr = gx->shape()[0], xc = gx->shape()[1];
            const std::size_t count = n.axis == 0 ? xr : xc;
            const T f = (n.kind == op_kind::mean_axis && count > 0) ? T(1) / static_cast<T>(count) : T(1);
            T* px = gx->data();
            for (std::size_t i = 0; i < xr; ++i)
                for (std::size_t j = 0; j < xc; ++j) px[i * xc + j] += f * g[n.axis == 0 ? j : i];
            return;
        }
        case op_kind::logsumexp_rows:
        case op_kind::log_softmax_rows: {
            const matrix<T>& x = value_at(n.inputs[0]);
            matrix<T>* gx = grad_target(n.inputs[0]);
            const std::size_t xr = x.shape()[0], xc = x.shape()[1];
            const T* px = x.data();
            const T* out = n.value.data();
            T* pg = gx->data();
            for (std::size_t i = 0; i < xr; ++i) {
                if (n.kind == op_kind::logsumexp_rows) {
                    // d lse / d x_j = softmax_j = exp(x_j - m) / sum_k exp(x_k - m),
                    // shifted by the row maximum m again: exp(x_j - lse)
                    // would inherit lse's rounding, which for large |lse|
                    // (1001.3 in float) is far coarser than softmax needs.
                    const T* row = px + i * xc;
                    T m = row[0];
                    for (std::size_t j = 1; j < xc; ++j) m = row[j] > m ? row[j] : m;
                    T s = T(0);
                    for (std::size_t j = 0; j < xc; ++j) s += std::exp(row[j] - m);
                    const T scale = g[i] / s;
                    for (std::size_t j = 0; j < xc; ++j) pg[i * xc + j] += scale * std::exp(row[j] - m);
                } else {
                    // y = x - lse(x): dx_j = g_j - softmax_j * sum_k g_k
                    T gs = T(0);
                    for (std::size_t j = 0; j < xc; ++j) gs += g[i * xc + j];
                    for (std::size_t j = 0; j < xc; ++j) pg[i * xc + j] += g[i * xc + j] - std::exp(out[i * xc + j]) * gs;
                }
            }
            return;
        }
        case op_kind::affine_activation: {
            // d = g * f'(y), with f' written in terms of the output y
            // exactly as the separate activation's backward computes it
            // (y > 0 iff x W + b > 0 for the fusable coefficients).
            ensure_shape(n.scratch, shape2{rows, cols});
            T* d = n.scratch.data();
            const T* py = n.value.data();
            const std::size_t size = rows * cols;
            const T a = n.a;
            switch (n.unit) {
            case op_kind::relu: detail::relu_gradient(py, g, d, size); break;
            case op_kind::leaky_relu: derive(py, g, d, size, [a](T y) { return y > T(0) ? T(1) : a; }); break;
            case op_kind::elu: derive(py, g, d, size, [a](T y) { return y > T(0) ? T(1) : y + a; }); break;
            case op_kind::tanh: derive(py, g, d, size, [](T y) { return T(1) - y * y; }); break;
            default: derive(py, g, d, size, [](T y) { return y * (T(1) - y); }); break;
            }
            const matrix<T>& x = value_at(n.inputs[0]);
            const matrix<T>& w = value_at(n.inputs[1]);
            matrix<T>* gx = grad_target(n.inputs[0]);
            matrix<T>* gw = grad_target(n.inputs[1]);
            matrix<T>* gb = n.input_count == 3 ? grad_target(n.inputs[2]) : nullptr;
            const std::size_t k = x.shape()[1];
            if (gb) detail::add_column_sums(d, rows, cols, gb->data());
            if (gx) gemm<T>(false, true, rows, k, cols, T(1), d, cols, w.data(), cols, T(1), gx->data(), k, workers_);
            if (gw) gemm<T>(true, false, k, cols, rows, T(1), x.data(), k, d, cols, T(1), gw->data(), cols, workers_);
            return;
        }
        case op_kind::softmax_cross_entropy: {
            const matrix<T>& z = value_at(n.inputs[0]);
            const matrix<T>& q = value_at(n.inputs[1]);
            matrix<T>* gz = grad_target(n.inputs[0]);
            matrix<T>* gq = grad_target(n.inputs[1]);
            const std::size_t zr = z.shape()[0], zc = z.shape()[1];
            const T* pz = z.data();
            const T* pq = q.data();
            const T g0 = g[0];
            for (std::size_t i = 0; i < zr; ++i) {
                const T* row = pz + i * zc;
                const T* qi = pq + i * zc;
                T m = row[0];
                for (std::size_t j = 1; j < zc; ++j) m = row[j] > m ? row[j] : m;
                T s = T(0);
                for (std::size_t j = 0; j < zc; ++j) s += std::exp(row[j] - m);
                const T log_s = std::log(s);
                if (gz) {
                    // d/dz of -sum_j q_j (z_j - lse): -q_j + softmax_j sum_k q_k,
                    // in the order log_softmax_rows' backward uses.
                    T gs = T(0);
                    for (std::size_t j = 0; j < zc; ++j) gs += -g0 * qi[j];
                    T* pg = gz->data() + i * zc;
                    for (std::size_t j = 0; j < zc; ++j) pg[j] += -g0 * qi[j] - std::exp((row[j] - m) - log_s) * gs;
                }
                if (gq) {
                    T* pg = gq->data() + i * zc;
                    for (std::size_t j = 0; j < zc; ++j) pg[j] += -g0 * ((row[j] - m) - log_s);
                }
            }
            return;
        }
        case op_kind::custom: {
            const matrix<T>* values[detail::max_operands] = {};
            matrix<T>* grads[detail::max_operands] = {};
            for (std::size_t i = 0; i < n.input_count; ++i) {
                values[i] = &value_at(n.inputs[i]);
                grads[i] = grad_target(n.inputs[i]);
            }
            n.custom->backward(operand_list<T>{values, n.input_count}, n.value, gm, grads);
            return;
        }
        default: break;
        }
        // Elementwise unary operations: dx = g * f'(x), written with the
        // output y where that is cheaper or more accurate.
        matrix<T>* gx = grad_target(n.inputs[0]);
        if (!gx) return;
        const T* px = value_at(n.inputs[0]).data();
        const T* py = n.value.data();
        T* pg = gx->data();
        const T a = n.a, b = n.b;
        const std::size_t size = n.value.size();
        // dx += g * f'(x, y), one loop per kind.
        switch (n.kind) {
        case op_kind::scale: chain(px, py, g, pg, size, [a](T, T) { return a; }); return;
        case op_kind::shift: chain(px, py, g, pg, size, [](T, T) { return T(1); }); return;
        case op_kind::exp: chain(px, py, g, pg, size, [](T, T y) { return y; }); return;
        case op_kind::log: chain(px, py, g, pg, size, [](T x, T) { return T(1) / x; }); return;
        case op_kind::square: chain(px, py, g, pg, size, [](T x, T) { return T(2) * x; }); return;
        case op_kind::sqrt: chain(px, py, g, pg, size, [](T, T y) { return T(0.5) / y; }); return;
        case op_kind::abs: chain(px, py, g, pg, size, [](T x, T) { return x > T(0) ? T(1) : (x < T(0) ? T(-1) : T(0)); }); return;
        case op_kind::pow: chain(px, py, g, pg, size, [a](T x, T) { return a * std::pow(x, a - T(1)); }); return;
        case op_kind::tanh: chain(px, py, g, pg, size, [](T, T y) { return T(1) - y * y; }); return;  // tanh' = 1 - tanh^2
        case op_kind::sigmoid: chain(px, py, g, pg, size, [](T, T y) { return y * (T(1) - y); }); return;  // s' = s (1 - s)
        case op_kind::relu: chain(px, py, g, pg, size, [](T x, T) { return x > T(0) ? T(1) : T(0); }); return;
        case op_kind::leaky_relu: chain(px, py, g, pg, size, [a](T x, T) { return x > T(0) ? T(1) : a; }); return;
        case op_kind::elu: chain(px, py, g, pg, size, [a](T x, T y) { return x > T(0) ? T(1) : y + a; }); return;  // a(e^x - 1)' = y + a
        case op_kind::softplus: chain(px, py, g, pg, size, [](T x, T) { return detail::stable_sigmoid(x); }); return;  // softplus' = sigmoid
        case op_kind::gelu_erf:
            // d/dx [x Phi(x)] = Phi(x) + x phi(x)
            chain(px, py, g, pg, size, [](T x, T) {
                const T cdf = T(0.5) * (T(1) + std::erf(x * T(detail::inv_sqrt2)));
                return cdf + x * T(detail::inv_sqrt_2pi) * std::exp(T(-0.5) * x * x);
            });
            return;
        case op_kind::gelu_tanh:
            chain(px, py, g, pg, size, [](T x, T) {
                const T c = T(detail::gelu_sqrt_2_over_pi);
                const T t = std::tanh(c * (x + T(detail::gelu_cubic) * x * x * x));
                return T(0.5) * (T(1) + t) + T(0.5) * x * (T(1) - t * t) * c * (T(1) + T(3 * detail::gelu_cubic) * x * x);
            });
            return;
        case op_kind::clamp: chain(px, py, g, pg, size, [a, b](T x, T) { return (x >= a && x <= b) ? T(1) : T(0); }); return;
        default: chain(px, py, g, pg, size, [](T, T) { return T(0); }); return;
        }
    }

    template <class F>
    static void derive(const T* py, const T* g, T* d, std::size_t size, F derivative) noexcept {
        for (std::size_t k = 0; k < size; ++k) d[k] = g[k] * derivative(py[k]);
    }

    template <class F>
    static void chain(const T* px, const T* py, const T* g, T* pg, std::size_t size, F derivative) noexcept {
        for (std::size_t k = 0; k < size; ++k) pg[k] += g[k] * derivative(px[k], py[k]);
    }

    std::vector<detail::tape_node<T>> nodes_;
    std::size_t count_ = 0;
    std::uint64_t generation_ = 1;
    bool check_finite_ = false;
    bool inference_only_ = false;
    executor* workers_ = nullptr;
};

template <class T>
const matrix<T>& var<T>::value() const {
    if (!tape_) raise(codes::autodiff_value_foreign, "value() on an empty var (recorded on no tape)");
    return tape_->value(*this);
}

TENON_NAMESPACE_END
