// tenon: the update rules. In each, g is the transformed gradient element
// (clipping and coupled weight decay applied, see update_rule.hpp), w the
// weight, lr the learning rate and t the step number (1 for the first).
#pragma once

#include <cmath>
#include <cstddef>

#include "tenon/core/simd.hpp"
#include "tenon/update/update_rule.hpp"

TENON_NAMESPACE_BEGIN

/// w <- w - lr g (Robbins & Monro 1951, "A Stochastic Approximation Method").
template <class T>
class gradient_descent : public update_rule<T> {
public:
    explicit gradient_descent(const update_options<T>& options = {}) : update_rule<T>(options, 0) {}
    const char* kind() const noexcept override { return "gradient_descent"; }
    const char* buffer_name(std::size_t) const noexcept override { return ""; }

protected:
    bool treats_elements_independently() const noexcept override { return true; }
    void update_parameter(T* w, const T* g, T* const*, std::size_t n, T lr, const gradient_transform<T>& f) override {
        for (std::size_t k = 0; k < n; ++k) w[k] -= lr * f(g[k], w[k]);
    }
};

template <class T>
struct momentum_options {
    T coefficient = T(0.9);  // mu; 0.9 is common practice
    bool nesterov = false;
};

/// Classical momentum (Sutskever, Martens, Dahl & Hinton 2013, "On the
/// importance of initialization and momentum in deep learning", eqs. 1-2):
///   v <- mu v - lr g(w),  w <- w + v.
/// Nesterov momentum (same paper, eqs. 3-4) evaluates the gradient at the
/// look-ahead point w + mu v; with the change of variables of Bengio,
/// Boulanger-Lewandowski & Pascanu 2013 ("Advances in optimizing recurrent
/// networks", section 3.5) it needs only the gradient at the stored weights:
///   v <- mu v - lr g(w),  w <- w + mu v - lr g(w).
template <class T>
class momentum : public update_rule<T> {
public:
    explicit momentum(const momentum_options<T>& m = {}, const update_options<T>& options = {}) : update_rule<T>(options, 1), m_(m) {
        detail::check_option("momentum", "coefficient", static_cast<double>(m.coefficient), m.coefficient >= T(0) && m.coefficient < T(1),
                             "in [0, 1)");
    }
    const char* kind() const noexcept override { return m_.nesterov ? "nesterov" : "momentum"; }
    const char* buffer_name(std::size_t) const noexcept override { return "velocity"; }
    const momentum_options<T>& settings() const noexcept { return m_; }

protected:
    bool treats_elements_independently() const noexcept override { return true; }
    void update_parameter(T* w, const T* g, T* const* buffers, std::size_t n, T lr, const gradient_transform<T>& f) override {
        T* v = buffers[0];
        const T mu = m_.coefficient;
        for (std::size_t k = 0; k < n; ++k) {
            const T step = lr * f(g[k], w[k]);
            v[k] = mu * v[k] - step;
            w[k] += m_.nesterov ? mu * v[k] - step : v[k];
        }
    }

private:
    momentum_options<T> m_;
};

