// Tests of the kernel paths (core/simd.hpp, core/gemm.hpp), the thread pool
// and executors (core/parallel.hpp), the tape's use of an executor, and the
// vectorized Adam pass (update/rules.hpp) and elementwise loops (core/elementwise.hpp).
#include <doctest/doctest.h>

#include <algorithm>
#include <atomic>
#include <cmath>
#include <cstdint>
#include <cstring>
#include <limits>
#include <thread>
#include <type_traits>
#include <vector>

#include <tenon/autodiff/operations.hpp>
#include <tenon/core/elementwise.hpp>
#include <tenon/core/gemm.hpp>
#include <tenon/core/parallel.hpp>
#include <tenon/core/random.hpp>
#include <tenon/layers/network.hpp>
#include <tenon/losses/classification.hpp>
#include <tenon/train/trainer.hpp>
#include <tenon/update/rules.hpp>
#include <tenon/update/schedules.hpp>

namespace {

const tenon::kernel_path all_paths[] = {tenon::kernel_path::portable, tenon::kernel_path::avx2, tenon::kernel_path::avx512, tenon::kernel_path::neon,
                                        tenon::kernel_path::blas};

// Restores the process-wide kernel path when a test ends.
struct path_guard {
    tenon::kernel_path saved = tenon::active_kernel_path();
    ~path_guard() { tenon::set_kernel_path(saved); }
};

// Switches to the BLAS path for the rest of the test (a path_guard restores
// the path); false, with a message saying what goes unchecked, in a build
// without the tenon::blas component.
bool enter_blas_path(const char* unchecked) {
    if (!tenon::kernel_path_available(tenon::kernel_path::blas)) {
        MESSAGE("built without the tenon::blas component: " << unchecked);
        return false;
    }
    tenon::set_kernel_path(tenon::kernel_path::blas);
    return true;
}

template <class T>
std::vector<T> uniform_buffer(tenon::random_engine& rng, std::size_t n) {
    std::vector<T> v(n);
    for (auto& x : v) x = rng.uniform<T>(T(-1), T(1));
    return v;
}

// The number of elements of c (m x n, row stride ldc) farther from the
// double-precision product than the dot-product bound gamma_{k+2} (Higham
// 2002, "Accuracy and Stability of Numerical Algorithms", 2nd ed., section
// 3.1, eq. 3.5; it holds for any summation order and with or without fused
// multiply-adds, whose single rounding only tightens it), plus one rounding
// of the reference to T; or whose padding changed.
template <class T>
std::size_t outside_bound(bool ta, bool tb, std::size_t m, std::size_t n, std::size_t k, T alpha, const std::vector<T>& a, std::size_t lda,
                          const std::vector<T>& b, std::size_t ldb, T beta, const std::vector<T>& c0, const std::vector<T>& c, std::size_t ldc) {
    const double u = static_cast<double>(std::numeric_limits<T>::epsilon()) / 2.0;
    const double gamma = static_cast<double>(k + 2) * u / (1.0 - static_cast<double>(k + 2) * u);
    std::size_t outside = 0;
    for (std::size_t i = 0; i < m; ++i) {
        for (std::size_t j = 0; j < ldc; ++j) {
            const std::size_t idx = i * ldc + j;
            if (j >= n) {
                outside += c[idx] != c0[idx];
                continue;
            }
            double exact = 0.0, magnitude = 0.0;
            for (std::size_t p = 0; p < k; ++p) {
                const double x = static_cast<double>(ta ? a[p * lda + i] : a[i * lda + p]);
                const double y = static_cast<double>(tb ? b[j * ldb + p] : b[p * ldb + j]);
                exact += x * y;
                magnitude += std::abs(x * y);
            }
            const double c_in = static_cast<double>(c0[idx]);
            exact = static_cast<double>(alpha) * exact + static_cast<double>(beta) * c_in;
            magnitude = std::abs(static_cast<double>(alpha)) * magnitude + std::abs(static_cast<double>(beta) * c_in);
            const double bound = gamma * magnitude + u * std::abs(exact);
            outside += std::abs(static_cast<double>(c[idx]) - exact) > bound;
        }
    }
    return outside;
}

// Runs the tasks of each run() one after the other, last index first: a
// host-supplied executor with an order unlike the pool's.
class reverse_executor final : public tenon::executor {
public:
    explicit reverse_executor(std::size_t width) : width_(width) {}
    std::size_t concurrency() const noexcept override { return width_; }
    void run(std::size_t count, task_function task, void* context) noexcept override {
        ++runs;
        for (std::size_t i = count; i-- > 0;) task(context, i);
    }
    std::size_t runs = 0;

private:
    std::size_t width_;
};

}  // namespace

