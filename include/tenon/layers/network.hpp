// tenon: the network (a chain of layers), residual blocks and the factory
// that rebuilds layers from their architecture records.
//
// A network applies its layers in order. Its parameters are enumerable by
// name ("hidden1.weights"), its state buffers (population estimates) too, and
// all of them can be copied out into a snapshot and back, e.g. to keep the
// best weights for early stopping. describe()/architecture_bytes() give the
// architecture without weights; network_from_bytes() rebuilds it (weights
// zero, population estimates at their initial values) for a model file to fill.
#pragma once

#include <cstdint>
#include <limits>
#include <memory>
#include <string>
#include <type_traits>
#include <typeinfo>
#include <utility>
#include <vector>

#include "tenon/layers/activation.hpp"
#include "tenon/layers/dense.hpp"
#include "tenon/layers/dropout.hpp"
#include "tenon/layers/initializers.hpp"
#include "tenon/format/training_state.hpp"
#include "tenon/layers/layer.hpp"
#include "tenon/layers/normalization.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {

// An ordered list of uniquely named layers, shared by network and residual.
template <class T>
class layer_chain {
public:
    layer<T>& add(std::unique_ptr<layer<T>> l, std::string name, const std::string& prefix, const char* owner) {
        if (!l) raise(codes::core_argument_invalid, std::string(owner) + ": cannot add an empty layer pointer");
        if (name.empty()) name = l->name();
        if (name.empty()) name = stem_of(*l) + std::to_string(layers_.size() + 1);
        if (name.find('.') != std::string::npos) {
            raise(codes::model_layer_option, std::string(owner) + ": layer name '" + name + "' must not contain '.'");
        }
        for (const auto& existing : layers_) {
            if (existing->name() == name) {
                raise(codes::model_network_duplicate_name, std::string(owner) + ": a layer named '" + name + "' already exists");
            }
        }
        l->set_name(std::move(name));
        l->set_prefix(prefix);
        fusions_.reserve(layers_.size() + 1);
        layers_.push_back(std::move(l));
        fusions_.push_back(fusion_with_previous());
        return *layers_.back();
    }

    // A dense layer directly followed by an activation the tape fuses is
    // recorded as one affine_activation node (one pass for bias and
    // activation, one backward pass for their gradients) instead of matmul,
    // add and the activation: the same values in the same order, so results
    // and architecture records do not change.
    var<T> forward(tape<T>& t, var<T> x, run_mode mode) {
        for (std::size_t i = 0; i < layers_.size(); ++i) {
            if (i + 1 < layers_.size() && fusions_[i + 1].fused) {
                x = static_cast<dense<T>&>(*layers_[i]).forward_activated(t, x, fusions_[i + 1].unit, fusions_[i + 1].coefficient);
                ++i;
                continue;
            }
            x = layers_[i]->forward(t, x, mode);
        }
        return x;
    }

    std::size_t output_width(std::size_t width) const {
        for (const auto& l : layers_) width = l->output_width(width);
        return width;
    }

    void set_prefix(const std::string& prefix) {
        for (auto& l : layers_) l->set_prefix(prefix);
    }

    std::size_t size() const noexcept { return layers_.size(); }
    layer<T>& at(std::size_t i) {
        if (i >= layers_.size()) {
            raise(codes::core_argument_invalid,
                  "layer index " + std::to_string(i) + " is out of range (" + std::to_string(layers_.size()) + " layers)");
        }
        return *layers_[i];
    }
    const layer<T>& at(std::size_t i) const { return const_cast<layer_chain*>(this)->at(i); }

    void collect_parameters(std::vector<parameter<T>*>& out) {
        for (auto& l : layers_) l->collect_parameters(out);
    }
    void collect_state(std::vector<parameter<T>*>& out) {
        for (auto& l : layers_) l->collect_state(out);
    }
    void describe_into(std::vector<layer_record>& out) const {
        for (const auto& l : layers_) out.push_back(l->describe());
    }

private:
    static std::string stem_of(const layer<T>& l) {
        if (const auto* a = dynamic_cast<const activation_layer<T>*>(&l)) return activation_name(a->function());
        return l.kind();
    }

    struct fusion {
        bool fused = false;  // this activation layer runs inside the dense layer before it
        op_kind unit = op_kind::input;
        T coefficient = T(0);
    };

