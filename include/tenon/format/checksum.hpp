// tenon: checksums of model-file sections and fingerprints of training data.
//
// crc32: the CRC-32 of IEEE 802.3, table-driven one byte at a time (Sarwate
// 1988); it detects every change of a single byte (Peterson & Brown 1961).
// fnv1a_64: the 64-bit FNV-1a hash of Fowler, Noll and Vo; it fingerprints
// the training cells and is not a cryptographic hash. Parameters, check
// value and full citations: docs/design/model-file.md.
#pragma once

#include <array>
#include <cstddef>
#include <cstdint>

#include "tenon/version.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {
inline constexpr std::array<std::uint32_t, 256> make_crc32_table() noexcept {
    std::array<std::uint32_t, 256> table{};
    for (std::uint32_t n = 0; n < 256; ++n) {
        std::uint32_t c = n;
        for (int k = 0; k < 8; ++k) c = (c & 1u) ? 0xEDB88320u ^ (c >> 1) : c >> 1;
        table[n] = c;
    }
    return table;
}
inline constexpr std::array<std::uint32_t, 256> crc32_table = make_crc32_table();
}  // namespace detail

/// Continues a CRC-32 over more bytes: crc32_update(crc32_update(0, a), b)
/// equals the CRC of a followed by b. Start with 0.
inline std::uint32_t crc32_update(std::uint32_t crc, const void* data, std::size_t size) noexcept {
    const auto* p = static_cast<const std::uint8_t*>(data);
    crc = ~crc;
    for (std::size_t i = 0; i < size; ++i) crc = detail::crc32_table[(crc ^ p[i]) & 0xFFu] ^ (crc >> 8);
    return ~crc;
}

/// The CRC-32 (IEEE 802.3) of `size` bytes.
inline std::uint32_t crc32(const void* data, std::size_t size) noexcept { return crc32_update(0, data, size); }

/// Streaming 64-bit FNV-1a hash.
class fnv1a_64 {
public:
    static constexpr std::uint64_t offset_basis = 14695981039346656037ull;
    static constexpr std::uint64_t prime = 1099511628211ull;

    void add(const void* data, std::size_t size) noexcept {
        const auto* p = static_cast<const std::uint8_t*>(data);
        for (std::size_t i = 0; i < size; ++i) {
            hash_ ^= p[i];
            hash_ *= prime;
        }
    }
    void add_byte(std::uint8_t b) noexcept { add(&b, 1); }
    /// Adds a 64-bit value little-endian, so the hash does not depend on the host.
    void add_u64(std::uint64_t v) noexcept {
        std::uint8_t b[8];
        for (int k = 0; k < 8; ++k) b[k] = static_cast<std::uint8_t>(v >> (8 * k));
        add(b, 8);
    }
    std::uint64_t value() const noexcept { return hash_; }

private:
    std::uint64_t hash_ = offset_basis;
};

TENON_NAMESPACE_END