TEST_CASE("kernel paths: the portable path is always there, the active one is available, unavailable ones are refused") {
    path_guard guard;
    CHECK(tenon::kernel_path_available(tenon::kernel_path::portable));
    CHECK(tenon::kernel_path_available(tenon::active_kernel_path()));
    CHECK(tenon::kernel_path_available(tenon::best_builtin_kernel_path()));
    CHECK(tenon::best_builtin_kernel_path() != tenon::kernel_path::blas);
    CHECK(tenon::default_kernel_path() ==
          (tenon::kernel_path_available(tenon::kernel_path::blas) ? tenon::kernel_path::blas : tenon::best_builtin_kernel_path()));
    // AVX-512F CPUs all have AVX2 and FMA, so the fused paths nest.
    if (tenon::kernel_path_available(tenon::kernel_path::avx512)) CHECK(tenon::kernel_path_available(tenon::kernel_path::avx2));
        // NEON is part of aarch64's baseline; x86 has none.
#if defined(__aarch64__)
    CHECK(tenon::kernel_path_available(tenon::kernel_path::neon));
#elif defined(__x86_64__)
    CHECK_FALSE(tenon::kernel_path_available(tenon::kernel_path::neon));
#endif
    for (const auto p : all_paths) {
        if (tenon::kernel_path_available(p)) {
            tenon::set_kernel_path(p);
            CHECK(tenon::active_kernel_path() == p);
        } else {
            CHECK_THROWS_WITH_AS(tenon::set_kernel_path(p), doctest::Contains("core.argument.invalid"), tenon::error);
            CHECK(tenon::active_kernel_path() != p);
        }
    }
#if !(defined(TENON_HAS_BLAS) && TENON_HAS_BLAS)
    CHECK_FALSE(tenon::kernel_path_available(tenon::kernel_path::blas));
    CHECK_THROWS_WITH_AS(tenon::set_kernel_path(tenon::kernel_path::blas), doctest::Contains("tenon::blas"), tenon::error);
#endif
    CHECK(std::string(tenon::kernel_path_name(tenon::kernel_path::avx512)) == "avx512");
    CHECK(std::string(tenon::kernel_path_name(tenon::kernel_path::neon)) == "neon");
}

TEST_CASE_TEMPLATE("every kernel path stays within the dot-product rounding bound across its block and tile edges", T, float, double) {
    // Shapes cross the tile edges of every path (4, 6 and 8 rows; 8, 16, 32
    // columns), the depth block (kc = 256), the row blocks (mc = 64, 120,
    // 128) and the thin-product threshold, none a multiple of them.
    path_guard guard;
    const std::size_t sizes[][3] = {{13, 21, 35},  {70, 9, 7},   {5, 530, 3},  {6, 10, 300}, {7, 33, 257},
                                    {129, 40, 20}, {121, 17, 9}, {9, 65, 513}, {68, 516, 2}, {3, 40, 20}};
    for (const auto path : all_paths) {
        if (!tenon::kernel_path_available(path)) continue;
        tenon::set_kernel_path(path);
        tenon::random_engine rng(47);
        for (const auto& sz : sizes) {
            const std::size_t m = sz[0], n = sz[1], k = sz[2];
            for (int mode = 0; mode < 4; ++mode) {
                const bool ta = (mode & 1) != 0, tb = (mode & 2) != 0;
                const std::size_t lda = (ta ? m : k) + 1, ldb = (tb ? k : n) + 3, ldc = n + 1;
                const auto a = uniform_buffer<T>(rng, (ta ? k : m) * lda);
                const auto b = uniform_buffer<T>(rng, (tb ? n : k) * ldb);
                const auto c0 = uniform_buffer<T>(rng, m * ldc);
                for (const T beta : {T(0), T(0.5)}) {
                    const T alpha = T(-0.75);
                    std::vector<T> c = c0;
                    tenon::gemm<T>(ta, tb, m, n, k, alpha, a.data(), lda, b.data(), ldb, beta, c.data(), ldc);
                    CHECK_MESSAGE(outside_bound<T>(ta, tb, m, n, k, alpha, a, lda, b, ldb, beta, c0, c, ldc) == 0,
                                  tenon::kernel_path_name(path)
                                      << " m=" << m << " n=" << n << " k=" << k << " ta=" << ta << " tb=" << tb << " beta=" << beta);
                }
            }
        }
    }
}

