// tenon: the update-rule interface, gradient clipping and weight decay, and
// the rule's state as bytes.
//
// apply(parameters, learning_rate) makes one pass over each trainable
// parameter; each gradient element is first clipped (by global norm, Pascanu,
// Mikolov & Bengio 2013, Algorithm 1, and by value) and given coupled L2
// weight decay. The state (step count, per-parameter buffers) is laid out at
// the first apply, reused so steps allocate nothing, and saved and restored
// bit for bit. On an executor the bits do not depend on the thread count;
// subnormals are flushed. The details and why: docs/design/update.md.
#pragma once

#include <algorithm>
#include <atomic>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <string>
#include <vector>

#include "tenon/autodiff/parameter.hpp"
#include "tenon/core/bytes.hpp"
#include "tenon/core/elementwise.hpp"
#include "tenon/core/gemm.hpp"
#include "tenon/core/parallel.hpp"
#include "tenon/core/simd.hpp"

TENON_NAMESPACE_BEGIN

template <class T>
struct update_options {
    /// Coupled L2 weight decay: adds weight_decay * w to each gradient.
    T weight_decay = T(0);
    /// Largest global L2 norm of all gradients together; 0 turns it off.
    T clip_global_norm = T(0);
    /// Largest magnitude of each gradient element; 0 turns it off.
    T clip_value = T(0);
};

/// The per-element gradient transform (clipping and coupled decay).
template <class T>
struct gradient_transform {
    T norm_scale = T(1);
    T clip_value = T(0);
    T weight_decay = T(0);

    T operator()(T g, T w) const noexcept {
        g *= norm_scale;
        if (clip_value > T(0)) g = std::min(std::max(g, -clip_value), clip_value);
        return g + weight_decay * w;
    }
};

namespace detail {
inline constexpr std::uint32_t update_state_magic = 0x556E6574u;  // "teNU": tenon update state
inline constexpr std::uint8_t update_state_format = 1;

inline void check_option(const char* rule, const char* option, double value, bool ok, const char* range) {
    if (!ok || !std::isfinite(value)) {
        raise(codes::model_update_option, std::string(rule) + ": " + option + " must be " + range + ", got " + std::to_string(value));
    }
}
}  // namespace detail

template <class T>
class update_rule {
    TENON_REQUIRE_SCALAR(T);

public:
    virtual ~update_rule() = default;

    /// Short name, e.g. "adam"; saved with the state and checked on load.
    virtual const char* kind() const noexcept = 0;
    /// Name of state buffer number `buffer`, e.g. "first_moment".
    virtual const char* buffer_name(std::size_t buffer) const noexcept = 0;

    /// One update of every trainable parameter with the given learning rate.
    void apply(const std::vector<parameter<T>*>& params, T learning_rate) {
        detail::check_option(kind(), "the learning rate", static_cast<double>(learning_rate), learning_rate >= T(0), "finite and non-negative");
        prepare(params);
        gradient_transform<T> transform;
        transform.clip_value = options_.clip_value;
        transform.weight_decay = options_.weight_decay;
        if (options_.clip_global_norm > T(0)) {
            double squares = 0.0;
            for (const auto* p : params) {
                if (!p->trainable()) continue;
                const T* g = p->grad().data();
                for (std::size_t k = 0; k < p->size(); ++k) squares += static_cast<double>(g[k]) * static_cast<double>(g[k]);
            }
            const double norm = std::sqrt(squares);
            const double limit = static_cast<double>(options_.clip_global_norm);
            if (norm > limit) transform.norm_scale = static_cast<T>(limit / norm);
        }
        ++step_;
        const flush_subnormals_scope flush;
        if (workers_ && workers_->concurrency() > 1 && treats_elements_independently()) {
            // Row bands of every trainable parameter, band b for task b: the
            // rows whose gradient the product split across the same threads
            // computed there (core/gemm.hpp), so that a thread updates the
            // same rows of a weight in every step, and the threads write far
            // apart. A parameter under piece_elements values goes whole to
            // task 0 (the calling thread's in a thread_pool), as its gradient
            // product stays on the calling thread.
            const std::size_t threads = workers_->concurrency();
            const kernel_path path = active_kernel_path();
            pieces_.clear();  // keeps its capacity: no allocation after the first step
            for (std::size_t i = 0; i < params.size(); ++i) {
                if (!params[i]->trainable()) continue;
                const shape2 shape = params[i]->shape();
                if (shape.size() < piece_elements) {
                    pieces_.push_back(piece{i, 0, shape.size(), 0});
                    continue;
                }
                const auto bands = detail::gemm_split<T>::rows_of(shape.rows, path, threads);
                for (std::size_t b = 0; b < bands.parts; ++b)
                    pieces_.push_back(piece{i, bands.edge(b) * shape.cols, bands.edge(b + 1) * shape.cols, b});
            }
            piece_run run{this, &params, learning_rate, transform};
            workers_->run(threads, &update_rule::run_task, &run);
            if (run.failed) raise(codes::core_argument_invalid, std::string(kind()) + " update rule: a piece of the update failed");
            return;
        }
        T* buffers[max_buffers] = {};
        for (std::size_t i = 0; i < params.size(); ++i) {
            parameter<T>& p = *params[i];
            if (!p.trainable()) continue;
            T* g = p.grad().data();
            // When clearing, a piece at a time: its gradient is cleared while still in cache.
            const std::size_t step = clears_gradients_ && treats_elements_independently() ? piece_elements : p.size();
            for (std::size_t first = 0; first < p.size(); first += step) {
                const std::size_t n = std::min(step, p.size() - first);
                for (std::size_t s = 0; s < buffer_count_; ++s) buffers[s] = buffers_[i * buffer_count_ + s].data() + first;
                if (clears_gradients_) {
                    update_and_clear(p.value().data() + first, g + first, buffers, n, learning_rate, transform);
                } else {
                    update_parameter(p.value().data() + first, g + first, buffers, n, learning_rate, transform);
                }
            }
        }
    }