namespace detail {

#if TENON_SIMD_X86 || TENON_SIMD_NEON64
// Adam's pass (see adam below) over the first multiple-of-the-vector-width
// elements with AVX-512F or AVX2 vectors (NEON on aarch64). The same operations in the same
// order as the scalar loop, each correctly rounded (IEEE 754 multiply, add,
// divide and square root; no fused multiply-add), so the result is
// bit-identical to the scalar loop; only the speed changes. With `clear`
// (g itself, writable) each gradient element is set to zero once read.
// Returns the number of elements done.
#define TENON_ADAM_VECTOR_PASS(NAME, TARGET, OPS)                                                                                                    \
    template <class T>                                                                                                                               \
    TARGET TENON_NO_CONTRACTION std::size_t NAME(T* w, const T* g, T* m, T* v, std::size_t n, const gradient_transform<T>& f, T b1, T b2,            \
                                                 T step_rate, T step_epsilon, T decay, bool& finite, T* clear) noexcept {                            \
        using ops = OPS<T>;                                                                                                                          \
        using vector = typename ops::vector;                                                                                                         \
        const vector norm_scale = ops::broadcast(f.norm_scale), weight_decay = ops::broadcast(f.weight_decay);                                       \
        const vector high = ops::broadcast(f.clip_value), low = ops::broadcast(-f.clip_value);                                                       \
        const bool clipping = f.clip_value > T(0);                                                                                                   \
        const vector vb1 = ops::broadcast(b1), vb2 = ops::broadcast(b2);                                                                             \
        const vector rest1 = ops::broadcast(T(1) - b1), rest2 = ops::broadcast(T(1) - b2);                                                           \
        const vector rate = ops::broadcast(step_rate), veps = ops::broadcast(step_epsilon), vdecay = ops::broadcast(decay);                          \
        const vector zero = ops::zero();                                                                                                             \
        vector scan = ops::zero(); /* sums raw g * 0: NaN once a raw gradient is not finite */                                                       \
        std::size_t k = 0;                                                                                                                           \
        for (; k + ops::lanes <= n; k += ops::lanes) {                                                                                               \
            const vector wk = ops::load(w + k);                                                                                                      \
            const vector raw = ops::load(g + k);                                                                                                     \
            if (clear) ops::store(clear + k, zero); /* the gradient itself, cleared once read */                                                     \
            scan = ops::add(scan, ops::mul(raw, zero));                                                                                              \
            vector gk = ops::mul(raw, norm_scale);                                                                                                   \
            /* std::min(std::max(g, -c), c), NaN passing through as there */                                                                         \
            if (clipping) gk = ops::min(high, ops::max(low, gk));                                                                                    \
            gk = ops::add(gk, ops::mul(weight_decay, wk));                                                                                           \
            const vector mk = ops::add(ops::mul(vb1, ops::load(m + k)), ops::mul(rest1, gk));                                                        \
            const vector vk = ops::add(ops::mul(vb2, ops::load(v + k)), ops::mul(ops::mul(rest2, gk), gk));                                          \
            ops::store(m + k, mk);                                                                                                                   \
            ops::store(v + k, vk);                                                                                                                   \
            const vector step = ops::div(ops::mul(rate, mk), ops::add(ops::sqrt(vk), veps));                                                         \
            ops::store(w + k, ops::sub(wk, ops::add(step, ops::mul(vdecay, wk))));                                                                   \
        }                                                                                                                                            \
        T lanes[ops::lanes];                                                                                                                         \
        ops::store(lanes, scan);                                                                                                                     \
        for (std::size_t l = 0; l < ops::lanes; ++l) finite = finite && lanes[l] == lanes[l];                                                        \
        return k;                                                                                                                                    \
    }
#if TENON_SIMD_X86
TENON_ADAM_VECTOR_PASS(adam_pass_avx512, TENON_TARGET_AVX512, avx512_ops)
TENON_ADAM_VECTOR_PASS(adam_pass_avx2, TENON_TARGET_AVX2, avx2_ops)
#else
TENON_ADAM_VECTOR_PASS(adam_pass_neon, TENON_TARGET_NEON, neon_ops)
#endif
#undef TENON_ADAM_VECTOR_PASS
#endif

}  // namespace detail

template <class T>
struct adam_options {
    // Defaults of Kingma & Ba 2015, Algorithm 1.
    T beta1 = T(0.9);
    T beta2 = T(0.999);
    T epsilon = T(1e-8);
    /// Decoupled weight decay lambda (AdamW); 0 for plain Adam.
    T decoupled_weight_decay = T(0);
};