TEST_CASE_TEMPLATE("gemm gives bit-identical results for any thread count and executor on every built-in path", T, float, double) {
    // Each element is computed by one task, in an order fixed by the shape
    // alone (core/gemm.hpp), so the split cannot change a single bit. The
    // shapes split by columns (wider than tall) and by rows, with partial
    // edge tiles, and the 784-256-128 layer shapes.
    path_guard guard;
    tenon::thread_pool two(2), three(3);
    reverse_executor host(4);
    const std::size_t sizes[][3] = {{128, 256, 784}, {784, 256, 128}, {37, 301, 70}, {301, 37, 70}, {128, 10, 128}};
    for (const auto path : {tenon::kernel_path::portable, tenon::kernel_path::avx2, tenon::kernel_path::avx512, tenon::kernel_path::neon}) {
        if (!tenon::kernel_path_available(path)) continue;
        tenon::set_kernel_path(path);
        tenon::random_engine rng(5);
        for (const auto& sz : sizes) {
            const std::size_t m = sz[0], n = sz[1], k = sz[2];
            for (int mode = 0; mode < 4; ++mode) {
                const bool ta = (mode & 1) != 0, tb = (mode & 2) != 0;
                const std::size_t lda = ta ? m : k, ldb = tb ? k : n;
                const auto a = uniform_buffer<T>(rng, m * k);
                const auto b = uniform_buffer<T>(rng, k * n);
                const auto c0 = uniform_buffer<T>(rng, m * n);
                std::vector<T> one = c0;
                tenon::gemm<T>(ta, tb, m, n, k, T(1), a.data(), lda, b.data(), ldb, T(1), one.data(), n);
                tenon::executor* executors[] = {&two, &three, &host};
                for (tenon::executor* e : executors) {
                    std::vector<T> c = c0;
                    tenon::gemm<T>(ta, tb, m, n, k, T(1), a.data(), lda, b.data(), ldb, T(1), c.data(), n, e);
                    CHECK_MESSAGE(std::memcmp(c.data(), one.data(), c.size() * sizeof(T)) == 0,
                                  tenon::kernel_path_name(path)
                                      << " m=" << m << " n=" << n << " k=" << k << " mode=" << mode << " threads=" << e->concurrency());
                }
            }
        }
    }
    CHECK(host.runs > 0);  // the host's executor was really used
}

TEST_CASE_TEMPLATE("on the BLAS path, products split into bands across an executor stay within the rounding bound", T, float, double) {
    // Each band is one BLAS call on its rows or columns of C (edges on a
    // grid of 16). tenon does not promise the bands' bits equal the whole
    // product's there (a BLAS may pick another kernel for a smaller
    // product), so this checks every element against the bound of Higham
    // 2002 (see outside_bound) and the padding of C, with partial bands,
    // both split directions, strides wider than the rows and all transposes.
    path_guard guard;
    if (!enter_blas_path("nothing to check")) return;
    tenon::thread_pool two(2), three(3);
    reverse_executor host(4);
    const std::size_t sizes[][3] = {{128, 256, 784}, {784, 256, 128}, {37, 301, 70}, {301, 37, 70}, {128, 10, 128}, {33, 47, 97}};
    tenon::random_engine rng(8);
    for (const auto& sz : sizes) {
        const std::size_t m = sz[0], n = sz[1], k = sz[2];
        for (int mode = 0; mode < 4; ++mode) {
            const bool ta = (mode & 1) != 0, tb = (mode & 2) != 0;
            const std::size_t lda = (ta ? m : k) + 1, ldb = (tb ? k : n) + 2, ldc = n + 3;
            const auto a = uniform_buffer<T>(rng, (ta ? k : m) * lda);
            const auto b = uniform_buffer<T>(rng, (tb ? n : k) * ldb);
            const auto c0 = uniform_buffer<T>(rng, m * ldc);
            tenon::executor* executors[] = {&two, &three, &host};
            for (tenon::executor* e : executors) {
                std::vector<T> c = c0;
                tenon::gemm<T>(ta, tb, m, n, k, T(0.5), a.data(), lda, b.data(), ldb, T(-1), c.data(), ldc, e);
                CHECK_MESSAGE(outside_bound<T>(ta, tb, m, n, k, T(0.5), a, lda, b, ldb, T(-1), c0, c, ldc) == 0,
                              "m=" << m << " n=" << n << " k=" << k << " mode=" << mode << " threads=" << e->concurrency());
            }
        }
    }
    CHECK(host.runs > 0);  // the products above the split size were split
}

