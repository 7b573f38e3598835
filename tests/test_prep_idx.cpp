// Tests of prep/idx.hpp and prep/idx_gzip.hpp on small IDX files written
// here. Magic numbers per the format's description (LeCun, Cortes & Burges,
// "THE MNIST DATABASE of handwritten digits", "FILE FORMATS"): 0x00000801
// for labels (unsigned bytes, 1 dimension), 0x00000803 for images (3).
#include <doctest/doctest.h>

#include <string>
#include <vector>

#include <tenon/prep/idx.hpp>
#if defined(TENON_HAS_ZLIB)
#include <tenon/prep/idx_gzip.hpp>
#endif

#include "prep_test_support.hpp"

using prep_test::error_code_of;

namespace {
std::string idx_bytes(std::uint8_t dims, std::vector<std::uint32_t> sizes, std::vector<std::uint8_t> values) {
    std::string s{'\0', '\0', '\x08', static_cast<char>(dims)};
    for (auto d : sizes)
        for (int k = 3; k >= 0; --k) s.push_back(static_cast<char>((d >> (8 * k)) & 0xFF));  // big-endian
    s.append(values.begin(), values.end());
    return s;
}
}  // namespace

TEST_CASE("IDX labels and images: magic, big-endian sizes, row-major values") {
    prep_test::temp_file labels("labels.idx", idx_bytes(1, {3}, {7, 0, 9}));
    auto a = tenon::read_idx_file(labels.path);
    CHECK(a.dimensions == std::vector<std::uint32_t>{3});
    CHECK(tenon::idx_labels(a) == std::vector<std::uint32_t>{7, 0, 9});

    prep_test::temp_file images("images.idx", idx_bytes(3, {2, 2, 3}, {0, 255, 51, 0, 0, 0, 1, 2, 3, 4, 5, 6}));
    auto b = tenon::read_idx_file(images.path);
    CHECK(b.count() == 2);
    CHECK(b.item_size() == 6);
    auto m = tenon::idx_images<float>(b);
    CHECK(m.shape()[0] == 2);
    CHECK(m.shape()[1] == 6);
    CHECK(m(0, 1) == doctest::Approx(1.0f));
    CHECK(m(0, 2) == doctest::Approx(0.2f));  // 51 / 255
    CHECK(m(1, 5) == doctest::Approx(6.0f / 255.0f));
    auto raw = tenon::idx_images<double>(b, 1.0);
    CHECK(raw(1, 0) == 1.0);
}

TEST_CASE("IDX errors") {
    std::string message;
    const std::string bad = idx_bytes(1, {1}, {0});
    auto wrong_type = bad;
    wrong_type[2] = 0x0D;  // 0x0D = float elements, not read by tenon
    CHECK(error_code_of([&] { tenon::parse_idx(reinterpret_cast<const std::uint8_t*>(wrong_type.data()), wrong_type.size(), "f.idx"); }, &message) ==
          "prep.idx.magic");
    CHECK(message ==
          "[prep.idx.magic] f.idx: magic number 0x00000D01 is not an IDX file of unsigned bytes (expected "
          "0x000008nn, nn = dimensions >= 1)");
    const std::string short_values = idx_bytes(3, {2, 28, 28}, {1, 2, 3});
    CHECK(error_code_of([&] { tenon::parse_idx(reinterpret_cast<const std::uint8_t*>(short_values.data()), short_values.size(), "s.idx"); },
                        &message) == "prep.idx.truncated");
    CHECK(message == "[prep.idx.truncated] s.idx: the header declares 1568 values but only 3 bytes follow it");
    const std::string short_header = idx_bytes(3, {2}, {});
    CHECK(error_code_of([&] { tenon::parse_idx(reinterpret_cast<const std::uint8_t*>(short_header.data()), short_header.size(), "h.idx"); },
                        &message) == "prep.idx.truncated");
    CHECK(message == "[prep.idx.truncated] h.idx: the header declares 3 dimensions but the file has 8 bytes");
    const std::uint8_t gz[] = {0x1F, 0x8B, 0x08, 0x00};
    CHECK(error_code_of([&] { tenon::parse_idx(gz, sizeof(gz), "g.gz"); }, &message) == "prep.idx.compressed");
    CHECK(message ==
          "[prep.idx.compressed] g.gz: the file is gzip-compressed; include tenon/prep/idx_gzip.hpp, link "
          "tenon::gzip and use read_idx_gzip_file");
    CHECK(error_code_of([&] { tenon::parse_idx(gz, 2, "tiny"); }, &message) == "prep.idx.compressed");
    const std::uint8_t three[] = {0, 0, 8};
    CHECK(error_code_of([&] { tenon::parse_idx(three, 3, "tiny"); }, &message) == "prep.idx.truncated");
    CHECK(message == "[prep.idx.truncated] tiny: 3 bytes cannot hold the 4-byte magic number");
    auto labels = tenon::parse_idx(reinterpret_cast<const std::uint8_t*>(bad.data()), bad.size(), "l.idx");
    CHECK(error_code_of([&] { tenon::idx_images<float>(labels, 1.0f, "l.idx"); }, &message) == "prep.idx.magic");
    CHECK(message == "[prep.idx.magic] l.idx: expected an IDX file with 3 dimension(s), found 1");
    CHECK(error_code_of([] { tenon::read_idx_file("/nonexistent/tenon.idx"); }, &message) == "prep.file.open");
    CHECK(message == "[prep.file.open] /nonexistent/tenon.idx: cannot open for reading");
}

#if defined(TENON_HAS_ZLIB)
TEST_CASE("gzip-compressed IDX files read through zlib, plain ones too") {
    const std::string content = idx_bytes(1, {4}, {1, 2, 3, 4});
    const std::string path = std::string(P_tmpdir) + "/tenon_prep_test_labels.idx.gz";
    gzFile out = gzopen(path.c_str(), "wb");
    REQUIRE(out != nullptr);
    gzwrite(out, content.data(), static_cast<unsigned>(content.size()));
    gzclose(out);
    auto a = tenon::read_idx_gzip_file(path);
    CHECK(tenon::idx_labels(a) == std::vector<std::uint32_t>{1, 2, 3, 4});
    std::string message;
    CHECK(error_code_of([&] { tenon::read_idx_file(path); }, &message) == "prep.idx.compressed");
    std::remove(path.c_str());

    prep_test::temp_file plain("plain.idx", content);
    CHECK(tenon::idx_labels(tenon::read_idx_gzip_file(plain.path)).size() == 4);

    // A gzip header followed by garbage: zlib reports a data error.
    prep_test::temp_file broken("broken.gz", std::string("\x1f\x8b\x08\x00\x00\x00\x00\x00\x00\x03garbage-garbage", 26));
    CHECK(error_code_of([&] { tenon::read_idx_gzip_file(broken.path); }, &message) == "prep.idx.compressed");
    CHECK(message.rfind("[prep.idx.compressed] " + broken.path + ": gzip data could not be decompressed (", 0) == 0);
    CHECK(error_code_of([] { tenon::read_idx_gzip_file("/nonexistent/tenon.idx.gz"); }, &message) == "prep.file.open");
}
#endif