    // Exact types only: a class derived from dense or activation_layer may
    // override forward(), which fusing would bypass.
    fusion fusion_with_previous() const {
        fusion f;
        if (layers_.size() < 2) return f;
        const layer<T>& previous = *layers_[layers_.size() - 2];
        const layer<T>& last = *layers_.back();
        if (typeid(previous) != typeid(dense<T>) || typeid(last) != typeid(activation_layer<T>)) return f;
        const auto& a = static_cast<const activation_layer<T>&>(last);
        switch (a.function()) {
        case activation::relu: f.unit = op_kind::relu; break;
        case activation::leaky_relu: f.unit = op_kind::leaky_relu; break;
        case activation::elu: f.unit = op_kind::elu; break;
        case activation::tanh: f.unit = op_kind::tanh; break;
        case activation::sigmoid: f.unit = op_kind::sigmoid; break;
        default: return f;
        }
        f.coefficient = static_cast<T>(a.coefficient());
        f.fused = tape<T>::fusable_activation(f.unit, f.coefficient);
        return f;
    }

    std::vector<std::unique_ptr<layer<T>>> layers_;
    std::vector<fusion> fusions_;  // one per layer, parallel to layers_
};

}  // namespace detail

/// y = x + f(x), where f is the chain of layers inside the block (He, Zhang,
/// Ren & Sun 2016, "Deep Residual Learning for Image Recognition", eq. 1).
/// f must keep the width of its input.
template <class T>
class residual : public layer<T> {
public:
    residual() = default;

    /// Appends a layer to the block; an empty name becomes kind + position.
    layer<T>& add(std::unique_ptr<layer<T>> l, std::string name = {}) {
        return chain_.add(std::move(l), std::move(name), this->qualified_name(), "residual block");
    }
    template <class L, class = std::enable_if_t<std::is_base_of_v<layer<T>, std::decay_t<L>>>>
    std::decay_t<L>& add(L&& l, std::string name = {}) {
        return static_cast<std::decay_t<L>&>(add(std::make_unique<std::decay_t<L>>(std::forward<L>(l)), std::move(name)));
    }

    var<T> forward(tape<T>& t, var<T> x, run_mode mode) override {
        const var<T> fx = chain_.forward(t, x, mode);
        // Checked before the message is built, so a correct step allocates nothing.
        if (fx.shape() != x.shape()) require_shape(fx.shape(), x.shape(), "residual block '" + this->qualified_name() + "' inner output");
        return x + fx;
    }

    const char* kind() const noexcept override { return "residual"; }

    layer_record describe() const override {
        layer_record r = this->base_record();
        chain_.describe_into(r.children);
        return r;
    }

    std::size_t output_width(std::size_t input_width) const override {
        const std::size_t w = chain_.output_width(input_width);
        require_shape(shape2{1, w}, shape2{1, input_width}, "residual block '" + this->qualified_name() + "' inner output");
        return input_width;
    }

    void collect_parameters(std::vector<parameter<T>*>& out) override { chain_.collect_parameters(out); }
    void collect_state(std::vector<parameter<T>*>& out) override { chain_.collect_state(out); }

    std::size_t layer_count() const noexcept { return chain_.size(); }
    layer<T>& layer_at(std::size_t i) { return chain_.at(i); }

protected:
    void renamed() override { chain_.set_prefix(this->qualified_name()); }

private:
    detail::layer_chain<T> chain_;
};

/// y = f(x) + x W: the chain of layers f beside a linear path from the
/// block's inputs to its outputs (a skip-layer connection, Ripley 1996,
/// "Pattern Recognition and Neural Networks", section 5.1). Where the data
/// is linear the network then extrapolates like a linear model and f learns
/// only the remainder. W (inputs x outputs, no bias: f's last layer has one)
/// is the parameter "<block>.linear_weights"; it starts at zero, so a new
/// block computes f(x) alone.
template <class T>
class linear_bypass : public layer<T> {
public:
    linear_bypass(std::size_t inputs, std::size_t outputs) : inputs_(inputs), outputs_(outputs), linear_("linear_weights", shape2{inputs, outputs}) {
        if (inputs == 0 || outputs == 0) {
            raise(codes::model_layer_option,
                  "linear bypass: inputs and outputs must be positive, got " + std::to_string(inputs) + " x " + std::to_string(outputs));
        }
        renamed();
    }

    /// Appends a layer to f; an empty name becomes kind + position.
    layer<T>& add(std::unique_ptr<layer<T>> l, std::string name = {}) {
        return chain_.add(std::move(l), std::move(name), this->qualified_name(), "linear bypass");
    }
    template <class L, class = std::enable_if_t<std::is_base_of_v<layer<T>, std::decay_t<L>>>>
    std::decay_t<L>& add(L&& l, std::string name = {}) {
        return static_cast<std::decay_t<L>&>(add(std::make_unique<std::decay_t<L>>(std::forward<L>(l)), std::move(name)));
    }

