// tenon: running independent tasks on several threads, under the host's control.
//
// tenon never starts a thread on its own. A host that wants its kernels to
// use more than one core builds a thread_pool of the size it chooses, or
// implements `executor` over its own scheduler, and gives it to the objects
// that should use it (tape::set_executor, training_options::workers,
// model_settings::threads); without one, every kernel runs on the calling
// thread. Work is split so that each output value is computed by one task in
// an order independent of the task count, so results are bit-identical for
// any executor and thread count (docs/design/gemm.md, "Threads").
#pragma once

#include <algorithm>
#include <atomic>
#include <condition_variable>
#include <cstddef>
#include <cstdint>
#include <mutex>
#include <string>
#include <thread>
#include <vector>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"

TENON_NAMESPACE_BEGIN

/// The interface tenon's kernels use to run tasks in parallel. A host may
/// implement it on top of its own scheduler.
class executor {
public:
    /// A task: called once for every index in [0, count).
    using task_function = void (*)(void* context, std::size_t index);

    virtual ~executor() = default;

    /// How many tasks can make progress at once (1 = one after the other).
    /// tenon splits its work into at most this many tasks.
    virtual std::size_t concurrency() const noexcept = 0;

    /// Calls task(context, i) for every i in [0, count), in any order and on
    /// any threads (the calling thread included), and returns once every
    /// call has returned. Tasks tenon passes never throw and never call
    /// run() themselves. tenon calls run() on its hot paths, so an
    /// implementation should not allocate once warmed up.
    virtual void run(std::size_t count, task_function task, void* context) noexcept = 0;
};

/// A fixed set of std::threads working on the tasks of one run() at a time.
/// `threads` counts the calling thread: thread_pool(1) starts no thread at
/// all, thread_pool(2) starts one. run() may be called from any thread;
/// concurrent calls take turns. run() does not allocate.
class thread_pool final : public executor {
public:
    explicit thread_pool(std::size_t threads = 1) : participants_(threads) {
        if (threads == 0 || threads > max_threads) {
            raise(codes::core_argument_invalid,
                  "thread_pool: the number of threads must be in [1, " + std::to_string(max_threads) + "], got " + std::to_string(threads));
        }
        workers_.reserve(threads - 1);
        for (std::size_t i = 0; i + 1 < threads; ++i) workers_.emplace_back([this, i] { work_loop(i + 1); });
    }

    ~thread_pool() override {
        {
            std::lock_guard<std::mutex> lock(mutex_);
            stopping_ = true;
        }
        wake_.notify_all();
        for (auto& w : workers_) w.join();
    }

    thread_pool(const thread_pool&) = delete;
    thread_pool& operator=(const thread_pool&) = delete;

    /// Upper bound on the size of a pool (a guard against a mistyped count).
    static constexpr std::size_t max_threads = 1024;

    std::size_t concurrency() const noexcept override { return workers_.size() + 1; }

    void run(std::size_t count, task_function task, void* context) noexcept override {
        if (count == 0) return;
        if (workers_.empty() || count == 1) {
            for (std::size_t i = 0; i < count; ++i) task(context, i);
            return;
        }
        std::lock_guard<std::mutex> turn(run_mutex_);
        std::uint64_t generation;
        {
            std::lock_guard<std::mutex> lock(mutex_);
            generation = generation_.load(std::memory_order_relaxed) + 1;
            task_ = task;
            context_ = context;
            count_ = count;
            done_.store(0, std::memory_order_relaxed);
            // The index counter carries the run's generation in its high bits,
            // so a worker that wakes late for an earlier run cannot claim an
            // index of this one.
            next_.store(tag(generation), std::memory_order_relaxed);
            generation_.store(generation, std::memory_order_release);
        }
        wake_.notify_all();
        work_on(generation, task, context, count, 0);
        // Wait for the workers' share: spin briefly (tasks are short), then sleep.
        for (int spin = 0; spin < spin_rounds && done_.load(std::memory_order_acquire) != count; ++spin) relax();
        if (done_.load(std::memory_order_acquire) != count) {
            std::unique_lock<std::mutex> lock(mutex_);
            finished_.wait(lock, [&] { return done_.load(std::memory_order_acquire) == count; });
        }
    }

private:
    static constexpr int spin_rounds = 20000;  // a few tens of microseconds (common practice: spin, then block)
    static constexpr std::size_t mask_limit = 32;  // runs of up to this many tasks claim through a mask

    static std::uint64_t tag(std::uint64_t generation) noexcept { return (generation & 0xFFFFFFFFu) << 32; }