    /// apply(), also telling whether every trainable gradient was finite
    /// (no NaN, no infinity). A rule that looks at each gradient element in
    /// its own pass (adam, adamw) finds out there, without reading the
    /// gradients a second time; for the others the gradients are scanned
    /// first. When this returns false the update may have been applied in
    /// part: the weights and the rule's state must be restored from a
    /// snapshot (the trainer's divergence guard does).
    bool apply_and_check(const std::vector<parameter<T>*>& params, T learning_rate) {
        if (!scans_gradients_in_pass()) {
            for (const auto* p : params)
                if (p->trainable() && detail::first_non_finite(p->grad().data(), p->grad().size()) != p->grad().size()) return false;
            apply(params, learning_rate);
            return true;
        }
        non_finite_seen_.store(false, std::memory_order_relaxed);
        apply(params, learning_rate);
        return !non_finite_seen_.load(std::memory_order_relaxed);
    }

    /// Runs later apply() calls on these workers (nullptr: the calling thread
    /// alone); see docs/design/update.md, "Threads". Must outlive its use.
    void set_executor(executor* workers) noexcept { workers_ = workers; }
    executor* workers() const noexcept { return workers_; }

    /// When on, apply() sets each trainable parameter's gradient to zero
    /// as it updates it (update_and_clear), so the next backward pass can
    /// accumulate into it without a clearing pass of its own (the trainer's
    /// steps; the pass was about 1.5% of a Fashion-MNIST epoch). The update
    /// itself is unchanged. Off by default.
    void set_clears_gradients(bool on) noexcept { clears_gradients_ = on; }
    bool clears_gradients() const noexcept { return clears_gradients_; }
    /// On several threads: a parameter with fewer values is updated whole by
    /// the calling thread, a larger one in bands of rows; either is updated
    /// this many values at a time.
    static constexpr std::size_t piece_elements = 16384;

    /// Number of apply() calls since construction, reset() or the loaded state.
    std::uint64_t step_count() const noexcept { return step_; }
    /// State buffers per parameter.
    std::size_t buffer_count() const noexcept { return buffer_count_; }
    /// Number of parameters the state is laid out for (0 before the first apply).
    std::size_t parameter_count() const noexcept { return shapes_.size(); }
    /// State buffer number `buffer_index` of parameter `index` (same shape as the parameter).
    const matrix<T>& buffer(std::size_t index, std::size_t buffer_index) const {
        if (buffer_index >= buffer_count_ || index >= parameter_count()) {
            raise(codes::core_argument_invalid,
                  std::string(kind()) + ": state buffer " + std::to_string(buffer_index) + " of parameter " + std::to_string(index) +
                      " does not exist (" + std::to_string(buffer_count_) + " buffers, " + std::to_string(parameter_count()) + " parameters)");
        }
        return buffers_[index * buffer_count_ + buffer_index];
    }