    var<T> forward(tape<T>& t, var<T> x, run_mode mode) override {
        this->require_width(x.shape().cols, inputs_);
        const var<T> fx = chain_.forward(t, x, mode);
        if (fx.shape().cols != outputs_)
            require_shape(fx.shape(), shape2{x.shape().rows, outputs_}, "linear bypass '" + this->qualified_name() + "' inner output");
        return fx + matmul(x, t.track(linear_));
    }

    const char* kind() const noexcept override { return "linear_bypass"; }

    layer_record describe() const override {
        layer_record r = this->base_record();
        r.set_number("inputs", static_cast<double>(inputs_));
        r.set_number("outputs", static_cast<double>(outputs_));
        chain_.describe_into(r.children);
        return r;
    }

    std::size_t output_width(std::size_t input_width) const override {
        this->require_width(input_width, inputs_);
        const std::size_t w = chain_.output_width(input_width);
        require_shape(shape2{1, w}, shape2{1, outputs_}, "linear bypass '" + this->qualified_name() + "' inner output");
        return outputs_;
    }

    void collect_parameters(std::vector<parameter<T>*>& out) override {
        chain_.collect_parameters(out);
        out.push_back(&linear_);
    }
    void collect_state(std::vector<parameter<T>*>& out) override { chain_.collect_state(out); }

    std::size_t inputs() const noexcept { return inputs_; }
    std::size_t outputs() const noexcept { return outputs_; }
    parameter<T>& linear_weights() noexcept { return linear_; }
    std::size_t layer_count() const noexcept { return chain_.size(); }
    layer<T>& layer_at(std::size_t i) { return chain_.at(i); }

protected:
    void renamed() override {
        const std::string q = this->qualified_name();
        linear_.set_name(q.empty() ? "linear_weights" : q + ".linear_weights");
        chain_.set_prefix(q);
    }

private:
    std::size_t inputs_;
    std::size_t outputs_;
    detail::layer_chain<T> chain_;
    parameter<T> linear_;
};

template <class T>
class network {
    TENON_REQUIRE_SCALAR(T);

public:
    network() = default;
    network(network&&) noexcept = default;
    network& operator=(network&&) noexcept = default;
    network(const network&) = delete;
    network& operator=(const network&) = delete;

    /// Appends a layer; an empty name becomes kind + position ("dense1").
    /// Names must be unique within the network and must not contain '.'.
    layer<T>& add(std::unique_ptr<layer<T>> l, std::string name = {}) { return chain_.add(std::move(l), std::move(name), std::string(), "network"); }
    template <class L, class = std::enable_if_t<std::is_base_of_v<layer<T>, std::decay_t<L>>>>
    std::decay_t<L>& add(L&& l, std::string name = {}) {
        return static_cast<std::decay_t<L>&>(add(std::make_unique<std::decay_t<L>>(std::forward<L>(l)), std::move(name)));
    }

    std::size_t layer_count() const noexcept { return chain_.size(); }
    layer<T>& layer_at(std::size_t i) { return chain_.at(i); }
    const layer<T>& layer_at(std::size_t i) const { return chain_.at(i); }

    run_mode mode() const noexcept { return mode_; }
    void set_mode(run_mode m) noexcept { mode_ = m; }

    /// Records the network on `t` in the current mode.
    var<T> forward(tape<T>& t, var<T> input) { return chain_.forward(t, input, mode_); }
    /// Records the network in inference mode on a tape set to record for
    /// inference only (tape::set_inference_only), whatever the network's
    /// mode. Such a recording reads the parameters and changes nothing in
    /// the network (layer::forward's contract), so a const network can be
    /// evaluated; any other tape is refused with core.argument.invalid.
    var<T> infer(tape<T>& t, var<T> input) const {
        if (!t.inference_only())
            raise(codes::core_argument_invalid, "network::infer: the tape must record for inference only (tape::set_inference_only(true))");
        return const_cast<detail::layer_chain<T>&>(chain_).forward(t, input, run_mode::inference);
    }
    /// Copies `input` onto the tape as a constant and records the network.
    var<T> forward(tape<T>& t, const matrix<T>& input) { return forward(t, t.input(input)); }