    static void relax() noexcept {
#if defined(__x86_64__) || defined(__i386__)
        __builtin_ia32_pause();
#else
        std::this_thread::yield();
#endif
    }

    // Claims and runs indices of run `generation` until none are left.
    // In a run of at most 32 tasks the low 32 bits of next_ are the mask of
    // claimed indices, and participant p (the calling thread is 0, worker j
    // is j + 1) claims its own indices p, p + T, ... (T the number of participants)
    // before any other. So task i of a run runs on the same thread run after
    // run whenever every thread is at hand, and tenon's kernels can give a
    // thread the same rows of a matrix in every pass over it (on the 2-core
    // development machine, writing a line another core has read costs about
    // five times what writing a line of its own does). A thread that is late
    // loses nothing: the others take its indices. Longer runs hand out
    // indices in order from a counter.
    void work_on(std::uint64_t generation, task_function task, void* context, std::size_t count, std::size_t participant) noexcept {
        const std::uint64_t mine = tag(generation);
        constexpr std::uint64_t index_bits = 0xFFFFFFFFu;
        std::uint64_t current = next_.load(std::memory_order_acquire);
        if (count <= mask_limit) {
            const std::uint64_t all = (std::uint64_t(1) << count) - 1;
            std::uint64_t own = 0;
            for (std::size_t i = participant; i < count; i += participants_) own |= std::uint64_t(1) << i;
            for (;;) {
                if ((current & ~index_bits) != mine) return;
                const std::uint64_t free = all & ~current;
                if (free == 0) return;
                const std::uint64_t choice = (free & own) != 0 ? free & own : free;
                const std::uint64_t pick = choice & (~choice + 1);  // lowest index of the choice
                if (!next_.compare_exchange_weak(current, current | pick, std::memory_order_acq_rel, std::memory_order_acquire)) continue;
                std::size_t index = 0;
                while ((pick >> index) != 1) ++index;
                finish(task, context, index, count);
                current = next_.load(std::memory_order_acquire);
            }
        }
        for (;;) {
            if ((current & ~index_bits) != mine) return;
            const std::size_t index = static_cast<std::size_t>(current & index_bits);
            if (index >= count) return;
            if (!next_.compare_exchange_weak(current, current + 1, std::memory_order_acq_rel, std::memory_order_acquire)) continue;
            finish(task, context, index, count);
            current = next_.load(std::memory_order_acquire);
        }
    }

    // Runs task `index` and counts it done, waking run() after the last one.
    void finish(task_function task, void* context, std::size_t index, std::size_t count) noexcept {
        task(context, index);
        if (done_.fetch_add(1, std::memory_order_acq_rel) + 1 == count) {
            std::lock_guard<std::mutex> lock(mutex_);
            finished_.notify_all();
        }
    }

    void work_loop(std::size_t participant) noexcept {
        std::uint64_t seen = 0;
        // Spin a little for the next run before sleeping: a training step
        // issues runs back to back. How long adapts to the gaps seen: a run
        // that came while spinning doubles the next spin, one that did not
        // halves it. So a worker whose runs come far apart (e.g. only the
        // update, while a BLAS's own threads do the products) soon sleeps
        // at once instead of taking a core from them.
        int spin_limit = spin_rounds;
        for (;;) {
            int spin = 0;
            while (spin < spin_limit && generation_.load(std::memory_order_acquire) == seen) {
                relax();
                ++spin;
            }
            const bool came_while_spinning = generation_.load(std::memory_order_acquire) != seen;
            spin_limit = came_while_spinning ? std::min(spin_rounds, 2 * spin_limit + 64) : spin_limit / 2;
            task_function task;
            void* context;
            std::size_t count;
            {
                std::unique_lock<std::mutex> lock(mutex_);
                wake_.wait(lock, [&] { return stopping_ || generation_.load(std::memory_order_relaxed) != seen; });
                if (stopping_) return;
                seen = generation_.load(std::memory_order_relaxed);
                task = task_;
                context = context_;
                count = count_;
            }
            work_on(seen, task, context, count, participant);
        }
    }

    std::size_t participants_;  // the calling thread and the workers
    std::vector<std::thread> workers_;
    std::mutex run_mutex_;  // one run() at a time
    std::mutex mutex_;  // guards the run description and stopping_
    std::condition_variable wake_, finished_;
    std::atomic<std::uint64_t> generation_{0};
    std::atomic<std::uint64_t> next_{0};
    std::atomic<std::size_t> done_{0};
    task_function task_ = nullptr;
    void* context_ = nullptr;
    std::size_t count_ = 0;
    bool stopping_ = false;
};

TENON_NAMESPACE_END