/// Adam (Kingma & Ba 2015, "Adam: A Method for Stochastic Optimization",
/// Algorithm 1, with bias correction):
///   m <- b1 m + (1 - b1) g,   v <- b2 v + (1 - b2) g^2,
///   w <- w - lr (m / (1 - b1^t)) / (sqrt(v / (1 - b2^t)) + eps),
/// computed in the reordered form the paper gives at the end of its
/// section 2 (one division and one square root per weight instead of
/// three divisions and a square root):
///   lr_t = lr sqrt(1 - b2^t) / (1 - b1^t),  eps_t = eps sqrt(1 - b2^t),
///   w <- w - lr_t m / (sqrt(v) + eps_t).
/// The two forms are equal in exact arithmetic (multiply numerator and
/// denominator by sqrt(1 - b2^t)); in floating point they differ by a few
/// roundings (tests/test_update.cpp compares them).
/// With decoupled_weight_decay = lambda this is AdamW (Loshchilov & Hutter
/// 2019, "Decoupled Weight Decay Regularization", Algorithm 2, line 12):
/// additionally w <- w - lr lambda w, with the decay outside the moments. The
/// paper multiplies lambda by the schedule multiplier eta_t alone; here it is
/// multiplied by the learning rate given to apply() (common practice), so
/// lambda is relative to the learning rate.
template <class T>
class adam : public update_rule<T> {
public:
    explicit adam(const adam_options<T>& a = {}, const update_options<T>& options = {}) : update_rule<T>(options, 2), a_(a) {
        detail::check_option("adam", "beta1", static_cast<double>(a.beta1), a.beta1 >= T(0) && a.beta1 < T(1), "in [0, 1)");
        detail::check_option("adam", "beta2", static_cast<double>(a.beta2), a.beta2 >= T(0) && a.beta2 < T(1), "in [0, 1)");
        detail::check_option("adam", "epsilon", static_cast<double>(a.epsilon), a.epsilon > T(0), "positive");
        detail::check_option("adam", "decoupled_weight_decay", static_cast<double>(a.decoupled_weight_decay), a.decoupled_weight_decay >= T(0),
                             "finite and non-negative");
    }
    const char* kind() const noexcept override { return a_.decoupled_weight_decay > T(0) ? "adamw" : "adam"; }
    const char* buffer_name(std::size_t buffer) const noexcept override { return buffer == 0 ? "first_moment" : "second_moment"; }
    const adam_options<T>& settings() const noexcept { return a_; }

protected:
    void update_parameter(T* w, const T* g, T* const* buffers, std::size_t n, T lr, const gradient_transform<T>& f) override {
        pass(w, g, buffers, n, lr, f, nullptr);
    }
    void update_and_clear(T* w, T* g, T* const* buffers, std::size_t n, T lr, const gradient_transform<T>& f) override {
        pass(w, g, buffers, n, lr, f, g);
    }
    bool treats_elements_independently() const noexcept override { return true; }
    bool scans_gradients_in_pass() const noexcept override { return true; }

private:
    // One pass over the n elements; `clear` is g (writable) when each
    // gradient element is to be set to zero once read, else nullptr.
    TENON_NO_CONTRACTION void pass(T* w, const T* g, T* const* buffers, std::size_t n, T lr, const gradient_transform<T>& f, T* clear) {
        TENON_NO_CONTRACTION_IN_BODY
        T* m = buffers[0];
        T* v = buffers[1];
        const T b1 = a_.beta1, b2 = a_.beta2, decay = lr * a_.decoupled_weight_decay;
        const T rate = step_rate(lr), epsilon = step_epsilon();
        std::size_t k = 0;
        bool finite = true;
#if TENON_SIMD_X86
        if (cpu_has_avx512f()) {
            k = detail::adam_pass_avx512(w, g, m, v, n, f, b1, b2, rate, epsilon, decay, finite, clear);
        } else if (cpu_has_avx2_fma()) {
            k = detail::adam_pass_avx2(w, g, m, v, n, f, b1, b2, rate, epsilon, decay, finite, clear);
        }
#elif TENON_SIMD_NEON64
        k = detail::adam_pass_neon(w, g, m, v, n, f, b1, b2, rate, epsilon, decay, finite, clear);
#endif
        for (; k < n; ++k) {
            finite = finite && std::isfinite(g[k]);
            const T gk = f(g[k], w[k]);
            if (clear) clear[k] = T(0);
            m[k] = b1 * m[k] + (T(1) - b1) * gk;
            v[k] = b2 * v[k] + (T(1) - b2) * gk * gk;
            w[k] -= rate * m[k] / (std::sqrt(v[k]) + epsilon) + decay * w[k];
        }
        if (!finite) this->note_non_finite_gradient();
    }