    const update_options<T>& options() const noexcept { return options_; }

    /// Forgets the step counter and all state buffers.
    void reset() noexcept {
        step_ = 0;
        buffers_.clear();
        shapes_.clear();
        laid_out_ = false;
    }

    /// The complete state as bytes (kind, step, shapes, every buffer value).
    std::vector<std::uint8_t> save_state() const {
        std::vector<std::uint8_t> out;
        byte_writer w(out);
        w.u32(detail::update_state_magic);
        w.u8(detail::update_state_format);
        w.text(kind());
        w.u64(step_);
        w.u8(laid_out_ ? 1 : 0);
        w.u32(static_cast<std::uint32_t>(buffer_count_));
        w.u32(static_cast<std::uint32_t>(shapes_.size()));
        for (std::size_t i = 0; i < shapes_.size(); ++i) {
            w.u64(shapes_[i].rows);
            w.u64(shapes_[i].cols);
            for (std::size_t s = 0; s < buffer_count_; ++s) {
                const matrix<T>& m = buffers_[i * buffer_count_ + s];
                for (std::size_t k = 0; k < m.size(); ++k) w.f64(static_cast<double>(m.data()[k]));
            }
        }
        return out;
    }

    /// The state in memory (step counter, layout, every buffer value) for
    /// returning to it later in the same process, e.g. the trainer's
    /// start-of-epoch point. Nothing is encoded, and copying again into the
    /// same object reuses its buffers (no allocation once they are sized);
    /// save_state() is the form to store or send.
    struct state_copy {
        std::uint64_t step = 0;
        bool laid_out = false;
        std::size_t buffer_count = 0;
        std::vector<shape2> shapes;
        std::vector<matrix<T>> buffers;
    };
    void copy_state_into(state_copy& c) const {
        c.shapes.assign(shapes_.begin(), shapes_.end());
        c.buffers.resize(buffers_.size());
        for (std::size_t i = 0; i < buffers_.size(); ++i) {
            ensure_shape(c.buffers[i], shape_of(buffers_[i]));
            std::copy(buffers_[i].data(), buffers_[i].data() + buffers_[i].size(), c.buffers[i].data());
        }
        c.step = step_;
        c.laid_out = laid_out_;
        c.buffer_count = buffer_count_;
    }
    /// Returns to a state from copy_state_into() of a rule with the same
    /// buffers (model.update.state_mismatch otherwise). With the layout the
    /// rule already has, the values are copied in place; otherwise the new
    /// layout is built aside first, so a failure leaves the rule as it was.
    void restore_state(const state_copy& c) {
        if (c.buffer_count != buffer_count_ || c.buffers.size() != c.shapes.size() * buffer_count_) {
            raise(codes::model_update_state_mismatch,
                  std::string(kind()) + " update rule: a state copy with " + std::to_string(c.buffer_count) +
                      " buffers per parameter, the rule has " + std::to_string(buffer_count_));
        }
        for (std::size_t i = 0; i < c.buffers.size(); ++i) {
            if (shape_of(c.buffers[i]) != c.shapes[i / buffer_count_]) {
                raise(codes::model_update_state_mismatch,
                      std::string(kind()) + " update rule: buffer " + std::to_string(i % buffer_count_) + " of parameter " +
                          std::to_string(i / buffer_count_) + " in a state copy has shape " + to_string(shape_of(c.buffers[i])) + ", its parameter " +
                          to_string(c.shapes[i / buffer_count_]));
            }
        }
        if (c.shapes == shapes_) {
            for (std::size_t i = 0; i < buffers_.size(); ++i)
                std::copy(c.buffers[i].data(), c.buffers[i].data() + c.buffers[i].size(), buffers_[i].data());
        } else {
            std::vector<shape2> shapes(c.shapes);
            std::vector<matrix<T>> buffers(c.buffers);
            shapes_.swap(shapes);
            buffers_.swap(buffers);
        }
        step_ = c.step;
        laid_out_ = c.laid_out;
    }