TEST_CASE_TEMPLATE("BLAS bands of columns start on cache lines of C and stay within the rounding bound", T, float, double) {
    // Two threads writing the two halves of one cache line pass it back and
    // forth once per row, so a split of C's columns on the blas path puts
    // its inner edges on 64-byte lines of C whenever every row allows it
    // (ldc * sizeof(T) a multiple of 64), as close to an even split as the
    // grid of 16 columns allows. Checked on C placed at every element offset
    // from a line, for 2 and 3 parts.
    std::vector<T> storage(128 * 256 + 64);
    for (std::size_t offset = 0; offset < 64 / sizeof(T); ++offset) {
        T* c = storage.data() + offset;
        for (const std::size_t parts : {std::size_t(2), std::size_t(3)}) {
            for (const std::size_t n : {std::size_t(256), std::size_t(128), std::size_t(48)}) {
                CAPTURE(offset);
                CAPTURE(parts);
                CAPTURE(n);
                const tenon::detail::gemm_problem<T> g{false, true,    16,  n,    128, T(1), nullptr,
                                                       128,   nullptr, 128, T(0), c,   256};  // wider than tall: columns
                const auto split = tenon::detail::gemm_split<T>::plan(g, tenon::kernel_path::blas, parts, nullptr);
                CHECK_FALSE(split.by_rows);
                CHECK(split.parts == parts);
                CHECK(split.edge(0) == 0);
                CHECK(split.edge(split.parts) == n);
                for (std::size_t i = 1; i < split.parts; ++i) {
                    const std::size_t e = split.edge(i);
                    CHECK(reinterpret_cast<std::uintptr_t>(c + e) % 64 == 0);
                    CHECK(e >= split.edge(i - 1));
                    const double even = static_cast<double>(i * n) / static_cast<double>(split.parts);
                    CHECK(std::abs(static_cast<double>(e) - even) <= static_cast<double>(split.unit) / 2.0 + 1.0);
                }
            }
        }
    }
    // The products: C at every offset from a line, through gemm and an
    // executor, against the dot-product bound, C's other elements untouched.
    path_guard guard;
    if (!enter_blas_path("the products themselves are not checked")) return;
    tenon::thread_pool two(2), three(3);
    tenon::random_engine rng(12);
    const std::size_t m = 64, n = 96, k = 96, ldc = 96;  // m n k above the parallel threshold, ldc * 4 bytes on lines
    for (const bool tb : {false, true}) {
        const auto a = uniform_buffer<T>(rng, m * k);
        const auto b = uniform_buffer<T>(rng, k * n);
        const auto base = uniform_buffer<T>(rng, m * ldc + 64);
        for (std::size_t offset = 0; offset < 64 / sizeof(T); offset += 3) {
            tenon::executor* executors[] = {&two, &three};
            for (tenon::executor* e : executors) {
                std::vector<T> all = base;
                tenon::gemm<T>(false, tb, m, n, k, T(1), a.data(), k, b.data(), tb ? k : n, T(0.5), all.data() + offset, ldc, e);
                const std::vector<T> c0(base.begin() + static_cast<std::ptrdiff_t>(offset),
                                        base.begin() + static_cast<std::ptrdiff_t>(offset + m * ldc));
                const std::vector<T> c(all.begin() + static_cast<std::ptrdiff_t>(offset),
                                       all.begin() + static_cast<std::ptrdiff_t>(offset + m * ldc));
                CHECK_MESSAGE(outside_bound<T>(false, tb, m, n, k, T(1), a, k, b, tb ? k : n, T(0.5), c0, c, ldc) == 0,
                              "offset=" << offset << " tb=" << tb << " threads=" << e->concurrency());
                CHECK(std::equal(all.begin(), all.begin() + static_cast<std::ptrdiff_t>(offset), base.begin()));
                CHECK(std::equal(all.begin() + static_cast<std::ptrdiff_t>(offset + m * ldc), all.end(),
                                 base.begin() + static_cast<std::ptrdiff_t>(offset + m * ldc)));
            }
        }
    }
}
TEST_CASE("a thread pool runs every index exactly once, from several host threads at once") {
    CHECK_THROWS_WITH_AS(tenon::thread_pool(0), doctest::Contains("core.argument.invalid"), tenon::error);
    CHECK_THROWS_WITH_AS(tenon::thread_pool(tenon::thread_pool::max_threads + 1), doctest::Contains("number of threads"), tenon::error);
    tenon::thread_pool single;
    CHECK(single.concurrency() == 1);
    tenon::thread_pool pool(3);
    CHECK(pool.concurrency() == 3);

    struct counts {
        std::vector<std::atomic<int>> hits;
        explicit counts(std::size_t n) : hits(n) {}
        static void task(void* context, std::size_t i) { static_cast<counts*>(context)->hits[i].fetch_add(1); }
    };
    for (std::size_t count : {std::size_t(0), std::size_t(1), std::size_t(2), std::size_t(7), std::size_t(100)}) {
        counts c(count);
        for (int round = 0; round < 50; ++round) pool.run(count, &counts::task, &c);
        for (std::size_t i = 0; i < count; ++i) CHECK(c.hits[i].load() == 50);
    }
    // Two host threads share the pool: their runs take turns, none is lost.
    counts left(64), right(64);
    std::thread other([&] {
        for (int round = 0; round < 200; ++round) pool.run(64, &counts::task, &right);
    });
    for (int round = 0; round < 200; ++round) pool.run(64, &counts::task, &left);
    other.join();
    for (std::size_t i = 0; i < 64; ++i) {
        CHECK(left.hits[i].load() == 200);
        CHECK(right.hits[i].load() == 200);
    }
}

