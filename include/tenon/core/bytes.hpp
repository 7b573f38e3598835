// tenon: little-endian byte writing and bounds-checked reading, shared by
// every serialized form (architecture records, update-rule and schedule
// state, the measured plan, model-file sections).
//
// Numbers are written little-endian on any host, reals as the bits of an IEEE
// 754 double (floats and doubles come back bit for bit), strings as a u32
// length and the bytes. The reader checks every read, and every declared
// count against the bytes that remain before reserving, so corrupt or hostile
// input fails with an error code (byte_error_codes) instead of a huge
// allocation or a read past the end.
#pragma once

#include <algorithm>
#include <cstddef>
#include <cstdint>
#include <cstring>
#include <limits>
#include <string>
#include <utility>
#include <vector>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {

// Little-endian loads from bytes whose bounds the caller has checked.
inline std::uint16_t get_u16(const std::uint8_t* p) noexcept { return static_cast<std::uint16_t>(p[0] | (p[1] << 8)); }
inline std::uint32_t get_u32(const std::uint8_t* p) noexcept {
    return static_cast<std::uint32_t>(p[0]) | static_cast<std::uint32_t>(p[1]) << 8 | static_cast<std::uint32_t>(p[2]) << 16 |
        static_cast<std::uint32_t>(p[3]) << 24;
}
inline std::uint64_t get_u64(const std::uint8_t* p) noexcept {
    return static_cast<std::uint64_t>(get_u32(p)) | static_cast<std::uint64_t>(get_u32(p + 4)) << 32;
}

}  // namespace detail

/// Appends little-endian values to a byte vector.
class byte_writer {
public:
    explicit byte_writer(std::vector<std::uint8_t>& out) noexcept : out_(&out) {}

    void u8(std::uint8_t v) { out_->push_back(v); }
    void u16(std::uint16_t v) {
        for (int i = 0; i < 2; ++i) out_->push_back(static_cast<std::uint8_t>(v >> (8 * i)));
    }
    void u32(std::uint32_t v) {
        for (int i = 0; i < 4; ++i) out_->push_back(static_cast<std::uint8_t>(v >> (8 * i)));
    }
    void u64(std::uint64_t v) {
        for (int i = 0; i < 8; ++i) out_->push_back(static_cast<std::uint8_t>(v >> (8 * i)));
    }
    void f64(double v) {
        std::uint64_t bits = 0;
        std::memcpy(&bits, &v, sizeof bits);
        u64(bits);
    }
    void text(const std::string& s) {
        u32(static_cast<std::uint32_t>(s.size()));
        out_->insert(out_->end(), s.begin(), s.end());
    }
    void raw(const char* data, std::size_t n) {
        // One byte at a time: GCC 12 warns (-Wstringop-overflow) on a range
        // insert here, wrongly, once inlined into a fresh vector.
        for (std::size_t i = 0; i < n; ++i) out_->push_back(static_cast<std::uint8_t>(data[i]));
    }

private:
    std::vector<std::uint8_t>* out_;
};

/// The codes a byte_reader raises: bytes that end early, a declared count
/// or size larger than the bytes left, and any other invalid content.
struct byte_error_codes {
    const char* truncated;
    const char* oversize;
    const char* malformed;
};
/// Architecture records, update-rule and schedule state, model sections.
inline constexpr byte_error_codes model_record_errors{codes::model_record_truncated, codes::model_record_malformed, codes::model_record_malformed};
/// The measured plan's bytes.
inline constexpr byte_error_codes prep_bytes_errors{codes::prep_bytes_truncated, codes::prep_bytes_oversize, codes::prep_bytes_bad_tag};

/// Reads little-endian values from a byte range. `what` names the data in
/// error messages (e.g. "update rule state", "measured plan").
class byte_reader {
public:
    byte_reader(const std::uint8_t* data, std::size_t size, std::string what, const byte_error_codes& errors = model_record_errors)
        : data_(data), size_(size), what_(std::move(what)), errors_(errors) {}
    explicit byte_reader(const std::vector<std::uint8_t>& bytes, std::string what, const byte_error_codes& errors = model_record_errors)
        : byte_reader(bytes.data(), bytes.size(), std::move(what), errors) {}

    std::size_t position() const noexcept { return position_; }
    std::size_t remaining() const noexcept { return size_ - position_; }
    bool at_end() const noexcept { return position_ == size_; }

    std::uint8_t u8() {
        need(1, "a byte");
        return data_[position_++];
    }
    std::uint16_t u16() { return static_cast<std::uint16_t>(get(2, "a 16-bit integer")); }
    std::uint32_t u32() { return static_cast<std::uint32_t>(get(4, "a 32-bit integer")); }
    std::uint64_t u64() { return get(8, "a 64-bit integer"); }
    /// Reads a u64 count, index or size and checks that it fits std::size_t
    /// (where size_t has 32 bits, values from 2^32 up are refused).
    std::size_t u64_size(const char* of_what) {
        const std::size_t at = position_;
        const std::uint64_t v = u64();
        if (v > std::numeric_limits<std::size_t>::max()) {
            raise(errors_.oversize,
                  what_ + ": " + of_what + " " + std::to_string(v) + " at byte " + std::to_string(at) + " does not fit this platform's " +
                      std::to_string(8 * sizeof(std::size_t)) + "-bit sizes");
        }
        return static_cast<std::size_t>(v);
    }
    double f64() {
        const std::uint64_t bits = get(8, "a double");
        double v = 0;
        std::memcpy(&v, &bits, sizeof v);
        return v;
    }
    std::string text() {
        const std::uint32_t n = u32();
        if (n > remaining()) {
            raise(errors_.oversize,
                  what_ + ": a text of " + std::to_string(n) + " bytes declared at byte " + std::to_string(position_ - 4) + ", only " +
                      std::to_string(remaining()) + " bytes left");
        }
        std::string s(reinterpret_cast<const char*>(data_ + position_), n);
        position_ += n;
        return s;
    }