    /// Restores a state written by save_state() of a rule of the same kind.
    /// Raises model.update.state_mismatch for another kind or buffer layout and
    /// model.record.truncated / model.record.malformed for damaged bytes; on
    /// error the rule keeps its previous state.
    void load_state(const std::vector<std::uint8_t>& bytes) {
        byte_reader in(bytes, std::string(kind()) + " update rule state");
        if (in.u32() != detail::update_state_magic) in.fail("not tenon update rule state (bad magic)");
        const std::uint8_t format = in.u8();
        if (format != detail::update_state_format) in.fail("state format " + std::to_string(format) + " is not supported");
        const std::string saved_kind = in.text();
        if (saved_kind != kind()) {
            raise(codes::model_update_state_mismatch, std::string(kind()) + " update rule: the state was saved by a '" + saved_kind + "' rule");
        }
        const std::uint64_t step = in.u64();
        const std::uint8_t laid_out = in.u8();
        if (laid_out > 1) in.fail("layout flag " + std::to_string(laid_out) + " is not 0 or 1");
        const std::uint32_t buffer_count = in.u32();
        if (buffer_count != buffer_count_) {
            raise(codes::model_update_state_mismatch,
                  std::string(kind()) + " update rule: the state has " + std::to_string(buffer_count) + " buffers per parameter, the rule uses " +
                      std::to_string(buffer_count_));
        }
        const std::size_t count = in.count(16, "parameters");
        std::vector<shape2> shapes;
        std::vector<matrix<T>> buffers;
        shapes.reserve(count);
        buffers.reserve(count * buffer_count_);
        for (std::size_t i = 0; i < count; ++i) {
            const auto sides = in.matrix_sides(8 * buffer_count_, ("parameter " + std::to_string(i)).c_str());
            const shape2 s{sides.first, sides.second};
            shapes.push_back(s);
            for (std::size_t k = 0; k < buffer_count_; ++k) {
                matrix<T> m({s.rows, s.cols});
                for (std::size_t e = 0; e < m.size(); ++e) m.data()[e] = static_cast<T>(in.f64());
                buffers.push_back(std::move(m));
            }
        }
        if (!in.at_end()) in.fail(std::to_string(in.remaining()) + " bytes follow the state");
        step_ = step;
        shapes_ = std::move(shapes);
        buffers_ = std::move(buffers);
        laid_out_ = laid_out == 1;
    }

protected:
    static constexpr std::size_t max_buffers = 4;

    update_rule(const update_options<T>& options, std::size_t buffer_count) : options_(options), buffer_count_(buffer_count) {
        detail::check_option("update rule", "weight_decay", static_cast<double>(options.weight_decay), options.weight_decay >= T(0),
                             "finite and non-negative");
        detail::check_option("update rule", "clip_global_norm", static_cast<double>(options.clip_global_norm), options.clip_global_norm >= T(0),
                             "finite and non-negative (0: off)");
        detail::check_option("update rule", "clip_value", static_cast<double>(options.clip_value), options.clip_value >= T(0),
                             "finite and non-negative (0: off)");
    }

    /// Updates `n` weights `w` in place from the raw gradient `g` (pass each
    /// element through `transform(g[k], w[k])`); buffers[s] points to the n
    /// values of state buffer s for this parameter. step_count() is already
    /// the number of this step (1 for the first).
    virtual void update_parameter(T* w, const T* g, T* const* buffers, std::size_t n, T learning_rate, const gradient_transform<T>& transform) = 0;

    /// update_parameter(), then g[0..n) set to zero (apply() with
    /// set_clears_gradients(true)). A rule may override it to clear each
    /// gradient element in its own pass, right after reading it (adam does).
    virtual void update_and_clear(T* w, T* g, T* const* buffers, std::size_t n, T learning_rate, const gradient_transform<T>& transform) {
        update_parameter(w, g, buffers, n, learning_rate, transform);
        std::fill(g, g + n, T(0));
    }

    /// Whether update_parameter() may be called on any part of a parameter
    /// (elements [first, last) with the matching parts of its buffers) with the
    /// same result per element; true lets apply() use several threads.
    virtual bool treats_elements_independently() const noexcept { return false; }