    // lr_t and eps_t of the current step (see above), rounded once from double.
    T step_rate(T lr) const noexcept {
        const double t = static_cast<double>(this->step_count());
        const double c1 = 1.0 - std::pow(static_cast<double>(a_.beta1), t), c2 = 1.0 - std::pow(static_cast<double>(a_.beta2), t);
        return static_cast<T>(static_cast<double>(lr) * std::sqrt(c2) / c1);
    }
    T step_epsilon() const noexcept {
        const double c2 = 1.0 - std::pow(static_cast<double>(a_.beta2), static_cast<double>(this->step_count()));
        return static_cast<T>(static_cast<double>(a_.epsilon) * std::sqrt(c2));
    }

    adam_options<T> a_;
};

/// AdamW: Adam with decoupled weight decay `lambda` (see adam).
template <class T>
class adamw : public adam<T> {
public:
    explicit adamw(T lambda = T(0.01), adam_options<T> a = {}, const update_options<T>& options = {}) : adam<T>(with_decay(a, lambda), options) {
        detail::check_option("adamw", "decoupled_weight_decay", static_cast<double>(lambda), lambda > T(0), "positive");
    }

private:
    static adam_options<T> with_decay(adam_options<T> a, T lambda) {
        a.decoupled_weight_decay = lambda;
        return a;
    }
};

template <class T>
struct rmsprop_options {
    T decay = T(0.9);  // rho, common practice
    T epsilon = T(1e-8);  // common practice
};

/// RMSprop: divide the gradient by a running root mean square of recent
/// gradients, s <- rho s + (1 - rho) g^2, w <- w - lr g / (sqrt(s) + eps)
/// (described in this uncentred form by Graves 2013, "Generating Sequences
/// With Recurrent Neural Networks", section 4, eqs. 38-41 without the
/// centring term, from memory).
template <class T>
class rmsprop : public update_rule<T> {
public:
    explicit rmsprop(const rmsprop_options<T>& r = {}, const update_options<T>& options = {}) : update_rule<T>(options, 1), r_(r) {
        detail::check_option("rmsprop", "decay", static_cast<double>(r.decay), r.decay >= T(0) && r.decay < T(1), "in [0, 1)");
        detail::check_option("rmsprop", "epsilon", static_cast<double>(r.epsilon), r.epsilon > T(0), "positive");
    }
    const char* kind() const noexcept override { return "rmsprop"; }
    const char* buffer_name(std::size_t) const noexcept override { return "mean_square"; }

protected:
    bool treats_elements_independently() const noexcept override { return true; }
    void update_parameter(T* w, const T* g, T* const* buffers, std::size_t n, T lr, const gradient_transform<T>& f) override {
        T* s = buffers[0];
        const T rho = r_.decay;
        for (std::size_t k = 0; k < n; ++k) {
            const T gk = f(g[k], w[k]);
            s[k] = rho * s[k] + (T(1) - rho) * gk * gk;
            w[k] -= lr * gk / (std::sqrt(s[k]) + r_.epsilon);
        }
    }

private:
    rmsprop_options<T> r_;
};

template <class T>
struct adagrad_options {
    T epsilon = T(1e-10);  // common practice
};

/// Adagrad (Duchi, Hazan & Singer 2011, "Adaptive Subgradient Methods for
/// Online Learning and Stochastic Optimization", JMLR 12, the diagonal
/// update of section 1.1): s <- s + g^2, w <- w - lr g / (sqrt(s) + eps).
template <class T>
class adagrad : public update_rule<T> {
public:
    explicit adagrad(const adagrad_options<T>& a = {}, const update_options<T>& options = {}) : update_rule<T>(options, 1), a_(a) {
        detail::check_option("adagrad", "epsilon", static_cast<double>(a.epsilon), a.epsilon > T(0), "positive");
    }
    const char* kind() const noexcept override { return "adagrad"; }
    const char* buffer_name(std::size_t) const noexcept override { return "sum_of_squares"; }

protected:
    bool treats_elements_independently() const noexcept override { return true; }
    void update_parameter(T* w, const T* g, T* const* buffers, std::size_t n, T lr, const gradient_transform<T>& f) override {
        T* s = buffers[0];
        for (std::size_t k = 0; k < n; ++k) {
            const T gk = f(g[k], w[k]);
            s[k] += gk * gk;
            w[k] -= lr * gk / (std::sqrt(s[k]) + a_.epsilon);
        }
    }

private:
    adagrad_options<T> a_;
};

TENON_NAMESPACE_END