TEST_CASE("a thread pool gives task i of a run of at most its size to its thread i when every thread is at hand") {
    // Each task waits until every task of the run has started, so a thread
    // that took another's index first would hold it while its own waited for
    // it: the run ends only because each thread claims its own index (the
    // calling thread 0, worker j index j + 1) before any other.
    struct gathering {
        std::atomic<std::size_t> started{0};
        std::size_t count = 0;
        std::thread::id ran[4];
        static void task(void* context, std::size_t index) {
            auto& g = *static_cast<gathering*>(context);
            g.ran[index] = std::this_thread::get_id();
            g.started.fetch_add(1);
            while (g.started.load() < g.count) std::this_thread::yield();
        }
    };
    for (const std::size_t threads : {std::size_t(2), std::size_t(3), std::size_t(4)}) {
        CAPTURE(threads);
        tenon::thread_pool pool(threads);
        std::thread::id first_round[4];
        for (int round = 0; round < 50; ++round) {
            gathering g;
            g.count = threads;
            pool.run(threads, &gathering::task, &g);
            CHECK(g.ran[0] == std::this_thread::get_id());
            for (std::size_t i = 0; i < threads; ++i) {
                for (std::size_t j = 0; j < i; ++j) CHECK(g.ran[i] != g.ran[j]);
                if (round == 0) first_round[i] = g.ran[i];
                CHECK(g.ran[i] == first_round[i]);  // the same thread every run
            }
        }
    }
}