    /// Whether update_parameter() calls note_non_finite_gradient() when a
    /// raw gradient element (before the transform) is NaN or infinite.
    virtual bool scans_gradients_in_pass() const noexcept { return false; }
    /// For update_parameter(): a raw gradient element was not finite (safe
    /// from several threads at once).
    void note_non_finite_gradient() noexcept { non_finite_seen_.store(true, std::memory_order_relaxed); }

private:
    struct piece {
        std::size_t parameter_index, first, last, task;
    };
    struct piece_run {
        update_rule* rule;
        const std::vector<parameter<T>*>* params;
        T learning_rate;
        gradient_transform<T> transform;
        std::atomic<bool> failed{false};
    };
    // Task `index` of a threaded apply(): its pieces, piece_elements values
    // at a time (a rule that clears after updating then clears in cache).
    static void run_task(void* context, std::size_t index) noexcept {
        auto& r = *static_cast<piece_run*>(context);
        const flush_subnormals_scope flush;  // this thread's mode, as on the calling thread
        for (const piece& whole : r.rule->pieces_) {
            if (whole.task != index) continue;
            parameter<T>& p = *(*r.params)[whole.parameter_index];
            for (std::size_t first = whole.first; first < whole.last; first += piece_elements) {
                const piece c{whole.parameter_index, first, std::min(whole.last, first + piece_elements), index};
                T* buffers[max_buffers] = {};
                for (std::size_t s = 0; s < r.rule->buffer_count_; ++s)
                    buffers[s] = r.rule->buffers_[c.parameter_index * r.rule->buffer_count_ + s].data() + c.first;
                    // Executor tasks must not throw; the built-in rules never do.
#if TENON_HAS_EXCEPTIONS
                try {
                    r.rule->update_piece(p, c, buffers, r.learning_rate, r.transform);
                } catch (...) {
                    r.failed.store(true, std::memory_order_relaxed);
                }
#else
                r.rule->update_piece(p, c, buffers, r.learning_rate, r.transform);
#endif
            }
        }
    }
    void update_piece(parameter<T>& p, const piece& c, T* const* buffers, T learning_rate, const gradient_transform<T>& transform) {
        T* w = p.value().data() + c.first;
        T* g = p.grad().data() + c.first;
        if (clears_gradients_) {
            update_and_clear(w, g, buffers, c.last - c.first, learning_rate, transform);
        } else {
            update_parameter(w, g, buffers, c.last - c.first, learning_rate, transform);
        }
    }

    void prepare(const std::vector<parameter<T>*>& params) {
        if (!laid_out_) {
            // Laid out aside and committed at once: an allocation failure
            // here leaves the rule as it was (not laid out), never half of it.
            std::vector<shape2> shapes;
            for (const auto* p : params) shapes.push_back(p->shape());
            std::vector<matrix<T>> buffers(params.size() * buffer_count_);
            for (std::size_t i = 0; i < params.size(); ++i)
                for (std::size_t s = 0; s < buffer_count_; ++s) {
                    matrix<T>& m = buffers[i * buffer_count_ + s];
                    ensure_shape(m, shapes[i]);
                    m.fill(T(0));
                }
            shapes_.swap(shapes);
            buffers_.swap(buffers);
            laid_out_ = true;
        }
        if (params.size() != shapes_.size()) {
            raise(codes::model_update_state_mismatch,
                  std::string(kind()) + " update rule: state for " + std::to_string(shapes_.size()) + " parameters, given " +
                      std::to_string(params.size()));
        }
        for (std::size_t i = 0; i < params.size(); ++i) {
            if (params[i]->shape() != shapes_[i]) {
                raise(codes::model_update_state_mismatch,
                      std::string(kind()) + " update rule: parameter " + std::to_string(i) + " ('" + params[i]->name() + "') has shape " +
                          to_string(params[i]->shape()) + ", the state was laid out for " + to_string(shapes_[i]));
            }
            if (shape_of(params[i]->grad()) != shapes_[i]) {
                raise(codes::core_shape_mismatch,
                      std::string(kind()) + " update rule: the gradient of '" + params[i]->name() + "' has shape " +
                          to_string(shape_of(params[i]->grad())) + ", its value " + to_string(shapes_[i]));
            }
        }
    }

    update_options<T> options_;
    std::size_t buffer_count_;
    std::uint64_t step_ = 0;
    std::vector<shape2> shapes_;
    std::vector<matrix<T>> buffers_;
    bool laid_out_ = false;
    executor* workers_ = nullptr;
    bool clears_gradients_ = false;
    std::vector<piece> pieces_;
    std::atomic<bool> non_finite_seen_{false};
};

TENON_NAMESPACE_END
