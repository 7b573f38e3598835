// tenon: the little-endian byte writer and bounds-checked reader of the
// measured plan's serialized state (internal to prep/).
//
// Integers are written little-endian byte by byte (so the bytes are the same
// on every host), doubles as their IEEE 754 binary64 bit pattern, strings as
// a u32 length and the bytes. The reader checks every read against the end
// of the buffer and every declared count against the bytes left, raising
// prep.bytes.truncated / prep.bytes.oversize / prep.bytes.bad_tag, so
// corrupted or hostile bytes never read out of bounds or allocate wildly.
#pragma once

#include <cstdint>
#include <cstring>
#include <string>
#include <utility>
#include <vector>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {

class prep_byte_writer {
public:
    void u8(std::uint8_t v) { bytes_.push_back(v); }
    void u16(std::uint16_t v) { put(v, 2); }
    void u32(std::uint32_t v) { put(v, 4); }
    void u64(std::uint64_t v) { put(v, 8); }
    void f64(double v) {
        std::uint64_t bits;
        static_assert(sizeof(bits) == sizeof(v), "double must be 64-bit");
        std::memcpy(&bits, &v, sizeof(v));
        u64(bits);
    }
    void text(const std::string& s) {
        u32(static_cast<std::uint32_t>(s.size()));
        bytes_.insert(bytes_.end(), s.begin(), s.end());
    }
    void raw(const char* data, std::size_t n) { bytes_.insert(bytes_.end(), data, data + n); }

    const std::vector<std::uint8_t>& bytes() const noexcept { return bytes_; }
    std::vector<std::uint8_t> release() noexcept { return std::move(bytes_); }

private:
    void put(std::uint64_t v, int n) {
        for (int k = 0; k < n; ++k) bytes_.push_back(static_cast<std::uint8_t>(v >> (8 * k)));
    }
    std::vector<std::uint8_t> bytes_;
};

class prep_byte_reader {
public:
    /// `what` names the data in error messages, e.g. "measured plan".
    prep_byte_reader(const std::uint8_t* data, std::size_t size, std::string what)
        : data_(data), size_(size), what_(std::move(what)) {}

    std::size_t position() const noexcept { return position_; }
    std::size_t remaining() const noexcept { return size_ - position_; }

    std::uint8_t u8() {
        need(1, "a byte");
        return data_[position_++];
    }
    std::uint16_t u16() { return static_cast<std::uint16_t>(get(2, "a 16-bit integer")); }
    std::uint32_t u32() { return static_cast<std::uint32_t>(get(4, "a 32-bit integer")); }
    std::uint64_t u64() { return get(8, "a 64-bit integer"); }
    double f64() {
        const std::uint64_t bits = get(8, "a double");
        double v;
        std::memcpy(&v, &bits, sizeof(v));
        return v;
    }
    std::string text() {
        const std::uint32_t n = u32();
        if (n > remaining())
            raise(codes::prep_bytes_oversize, what_ + ": a text of " + std::to_string(n) + " bytes declared at byte " +
                                                  std::to_string(position_ - 4) + ", only " + std::to_string(remaining()) +
                                                  " bytes left");
        std::string s(reinterpret_cast<const char*>(data_ + position_), n);
        position_ += n;
        return s;
    }
    /// A u32 element count, checked against the bytes left given the
    /// smallest possible size of one element.
    std::uint32_t count(std::size_t min_element_bytes, const char* of_what) {
        const std::uint32_t n = u32();
        if (min_element_bytes > 0 && n > remaining() / min_element_bytes)
            raise(codes::prep_bytes_oversize, what_ + ": " + std::to_string(n) + " " + of_what + " declared at byte " +
                                                  std::to_string(position_ - 4) + " cannot fit in the " +
                                                  std::to_string(remaining()) + " bytes left");
        return n;
    }
    /// Reads a byte and checks it equals `tag`.
    void expect_tag(std::uint8_t tag, const char* of_what) {
        const std::size_t at = position_;
        const std::uint8_t got = u8();
        if (got != tag)
            raise(codes::prep_bytes_bad_tag, what_ + ": expected the tag of " + of_what + " (" + std::to_string(tag) +
                                                 ") at byte " + std::to_string(at) + ", found " + std::to_string(got));
    }
    /// Reads a byte holding an enumeration value and checks it is <= max.
    template <class E>
    E enumeration(std::uint8_t max, const char* of_what) {
        const std::size_t at = position_;
        const std::uint8_t v = u8();
        if (v > max)
            raise(codes::prep_bytes_bad_tag, what_ + ": " + of_what + " value " + std::to_string(v) + " at byte " +
                                                 std::to_string(at) + " is not a known value (at most " +
                                                 std::to_string(max) + ")");
        return static_cast<E>(v);
    }
    bool flag(const char* of_what) { return enumeration<std::uint8_t>(1, of_what) != 0; }

    /// Raises unless every byte has been read.
    void expect_end() const {
        if (position_ != size_)
            raise(codes::prep_bytes_bad_tag, what_ + ": " + std::to_string(size_ - position_) +
                                                 " unexpected bytes after the end at byte " + std::to_string(position_));
    }

private:
    void need(std::size_t n, const char* of_what) const {
        if (n > remaining())
            raise(codes::prep_bytes_truncated, what_ + ": the bytes end at " + std::to_string(size_) + " while reading " +
                                                   of_what + " at byte " + std::to_string(position_));
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
};

}  // namespace detail

TENON_NAMESPACE_END