TEST_CASE_TEMPLATE("on the BLAS path, a network's outputs are the same bits for any executor, its large dense layers summing two halves", T, float,
                   double) {
    // The products x W of dense layers large enough to split are computed
    // there as x[:, :e] W[:e, :] + x[:, e:] W[e:, :] whatever the thread
    // count (core/gemm.hpp, gemm_inner_halves), the halves on two threads
    // when there are two: the outputs are the same bits without an executor
    // and with 2, 3 or 4 threads (the gradients' products are split into
    // bands, within the bound checked above). The first layer's values are
    // also checked against a double-precision relu(x W + b), within the
    // dot-product bound of Higham 2002 (see outside_bound) for k + 2 terms.
    path_guard guard;
    if (!enter_blas_path("nothing to check")) return;
    const std::size_t batch = 128, inputs = 300, hidden = 160;
    CHECK(tenon::detail::splits_inner<T>(batch, hidden, inputs));
    CHECK(tenon::detail::splits_inner<T>(batch, 64, hidden));
    CHECK_FALSE(tenon::detail::splits_inner<T>(batch, 5, 64));  // below the split size: one product
    auto run = [&](tenon::executor* workers, std::vector<T>& out) {
        auto net =
            tenon::make_mlp<T>({inputs, hidden, 64, 5}, tenon::activation::relu, {tenon::init_scheme::he, tenon::init_distribution::normal}, 4);
        tenon::random_engine rng(6);
        tenon::matrix<T> x({batch, inputs});
        for (std::size_t i = 0; i < x.size(); ++i) x.data()[i] = rng.normal(T(0), T(1));
        const auto first = net.parameters();
        for (std::size_t i = 0; i < first[1]->size(); ++i) first[1]->value().data()[i] = rng.normal(T(0), T(0.5));  // a bias that matters
        tenon::tape<T> t;
        t.set_executor(workers);
        const auto h = t.affine_activation(t.input(x), t.track(*first[0]), t.track(*first[1]), tenon::op_kind::relu);
        std::vector<T> xs(x.data(), x.data() + x.size()), ws(first[0]->value().data(), first[0]->value().data() + first[0]->size());
        std::size_t outside = 0;
        const double u = static_cast<double>(std::numeric_limits<T>::epsilon()) / 2.0;
        const double gamma = static_cast<double>(inputs + 2) * u / (1.0 - static_cast<double>(inputs + 2) * u);
        for (std::size_t i = 0; i < batch; ++i) {
            for (std::size_t j = 0; j < hidden; ++j) {
                const double bias = static_cast<double>(first[1]->value().data()[j]);
                double exact = bias, magnitude = std::abs(bias);
                for (std::size_t p = 0; p < inputs; ++p) {
                    exact += static_cast<double>(xs[i * inputs + p]) * static_cast<double>(ws[p * hidden + j]);
                    magnitude += std::abs(static_cast<double>(xs[i * inputs + p]) * static_cast<double>(ws[p * hidden + j]));
                }
                // relu is 1-Lipschitz: the bound on z holds for relu(z).
                outside += std::abs(static_cast<double>(h.value()(i, j)) - std::max(exact, 0.0)) > gamma * magnitude + u * std::abs(exact);
            }
        }
        CHECK(outside == 0);
        t.clear();
        const auto y = net.forward(t, t.input(x));
        out.assign(y.value().data(), y.value().data() + y.value().size());
    };
    std::vector<T> alone;
    run(nullptr, alone);
    tenon::thread_pool two(2), three(3);
    reverse_executor host(4);
    tenon::executor* executors[] = {&two, &three, &host};
    for (tenon::executor* e : executors) {
        CAPTURE(e->concurrency());
        std::vector<T> shared;
        run(e, shared);
        REQUIRE(alone.size() == shared.size());
        CHECK(std::memcmp(alone.data(), shared.data(), alone.size() * sizeof(T)) == 0);
    }
}

TEST_CASE_TEMPLATE("a tape with an executor gives bit-identical values and gradients", T, float, double) {
    // On the built-in kernels (the BLAS path's bands are the BLAS's, see above).
    path_guard guard;
    tenon::set_kernel_path(tenon::best_builtin_kernel_path());
    auto run = [](tenon::executor* workers, std::vector<T>& out) {
        auto net = tenon::make_mlp<T>({40, 64, 32, 5}, tenon::activation::relu, {tenon::init_scheme::he, tenon::init_distribution::normal}, 9);
        tenon::random_engine rng(2);
        tenon::matrix<T> x({96, 40});
        for (std::size_t i = 0; i < x.size(); ++i) x.data()[i] = rng.normal(T(0), T(1));
        std::vector<std::size_t> labels(96);
        for (auto& l : labels) l = static_cast<std::size_t>(rng.below(5));
        tenon::tape<T> t;
        t.set_executor(workers);
        CHECK(t.workers() == workers);
        const auto y = net.forward(t, t.input(x));
        const auto loss = tenon::cross_entropy_loss(t, y, labels);
        t.backward(loss);
        out.assign(y.value().data(), y.value().data() + y.value().size());
        for (auto* p : net.parameters()) out.insert(out.end(), p->grad().data(), p->grad().data() + p->size());
    };
    std::vector<T> alone, shared;
    run(nullptr, alone);
    tenon::thread_pool pool(2);
    run(&pool, shared);
    REQUIRE(alone.size() == shared.size());
    CHECK(std::memcmp(alone.data(), shared.data(), alone.size() * sizeof(T)) == 0);
}

