// tenon: little-endian byte writing and bounds-checked reading.
//
// Architecture records, update-rule state and schedule state become plain
// byte vectors that a later model file embeds. Every multi-byte number is
// written little-endian whatever the host's byte order, and reals travel as
// the bit pattern of an IEEE 754 double, so a float or double value comes back
// bit for bit. The reader checks every length against the bytes that remain
// before it reserves memory, so a corrupt or hostile input fails with an error
// code instead of a huge allocation or a read past the end.
#pragma once

#include <cstddef>
#include <cstdint>
#include <cstring>
#include <string>
#include <utility>
#include <vector>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"

TENON_NAMESPACE_BEGIN

/// Appends little-endian values to a byte vector.
class byte_writer {
public:
    explicit byte_writer(std::vector<std::uint8_t>& out) noexcept : out_(&out) {}

    void u8(std::uint8_t v) { out_->push_back(v); }
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

private:
    std::vector<std::uint8_t>* out_;
};

/// Reads little-endian values from a byte range, raising
/// model.record.truncated when the bytes end early. `what` names the record
/// in error messages (e.g. "update rule state").
class byte_reader {
public:
    byte_reader(const std::uint8_t* data, std::size_t size, std::string what)
        : data_(data), size_(size), what_(std::move(what)) {}
    explicit byte_reader(const std::vector<std::uint8_t>& bytes, std::string what)
        : byte_reader(bytes.data(), bytes.size(), std::move(what)) {}

    std::size_t position() const noexcept { return position_; }
    std::size_t remaining() const noexcept { return size_ - position_; }
    bool at_end() const noexcept { return position_ == size_; }

    std::uint8_t u8() {
        need(1, "a byte");
        return data_[position_++];
    }
    std::uint32_t u32() {
        need(4, "a 32-bit integer");
        std::uint32_t v = 0;
        for (int i = 0; i < 4; ++i) v |= static_cast<std::uint32_t>(data_[position_++]) << (8 * i);
        return v;
    }
    std::uint64_t u64() {
        need(8, "a 64-bit integer");
        std::uint64_t v = 0;
        for (int i = 0; i < 8; ++i) v |= static_cast<std::uint64_t>(data_[position_++]) << (8 * i);
        return v;
    }
    double f64() {
        const std::uint64_t bits = u64();
        double v = 0;
        std::memcpy(&v, &bits, sizeof v);
        return v;
    }
    std::string text() {
        const std::uint32_t n = u32();
        need(n, "a string of " + std::to_string(n) + " bytes");
        std::string s(reinterpret_cast<const char*>(data_ + position_), n);
        position_ += n;
        return s;
    }

    /// Reads an element count and checks that `count * min_bytes_each` bytes
    /// could still follow, so a corrupt count cannot trigger a huge reserve.
    std::size_t count(std::size_t min_bytes_each, const char* of_what) {
        const std::size_t at = position_;
        const std::uint32_t n = u32();
        if (min_bytes_each > 0 && n > remaining() / min_bytes_each) {
            raise(codes::model_record_malformed, what_ + " at byte " + std::to_string(at) + ": " + std::to_string(n) + " " +
                                                     of_what + " declared, but only " + std::to_string(remaining()) +
                                                     " bytes follow");
        }
        return n;
    }

    /// Reads a matrix's rows and columns (two u64) and checks that
    /// `bytes_per_value` bytes for each of their values could still follow.
    /// Each side is also bounded on its own (at most 2^32): an empty matrix
    /// passes the size check with any other side, and a larger side would
    /// overflow the signed strides of the storage that receives it.
    std::pair<std::size_t, std::size_t> matrix_sides(std::size_t bytes_per_value, const char* of_what) {
        const std::size_t at = position_;
        const std::uint64_t rows = u64(), cols = u64();
        const std::uint64_t side_limit = std::uint64_t(1) << 32;
        const std::string declared = std::to_string(rows) + "x" + std::to_string(cols);
        if (rows > side_limit || cols > side_limit) {
            raise(codes::model_record_malformed,
                  what_ + " at byte " + std::to_string(at) + ": " + of_what + " declares " + declared + " values; a side may be at most 2^32");
        }
        if (cols != 0 && bytes_per_value > 0 && rows > remaining() / bytes_per_value / cols) {
            raise(codes::model_record_malformed, what_ + " at byte " + std::to_string(at) + ": " + of_what + " declares " + declared +
                                                     " values, more than the " + std::to_string(remaining()) + " bytes left hold");
        }
        return {static_cast<std::size_t>(rows), static_cast<std::size_t>(cols)};
    }

    /// Raises model.record.malformed with the reader's context.
    [[noreturn]] void fail(const std::string& message) const {
        raise(codes::model_record_malformed, what_ + " at byte " + std::to_string(position_) + ": " + message);
    }

    const std::string& what() const noexcept { return what_; }

private:
    void need(std::size_t n, const std::string& item) const {
        if (n > size_ - position_) {
            raise(codes::model_record_truncated, what_ + ": expected " + item + " at byte " + std::to_string(position_) +
                                                     ", but only " + std::to_string(size_ - position_) + " bytes remain");
        }
    }

    const std::uint8_t* data_;
    std::size_t size_;
    std::size_t position_ = 0;
    std::string what_;
};

TENON_NAMESPACE_END
