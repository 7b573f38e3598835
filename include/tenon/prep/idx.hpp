// tenon: reading IDX files (the open format of the handwritten-digit and
// Fashion-MNIST datasets), uncompressed. For .gz files include
// tenon/prep/idx_gzip.hpp and link tenon::gzip.
//
// Format (LeCun, Cortes & Burges, "THE MNIST DATABASE of handwritten digits",
// section "FILE FORMATS FOR THE MNIST DATABASE"): a 4-byte magic number
// whose first two bytes are 0, third byte the element type (0x08 = unsigned
// byte, the only type tenon reads) and fourth byte the number of dimensions;
// then one big-endian 32-bit size per dimension; then the elements in
// row-major order. Labels are 0x00000801 (1 dimension), images 0x00000803
// (3 dimensions: count, rows, columns).
#pragma once

#include <cstddef>
#include <cstdint>
#include <cstdio>
#include <fstream>
#include <limits>
#include <string>
#include <vector>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"
#include "tenon/core/matrix.hpp"

TENON_NAMESPACE_BEGIN

/// The contents of an IDX file of unsigned bytes.
struct idx_array {
    std::vector<std::uint32_t> dimensions;
    std::vector<std::uint8_t> values;  // row-major

    std::size_t count() const noexcept { return dimensions.empty() ? 0 : dimensions[0]; }
    /// Elements per item (the product of the dimensions after the first).
    std::size_t item_size() const noexcept {
        std::size_t s = 1;
        for (std::size_t k = 1; k < dimensions.size(); ++k) s *= dimensions[k];
        return s;
    }
};

/// Parses IDX bytes already in memory. `source` names them in errors.
inline idx_array parse_idx(const std::uint8_t* data, std::size_t size, const std::string& source) {
    if (size >= 2 && data[0] == 0x1F && data[1] == 0x8B)
        raise(codes::prep_idx_compressed,
              source +
                  ": the file is gzip-compressed; include tenon/prep/idx_gzip.hpp, "
                  "link tenon::gzip and use read_idx_gzip_file");
    if (size < 4) raise(codes::prep_idx_truncated, source + ": " + std::to_string(size) + " bytes cannot hold the 4-byte magic number");
    const std::uint32_t magic =
        (std::uint32_t(data[0]) << 24) | (std::uint32_t(data[1]) << 16) | (std::uint32_t(data[2]) << 8) | std::uint32_t(data[3]);
    if (data[0] != 0 || data[1] != 0 || data[2] != 0x08 || data[3] == 0) {
        char hex[16];
        std::snprintf(hex, sizeof(hex), "0x%08X", static_cast<unsigned>(magic));
        raise(codes::prep_idx_magic,
              source + ": magic number " + hex + " is not an IDX file of unsigned bytes (expected 0x000008nn, nn = dimensions >= 1)");
    }
    idx_array a;
    const std::size_t dims = data[3];
    if (size < 4 + 4 * dims)
        raise(codes::prep_idx_truncated,
              source + ": the header declares " + std::to_string(dims) + " dimensions but the file has " + std::to_string(size) + " bytes");
    std::size_t total = 1;
    for (std::size_t k = 0; k < dims; ++k) {
        const std::uint8_t* p = data + 4 + 4 * k;
        const std::uint32_t d = (std::uint32_t(p[0]) << 24) | (std::uint32_t(p[1]) << 16) | (std::uint32_t(p[2]) << 8) | p[3];
        a.dimensions.push_back(d);
        if (d != 0 && total > std::numeric_limits<std::size_t>::max() / d)
            total = std::numeric_limits<std::size_t>::max();
        else
            total *= d;  // saturates instead of wrapping around
    }
    const std::size_t header = 4 + 4 * dims;
    if (total > size - header)
        raise(codes::prep_idx_truncated,
              source + ": the header declares " + std::to_string(total) + " values but only " + std::to_string(size - header) + " bytes follow it");
    a.values.assign(data + header, data + header + total);
    return a;
}

namespace detail {
inline std::vector<std::uint8_t> read_whole_file(const std::string& path) {
    std::ifstream in(path, std::ios::binary);
    if (!in) raise(codes::prep_file_open, path + ": cannot open for reading");
    std::vector<std::uint8_t> bytes;
    char buffer[1 << 16];
    while (in) {
        in.read(buffer, sizeof(buffer));
        bytes.insert(bytes.end(), buffer, buffer + in.gcount());
    }
    if (in.bad()) raise(codes::prep_file_open, path + ": read error");
    return bytes;
}

inline void require_idx_dimensions(const idx_array& a, std::size_t dims, const std::string& source) {
    if (a.dimensions.size() != dims)
        raise(codes::prep_idx_magic,
              source + ": expected an IDX file with " + std::to_string(dims) + " dimension(s), found " + std::to_string(a.dimensions.size()));
}
}  // namespace detail

/// Reads an uncompressed IDX file.
inline idx_array read_idx_file(const std::string& path) {
    const auto bytes = detail::read_whole_file(path);
    return parse_idx(bytes.data(), bytes.size(), path);
}

/// Labels (magic 0x00000801) as class indices.
inline std::vector<std::uint32_t> idx_labels(const idx_array& a, const std::string& source = "idx") {
    detail::require_idx_dimensions(a, 1, source);
    return std::vector<std::uint32_t>(a.values.begin(), a.values.end());
}

/// Images (magic 0x00000803) as a count x (rows * columns) matrix, each byte
/// multiplied by `scale` (1/255 maps pixels to [0, 1]).
template <class T>
matrix<T> idx_images(const idx_array& a, T scale = T(1) / T(255), const std::string& source = "idx") {
    TENON_REQUIRE_SCALAR(T);
    detail::require_idx_dimensions(a, 3, source);
    const std::size_t n = a.count(), width = a.item_size();
    matrix<T> m({n, width});
    T* p = m.data();
    for (std::size_t k = 0; k < n * width; ++k) p[k] = static_cast<T>(a.values[k]) * scale;
    return m;
}

TENON_NAMESPACE_END
