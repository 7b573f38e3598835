// tenon: reading gzip-compressed IDX files (such as the Fashion-MNIST *.gz
// files). Needs zlib: link the tenon::gzip component target, which defines
// TENON_HAS_ZLIB=1. Uncompressed files are read too (zlib's gzread passes
// them through), so one call serves both.
#pragma once

#include <string>
#include <vector>

#include <zlib.h>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"
#include "tenon/prep/idx.hpp"

TENON_NAMESPACE_BEGIN

/// Reads an IDX file, gzip-compressed or not.
inline idx_array read_idx_gzip_file(const std::string& path) {
    gzFile file = gzopen(path.c_str(), "rb");
    if (!file) raise(codes::prep_file_open, path + ": cannot open for reading");
    std::vector<std::uint8_t> bytes;
    std::vector<std::uint8_t> buffer(1 << 16);
    for (;;) {
        const int n = gzread(file, buffer.data(), static_cast<unsigned>(buffer.size()));
        if (n < 0) {
            int code = 0;
            const std::string message = gzerror(file, &code);
            gzclose(file);
            raise(codes::prep_idx_compressed, path + ": gzip data could not be decompressed (" + message + ")");
        }
        if (n == 0) break;
        bytes.insert(bytes.end(), buffer.begin(), buffer.begin() + n);
    }
    gzclose(file);
    return parse_idx(bytes.data(), bytes.size(), path);
}

TENON_NAMESPACE_END