    /// Output columns for `input_width` input columns (checks every layer).
    std::size_t output_width(std::size_t input_width) const { return chain_.output_width(input_width); }

    /// The learned parameters in layer order. The list is refilled into a
    /// buffer the network keeps, so repeated calls do not allocate.
    const std::vector<parameter<T>*>& parameters() {
        parameters_.clear();
        chain_.collect_parameters(parameters_);
        return parameters_;
    }
    /// The non-trainable state buffers (population estimates) in layer order.
    const std::vector<parameter<T>*>& state_buffers() {
        state_.clear();
        chain_.collect_state(state_);
        return state_;
    }
    /// The same two lists, read-only, for a const network (each call fills
    /// a new list; collecting changes nothing in the layers).
    std::vector<const parameter<T>*> parameters() const {
        std::vector<parameter<T>*> all;
        const_cast<detail::layer_chain<T>&>(chain_).collect_parameters(all);
        return {all.begin(), all.end()};
    }
    std::vector<const parameter<T>*> state_buffers() const {
        std::vector<parameter<T>*> all;
        const_cast<detail::layer_chain<T>&>(chain_).collect_state(all);
        return {all.begin(), all.end()};
    }

    /// Number of learned values (the sum of the parameters' sizes).
    std::size_t parameter_count() {
        std::size_t n = 0;
        for (const auto* p : parameters()) n += p->size();
        return n;
    }
    /// Number of values in state buffers.
    std::size_t state_count() {
        std::size_t n = 0;
        for (const auto* p : state_buffers()) n += p->size();
        return n;
    }

    /// The parameter or state buffer with the given qualified name; raises
    /// model.network.unknown_parameter.
    parameter<T>& find(const std::string& name) {
        for (auto* p : parameters())
            if (p->name() == name) return *p;
        for (auto* p : state_buffers())
            if (p->name() == name) return *p;
        raise(codes::model_network_unknown_parameter, "network: no parameter or state buffer is named '" + name + "'");
    }

    void clear_gradients() {
        for (auto* p : parameters()) p->clear_gradient();
    }

    /// Copies every parameter and state buffer into `out`, reusing its buffers.
    void snapshot_into(network_snapshot<T>& out) {
        const std::size_t n = parameters().size() + state_buffers().size();
        out.values.resize(n);
        std::size_t i = 0;
        for (auto* p : parameters_) copy_into(out.values[i++], p->value());
        for (auto* p : state_) copy_into(out.values[i++], p->value());
    }
    network_snapshot<T> snapshot() {
        network_snapshot<T> s;
        snapshot_into(s);
        return s;
    }
    /// Writes a snapshot back; raises model.network.snapshot_mismatch when its
    /// count or a shape differs (and then changes nothing).
    void restore(const network_snapshot<T>& s) {
        const std::size_t n = parameters().size() + state_buffers().size();
        if (s.values.size() != n) {
            raise(codes::model_network_snapshot_mismatch,
                  "network restore: the snapshot holds " + std::to_string(s.values.size()) + " matrices, the network has " + std::to_string(n));
        }
        for (std::size_t i = 0; i < n; ++i) {
            parameter<T>* p = i < parameters_.size() ? parameters_[i] : state_[i - parameters_.size()];
            if (shape_of(s.values[i]) != p->shape()) {
                raise(codes::model_network_snapshot_mismatch,
                      "network restore: snapshot entry " + std::to_string(i) + " has shape " + to_string(shape_of(s.values[i])) + ", parameter '" +
                          p->name() + "' has " + to_string(p->shape()));
            }
        }
        for (std::size_t i = 0; i < n; ++i) {
            parameter<T>* p = i < parameters_.size() ? parameters_[i] : state_[i - parameters_.size()];
            p->assign(s.values[i]);
        }
    }

    /// The architecture as one record of kind "network" with the layers as children.
    layer_record describe() const {
        layer_record r;
        r.kind = "network";
        chain_.describe_into(r.children);
        return r;
    }
    std::vector<std::uint8_t> architecture_bytes() const { return to_bytes(describe()); }

private:
    detail::layer_chain<T> chain_;
    run_mode mode_ = run_mode::training;
    std::vector<parameter<T>*> parameters_;
    std::vector<parameter<T>*> state_;
};

