// tenon: trainable parameters.
//
// A parameter outlives every step: its value is what training changes and its
// gradient is where backward passes accumulate. Per-step values (inputs,
// activations) live on the tape instead and are recycled every step.
#pragma once

#include <algorithm>
#include <string>
#include <utility>

#include "tenon/core/matrix.hpp"

TENON_NAMESPACE_BEGIN

template <class T>
class parameter {
    TENON_REQUIRE_SCALAR(T);

public:
    parameter() = default;
    parameter(std::string name, shape2 shape) : name_(std::move(name)), value_({shape.rows, shape.cols}), grad_({shape.rows, shape.cols}) {
        value_.fill(T(0));
        grad_.fill(T(0));
    }
    parameter(std::string name, matrix<T> value) : name_(std::move(name)), value_(std::move(value)), grad_({value_.shape()[0], value_.shape()[1]}) {
        grad_.fill(T(0));
    }

    const std::string& name() const noexcept { return name_; }
    void set_name(std::string name) { name_ = std::move(name); }

    shape2 shape() const noexcept { return shape_of(value_); }
    std::size_t size() const noexcept { return value_.size(); }

    matrix<T>& value() noexcept { return value_; }
    const matrix<T>& value() const noexcept { return value_; }

    /// Accumulated gradient; backward passes add to it, clear_gradient() clears it.
    matrix<T>& grad() noexcept { return grad_; }
    const matrix<T>& grad() const noexcept { return grad_; }

    void clear_gradient() noexcept { std::fill(grad_.data(), grad_.data() + grad_.size(), T(0)); }

    /// Frozen parameters take part in the forward pass but receive no gradient.
    bool trainable() const noexcept { return trainable_; }
    void set_trainable(bool on) noexcept { trainable_ = on; }

    /// Replaces the value, keeping the shape (throws core.shape.mismatch otherwise).
    void assign(const matrix<T>& value) {
        require_shape(shape_of(value), shape(), "parameter '" + name_ + "' assign");
        std::copy(value.data(), value.data() + value.size(), value_.data());
    }

private:
    std::string name_;
    matrix<T> value_;
    matrix<T> grad_;
    bool trainable_ = true;
};

TENON_NAMESPACE_END