TEST_CASE_TEMPLATE("a trainer with workers gives the weights it gives without, tail batch included", T, float, double) {
    // 250 rows of 300 inputs in batches of 64 (three and a tail of 58): each
    // step's batch gathering is large enough to be split across the workers
    // (trainer.hpp, gather_batch), as are the products and the update, which
    // also clears the gradients. Built-in kernels (see the BLAS test above).
    path_guard guard;
    tenon::set_kernel_path(tenon::best_builtin_kernel_path());
    tenon::random_engine rng(12);
    tenon::supervised_rows<T> classes, values;
    classes.features = tenon::matrix<T>({250, 300});
    for (std::size_t i = 0; i < classes.features.size(); ++i) classes.features.data()[i] = rng.normal(T(0), T(1));
    classes.class_count = 4;
    for (std::size_t i = 0; i < 250; ++i) classes.labels.push_back(static_cast<std::size_t>(rng.below(4)));
    values.features = classes.features;
    values.targets = tenon::matrix<T>({250, 2});
    for (std::size_t i = 0; i < values.targets.size(); ++i) values.targets.data()[i] = rng.normal(T(0), T(1));
    auto train = [](const tenon::supervised_rows<T>& d, tenon::loss_kind loss, tenon::executor* workers) {
        auto net = tenon::make_mlp<T>({300, 64, d.is_classification() ? std::size_t(4) : std::size_t(2)}, tenon::activation::relu,
                                      {tenon::init_scheme::he, tenon::init_distribution::normal}, 3);
        tenon::adam<T> rule;
        tenon::constant_rate schedule(0.001);
        tenon::training_options<T> o;
        o.loss = loss;
        o.epochs = 2;
        o.batch_size = 64;
        o.seed = 5;
        o.workers = workers;
        tenon::trainer<T> tr(net, rule, schedule, o);
        tr.run(d, tenon::supervised_rows<T>{});
        std::vector<T> w;
        for (const auto* p : net.parameters()) w.insert(w.end(), p->value().data(), p->value().data() + p->size());
        return w;
    };
    tenon::thread_pool two(2), three(3);
    reverse_executor host(2);
    for (const auto loss : {tenon::loss_kind::cross_entropy, tenon::loss_kind::l2}) {
        const auto& d = loss == tenon::loss_kind::cross_entropy ? classes : values;
        const auto alone = train(d, loss, nullptr);
        tenon::executor* executors[] = {&two, &three, &host};
        for (tenon::executor* e : executors) {
            const auto shared = train(d, loss, e);
            REQUIRE(shared.size() == alone.size());
            CHECK_MESSAGE(std::memcmp(shared.data(), alone.data(), alone.size() * sizeof(T)) == 0,
                          tenon::loss_kind_name(loss) << " threads=" << e->concurrency());
        }
    }
    CHECK(host.runs > 0);
}

TEST_CASE_TEMPLATE("the vectorized Adam pass is bit-identical to the scalar formula", T, float, double) {
    // Kingma & Ba 2015, Algorithm 1, as update/rules.hpp writes it, element by
    // element; 37 elements cover whole vectors and a scalar tail.
    for (const T clip : {T(0), T(0.05)}) {
        tenon::update_options<T> options;
        options.clip_value = clip;
        options.weight_decay = T(0.01);
        tenon::adam_options<T> settings;
        settings.decoupled_weight_decay = T(0.02);
        tenon::adam<T> rule(settings, options);
        tenon::parameter<T> p("w", tenon::shape2{1, 37});
        tenon::random_engine rng(3);
        for (std::size_t k = 0; k < 37; ++k) p.value().data()[k] = rng.normal(T(0), T(1));
        std::vector<T> w(p.value().data(), p.value().data() + 37), m(37, T(0)), v(37, T(0));
        std::vector<tenon::parameter<T>*> params{&p};
        const T lr = T(0.01);
        for (int step = 1; step <= 3; ++step) {
            tenon::ensure_shape(p.grad(), p.shape());
            for (std::size_t k = 0; k < 37; ++k) p.grad().data()[k] = rng.normal(T(0), T(0.2));
            rule.apply(params, lr);
            // The reordered form of the paper's section 2 (end), as rules.hpp computes it.
            const double c1 = 1.0 - std::pow(static_cast<double>(settings.beta1), step);
            const double c2 = 1.0 - std::pow(static_cast<double>(settings.beta2), step);
            const T rate = static_cast<T>(static_cast<double>(lr) * std::sqrt(c2) / c1);
            const T epsilon = static_cast<T>(static_cast<double>(settings.epsilon) * std::sqrt(c2));
            const T decay = lr * settings.decoupled_weight_decay;
            for (std::size_t k = 0; k < 37; ++k) {
                T g = p.grad().data()[k];
                if (clip > T(0)) g = std::min(std::max(g, -clip), clip);
                g = g + options.weight_decay * w[k];
                m[k] = settings.beta1 * m[k] + (T(1) - settings.beta1) * g;
                v[k] = settings.beta2 * v[k] + (T(1) - settings.beta2) * g * g;
                w[k] -= rate * m[k] / (std::sqrt(v[k]) + epsilon) + decay * w[k];
            }
            CHECK(std::memcmp(w.data(), p.value().data(), 37 * sizeof(T)) == 0);
        }
    }
}