/// Rebuilds a layer from its record (weights zero, gains one, population
/// estimates at their initial values). Raises model.record.unknown_kind for
/// an unknown kind and model.record.missing_field for a missing option.
template <class T>
std::unique_ptr<layer<T>> make_layer(const layer_record& r) {
    std::unique_ptr<layer<T>> l;
    if (r.kind == "dense") {
        l = std::make_unique<dense<T>>(r.count("inputs"), r.count("outputs"), r.number("bias") != 0.0);
    } else if (r.kind == "activation") {
        l = std::make_unique<activation_layer<T>>(parse_activation(r.text("function")), r.number("coefficient"));
    } else if (r.kind == "dropout") {
        l = std::make_unique<dropout<T>>(r.number("rate"), static_cast<std::uint64_t>(r.count("seed")));
    } else if (r.kind == "layer_norm") {
        l = std::make_unique<layer_norm<T>>(r.count("width"), r.number("epsilon"));
    } else if (r.kind == "batch_norm") {
        // Records written before the coefficient was named batch_weight call it "momentum".
        const double batch_weight = r.has("batch_weight") || !r.has("momentum") ? r.number("batch_weight") : r.number("momentum");
        l = std::make_unique<batch_norm<T>>(r.count("width"), batch_weight, r.number("epsilon"));
    } else if (r.kind == "residual") {
        auto block = std::make_unique<residual<T>>();
        for (const auto& c : r.children) block->add(make_layer<T>(c), c.name);
        l = std::move(block);
    } else if (r.kind == "linear_bypass") {
        auto block = std::make_unique<linear_bypass<T>>(r.count("inputs"), r.count("outputs"));
        for (const auto& c : r.children) block->add(make_layer<T>(c), c.name);
        l = std::move(block);
    } else {
        raise(codes::model_record_unknown_kind,
              "layer record '" + r.name + "': kind '" + r.kind +
                  "' is not known (dense, activation, dropout, layer_norm, batch_norm, residual, linear_bypass)");
    }
    l->set_name(r.name);
    return l;
}

/// Rebuilds a network from the record network::describe() gave.
template <class T>
network<T> make_network(const layer_record& r) {
    if (r.kind != "network") {
        raise(codes::model_record_unknown_kind, "network record: expected kind 'network', got '" + r.kind + "'");
    }
    network<T> net;
    for (const auto& c : r.children) net.add(make_layer<T>(c), c.name);
    return net;
}

/// Rebuilds a network from network::architecture_bytes().
template <class T>
network<T> network_from_bytes(const std::vector<std::uint8_t>& bytes) {
    return make_network<T>(record_from_bytes(bytes));
}

/// A multilayer perceptron: dense layers of the given sizes (sizes[0] is the
/// input width), `hidden` after every dense layer but the last and `output`
/// after the last (identity adds no layer). Dense layers are named hidden1,
/// hidden2, ..., output; their activations hidden1_act, ..., output_act.
/// Weights are drawn in layer order from one engine seeded with `seed`;
/// biases start at zero. With `linear_path` (and at least one hidden layer)
/// the dense layers sit in a linear_bypass named "bypass" (their parameters
/// are then "bypass.hidden1.weights", ...; the path's weights start at zero)
/// and the output activation follows the block.
template <class T>
network<T> make_mlp(const std::vector<std::size_t>& sizes, activation hidden, initializer weights_init, std::uint64_t seed,
                    activation output = activation::identity, bool linear_path = false) {
    if (sizes.size() < 2) {
        raise(codes::model_layer_option, "make_mlp: needs at least an input and an output size, got " + std::to_string(sizes.size()) + " size(s)");
    }
    random_engine engine(seed);
    network<T> net;
    const bool bypass = linear_path && sizes.size() > 2;
    std::unique_ptr<linear_bypass<T>> block;
    if (bypass) block = std::make_unique<linear_bypass<T>>(sizes.front(), sizes.back());
    for (std::size_t i = 0; i + 1 < sizes.size(); ++i) {
        const bool last = i + 2 == sizes.size();
        const std::string name = last ? std::string("output") : "hidden" + std::to_string(i + 1);
        const activation a = last ? output : hidden;
        if (bypass) {
            block->add(dense<T>(sizes[i], sizes[i + 1], engine, weights_init), name);
            if (!last && a != activation::identity) block->add(activation_layer<T>(a), name + "_act");
            if (last) net.add(std::move(block), "bypass");
            if (last && a != activation::identity) net.add(activation_layer<T>(a), name + "_act");
            continue;
        }
        net.add(dense<T>(sizes[i], sizes[i + 1], engine, weights_init), name);
        if (a != activation::identity) net.add(activation_layer<T>(a), name + "_act");
    }
    return net;
}

TENON_NAMESPACE_END
