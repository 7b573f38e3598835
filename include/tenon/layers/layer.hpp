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
#include "tenon/format/architecture.hpp"

TENON_NAMESPACE_BEGIN

/// Training mode uses batch statistics and dropout; inference mode uses
/// population estimates and passes values through dropout unchanged.
enum class run_mode : std::uint8_t { training, inference };

/// The interface every layer implements.
template <class T>
class layer {
    TENON_REQUIRE_SCALAR(T);

public:
    layer() = default;
    layer(const layer&) = delete;
    layer& operator=(const layer&) = delete;
    virtual ~layer() = default;

    /// Records the layer's computation on `t` and returns its output. In
    /// inference mode on a tape recording for inference only
    /// (tape::set_inference_only) it must change nothing in the layer: that
    /// is what lets a const network be evaluated (network::infer).
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
            raise(codes::core_shape_mismatch,
                  std::string(kind()) + " layer '" + qualified_name() + "' input: expected " + std::to_string(expected) + " columns, got " +
                      std::to_string(actual));
        }
    }

private:
    std::string name_;
    std::string prefix_;
};

TENON_NAMESPACE_END