TEST_CASE_TEMPLATE("the vectorized elementwise loops give the plain loops' bits, special values included", T, float, double) {
    // Lengths 0..70 cover no vector, whole vectors and every tail; the values
    // include -0, +-inf, NaN, denormals and exact zeros.
    const T inf = std::numeric_limits<T>::infinity(), nan = std::numeric_limits<T>::quiet_NaN();
    const T specials[] = {T(0), -T(0), inf, -inf, nan, std::numeric_limits<T>::denorm_min(), T(-1e-30), T(3)};
    tenon::random_engine rng(9);
    const auto fill = [&](std::vector<T>& v) {
        for (auto& x : v) x = rng.below(4) == 0 ? specials[rng.below(8)] : rng.normal(T(0), T(1));
    };
    // Equal bits, or both NaN: which NaN operand's payload an addition keeps
    // is the compiler's choice (it may swap the operands of +).
    const auto same_bits = [](const std::vector<T>& a, const std::vector<T>& b) {
        if (a.size() != b.size()) return false;
        for (std::size_t k = 0; k < a.size(); ++k)
            if (std::memcmp(&a[k], &b[k], sizeof(T)) != 0 && !(std::isnan(a[k]) && std::isnan(b[k]))) return false;
        return true;
    };
    for (std::size_t n = 0; n <= 70; ++n) {
        CAPTURE(n);
        std::vector<T> y(n), g(n), d(n), expected(n);
        fill(y);
        fill(g);
        tenon::detail::relu_gradient(y.data(), g.data(), d.data(), n);
        for (std::size_t k = 0; k < n; ++k) expected[k] = g[k] * (y[k] > T(0) ? T(1) : T(0));
        CHECK(same_bits(d, expected));

        const std::size_t rows = 3;
        std::vector<T> o(rows * n), b(n), out, sums(n), expected_sums(n);
        fill(o);
        fill(b);
        fill(sums);
        expected_sums = sums;
        out = o;
        tenon::detail::bias_relu_rows(b.data(), out.data(), rows, n);
        expected = o;
        for (std::size_t i = 0; i < rows; ++i)
            for (std::size_t j = 0; j < n; ++j) {
                const T z = o[i * n + j] + b[j];
                expected[i * n + j] = z > T(0) ? z : T(0);
            }
        CHECK(same_bits(out, expected));
        tenon::detail::add_column_sums(o.data(), rows, n, sums.data());
        for (std::size_t i = 0; i < rows; ++i)
            for (std::size_t j = 0; j < n; ++j) expected_sums[j] += o[i * n + j];
        CHECK(same_bits(sums, expected_sums));
    }
    // first_non_finite across the scan blocks (4096 elements) and their tails.
    for (const std::size_t n : {std::size_t(1), std::size_t(4095), std::size_t(4096), std::size_t(10000)}) {
        std::vector<T> v(n, T(1));
        CHECK(tenon::detail::first_non_finite(v.data(), n) == n);
        for (const std::size_t at : {std::size_t(0), n / 2, n - 1}) {
            for (const T bad : {nan, inf, -inf}) {
                std::fill(v.begin(), v.end(), T(-2));
                v[at] = bad;
                if (at + 1 < n) v[n - 1] = nan;  // a later one must not win
                CHECK(tenon::detail::first_non_finite(v.data(), n) == at);
            }
        }
    }
}

TEST_CASE("set_blas_threads: refused for 0 threads and without a BLAS that takes a thread count") {
    CHECK_FALSE(tenon::set_blas_threads(0));
    // A build without the tenon::blas component has no BLAS to ask.
    if (!tenon::kernel_path_available(tenon::kernel_path::blas)) CHECK_FALSE(tenon::set_blas_threads(1));
#if TENON_GEMM_BLAS_THREADS
    // With OpenBLAS linked (Debian's libopenblas) the call is taken.
    if (tenon::set_blas_threads(2)) CHECK(tenon::set_blas_threads(1));
#endif
}
