// tenon: the extension point for operations a host defines itself.
//
// Derive from custom_operation<T>, implement the output shape, the forward
// computation and the backward one, and record it with tape::apply(). The tape
// owns nothing of the operation: it must outlive every tape that records it.
#pragma once

#include <cstddef>

#include "tenon/core/matrix.hpp"

TENON_NAMESPACE_BEGIN

/// The inputs of a custom operation, in the order they were given to apply().
template <class T>
struct operand_list {
    const matrix<T>* const* items = nullptr;
    std::size_t count = 0;

    std::size_t size() const noexcept { return count; }
    const matrix<T>& operator[](std::size_t i) const noexcept { return *items[i]; }
};

template <class T>
class custom_operation {
public:
    virtual ~custom_operation() = default;

    /// Short name used in error messages and finite-check reports.
    virtual const char* name() const noexcept = 0;

    /// Shape of the output for the given inputs; throw tenon::error (for
    /// instance core.shape.mismatch via require_shape) if they do not fit.
    virtual shape2 output_shape(const operand_list<T>& inputs) const = 0;

    /// Writes the output; `output` already has the shape output_shape() gave.
    virtual void forward(const operand_list<T>& inputs, matrix<T>& output) const = 0;

    /// Adds d(loss)/d(input i) into *input_grads[i] for every i whose pointer
    /// is not null (inputs that need no gradient get null). `output_grad` is
    /// d(loss)/d(output). Accumulate with +=: an input may feed several uses.
    virtual void backward(const operand_list<T>& inputs, const matrix<T>& output, const matrix<T>& output_grad,
                          matrix<T>* const* input_grads) const = 0;
};

TENON_NAMESPACE_END