    /// Reads a u32 element count and checks that `count * min_bytes_each`
    /// bytes could still follow, so a corrupt count cannot trigger a huge
    /// reserve.
    std::uint32_t count(std::size_t min_bytes_each, const char* of_what) {
        const std::uint32_t n = u32();
        if (min_bytes_each > 0 && n > remaining() / min_bytes_each) {
            raise(errors_.oversize,
                  what_ + ": " + std::to_string(n) + " " + of_what + " declared at byte " + std::to_string(position_ - 4) + " cannot fit in the " +
                      std::to_string(remaining()) + " bytes left");
        }
        return n;
    }

    /// Reads a matrix's rows and columns (two u64) and checks that
    /// `bytes_per_value` bytes for each of their values could still follow.
    /// Each side is also bounded on its own (at most 2^32, and at most the
    /// largest size_t where that is smaller): an empty matrix passes the size
    /// check with any other side, and a larger side would overflow the signed
    /// strides of the storage that receives it (or size_t itself).
    std::pair<std::size_t, std::size_t> matrix_sides(std::size_t bytes_per_value, const char* of_what) {
        const std::size_t at = position_;
        const std::uint64_t rows = u64(), cols = u64();
        const std::uint64_t side_limit = std::min<std::uint64_t>(std::uint64_t(1) << 32, std::numeric_limits<std::size_t>::max());
        const std::string declared = std::to_string(rows) + "x" + std::to_string(cols);
        if (rows > side_limit || cols > side_limit) {
            raise(errors_.oversize,
                  what_ + ": " + of_what + " of " + declared + " values declared at byte " + std::to_string(at) + " has a side above " +
                      (side_limit == std::uint64_t(1) << 32 ? std::string("2^32") : std::to_string(side_limit)));
        }
        if (cols != 0 && bytes_per_value > 0 && rows > remaining() / bytes_per_value / cols) {
            raise(errors_.oversize,
                  what_ + ": " + of_what + " of " + declared + " values declared at byte " + std::to_string(at) + " cannot fit in the " +
                      std::to_string(remaining()) + " bytes left");
        }
        return {static_cast<std::size_t>(rows), static_cast<std::size_t>(cols)};
    }

    /// Reads a byte and checks it equals `tag`.
    void expect_tag(std::uint8_t tag, const char* of_what) {
        const std::size_t at = position_;
        const std::uint8_t got = u8();
        if (got != tag) {
            raise(errors_.malformed,
                  what_ + ": expected the tag of " + of_what + " (" + std::to_string(tag) + ") at byte " + std::to_string(at) + ", found " +
                      std::to_string(got));
        }
    }
    /// Reads a byte holding an enumeration value and checks it is <= max.
    template <class E>
    E enumeration(std::uint8_t max, const char* of_what) {
        const std::size_t at = position_;
        const std::uint8_t v = u8();
        if (v > max) {
            raise(errors_.malformed,
                  what_ + ": " + of_what + " value " + std::to_string(v) + " at byte " + std::to_string(at) + " is not a known value (at most " +
                      std::to_string(max) + ")");
        }
        return static_cast<E>(v);
    }
    bool flag(const char* of_what) { return enumeration<std::uint8_t>(1, of_what) != 0; }

    /// Raises unless every byte has been read.
    void expect_end() const {
        if (position_ != size_) {
            raise(errors_.malformed,
                  what_ + ": " + std::to_string(size_ - position_) + " unexpected bytes after the end at byte " + std::to_string(position_));
        }
    }

    /// Raises the reader's code for invalid content, with its context.
    [[noreturn]] void fail(const std::string& message) const {
        raise(errors_.malformed, what_ + " at byte " + std::to_string(position_) + ": " + message);
    }

    const std::string& what() const noexcept { return what_; }

private:
    void need(std::size_t n, const char* of_what) const {
        if (n > remaining()) {
            raise(errors_.truncated,
                  what_ + ": the bytes end at " + std::to_string(size_) + " while reading " + of_what + " at byte " + std::to_string(position_));
        }
    }
    std::uint64_t get(int n, const char* of_what) {
        need(static_cast<std::size_t>(n), of_what);
        std::uint64_t v = 0;
        for (int k = 0; k < n; ++k) v |= static_cast<std::uint64_t>(data_[position_ + static_cast<std::size_t>(k)]) << (8 * k);
        position_ += static_cast<std::size_t>(n);
        return v;
    }

    const std::uint8_t* data_;
    std::size_t size_;
    std::size_t position_ = 0;
    std::string what_;
    byte_error_codes errors_;
};

TENON_NAMESPACE_END
