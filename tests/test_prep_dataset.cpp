// Fashion-MNIST checks (Debian package dataset-fashion-mnist, files in
// /usr/share/datasets/fashion-mnist/). Xiao, Rasul & Vollgraf (2017),
// "Fashion-MNIST: a Novel Image Dataset for Benchmarking Machine Learning
// Algorithms", arXiv:1708.07747, section 2: 60,000 training and 10,000 test
// images of 28 x 28 pixels in 10 classes, 6,000 training images per class.
#include <doctest/doctest.h>

#include <cmath>
#include <string>
#include <vector>

#include <tenon/prep/idx_gzip.hpp>
#include <tenon/prep/split.hpp>

namespace {
const std::string folder = "/usr/share/datasets/fashion-mnist/";
}

TEST_CASE("Fashion-MNIST training labels: magic 0x00000801, 10 classes x 6,000") {
    gzFile raw = gzopen((folder + "train-labels-idx1-ubyte.gz").c_str(), "rb");
    REQUIRE_MESSAGE(raw != nullptr, "install the Debian package dataset-fashion-mnist");
    unsigned char head[8];
    REQUIRE(gzread(raw, head, 8) == 8);
    gzclose(raw);
    CHECK(head[0] == 0x00);
    CHECK(head[1] == 0x00);
    CHECK(head[2] == 0x08);
    CHECK(head[3] == 0x01);
    CHECK(((head[4] << 24) | (head[5] << 16) | (head[6] << 8) | head[7]) == 60000);

    const auto labels = tenon::idx_labels(tenon::read_idx_gzip_file(folder + "train-labels-idx1-ubyte.gz"));
    REQUIRE(labels.size() == 60000);
    std::vector<std::size_t> counts(10, 0);
    for (auto l : labels) {
        REQUIRE(l < 10);
        ++counts[l];
    }
    for (auto c : counts) CHECK(c == 6000);
}

TEST_CASE("Fashion-MNIST images: magic 0x00000803, 28 x 28 pixels") {
    auto test_images = tenon::read_idx_gzip_file(folder + "t10k-images-idx3-ubyte.gz");
    CHECK(test_images.dimensions == std::vector<std::uint32_t>{10000, 28, 28});
    auto test_labels = tenon::idx_labels(tenon::read_idx_gzip_file(folder + "t10k-labels-idx1-ubyte.gz"));
    CHECK(test_labels.size() == 10000);
    auto pixels = tenon::idx_images<float>(test_images);
    CHECK(pixels.shape()[1] == 784);
    float lowest = 1, highest = 0;
    for (std::size_t k = 0; k < pixels.size(); ++k) {
        lowest = std::min(lowest, pixels.data()[k]);
        highest = std::max(highest, pixels.data()[k]);
    }
    CHECK(lowest == 0.0f);
    CHECK(highest == 1.0f);  // some pixel is 255
}

TEST_CASE("stratified splits of the Fashion-MNIST training labels keep the class shares") {
    const auto labels = tenon::idx_labels(tenon::read_idx_gzip_file(folder + "train-labels-idx1-ubyte.gz"));
    auto s = tenon::stratified_holdout(labels, {0.8, 0.1, 0.1}, 2017);
    std::vector<std::size_t> train(10, 0), validation(10, 0), test(10, 0);
    for (auto r : s.train) ++train[labels[r]];
    for (auto r : s.validation) ++validation[labels[r]];
    for (auto r : s.test) ++test[labels[r]];
    for (std::size_t c = 0; c < 10; ++c) {
        CHECK(train[c] == 4800);  // 6,000 x 0.8
        CHECK(validation[c] == 600);
        CHECK(test[c] == 600);
    }
    auto folds = tenon::stratified_k_folds(labels, 7, 1);  // 6,000 / 7 = 857.14 per class per fold
    for (const auto& f : folds) {
        std::vector<std::size_t> per_class(10, 0);
        for (auto r : f.test) ++per_class[labels[r]];
        for (auto n : per_class) CHECK(std::abs(static_cast<double>(n) - 6000.0 / 7.0) <= 1.0);
    }
}
