// Fuzz target: the model-file loader (deploy/model_file.hpp) and what a host
// does next with a file that loads: rebuild the network, compile a
// predictor, predict one row. Any input must either work or raise
// tenon::error.
//
// Every input is tried twice: as given, and with its header and section
// checksums recomputed, so mutations reach the section parsers instead of
// stopping at the CRC-32 checks.
#include <cstddef>
#include <cstdint>
#include <string>
#include <string_view>
#include <vector>

#include <tenon/deploy/checksum.hpp>
#include <tenon/deploy/model_file.hpp>
#include <tenon/deploy/predictor.hpp>

namespace {

std::uint64_t read_le(const std::uint8_t* p, int bytes) {
    std::uint64_t v = 0;
    for (int k = bytes - 1; k >= 0; --k) v = v << 8 | p[k];
    return v;
}
void write_le32(std::uint8_t* p, std::uint32_t v) {
    for (int k = 0; k < 4; ++k) p[k] = static_cast<std::uint8_t>(v >> (8 * k));
}

// Recomputes the checksums where the layout (docs/model-file-format.md)
// allows: each section's payload and header CRC, then the file header's.
std::vector<std::uint8_t> with_checksums_fixed(std::vector<std::uint8_t> b) {
    const std::size_t header = 24, section_header = 24;
    if (b.size() < header) return b;
    const auto count = static_cast<std::size_t>(read_le(b.data() + 18, 2));
    std::size_t at = header;
    for (std::size_t k = 0; k < count && b.size() - at >= section_header; ++k) {
        std::uint8_t* h = b.data() + at;
        const std::uint64_t length = read_le(h + 8, 8);
        if (length > b.size() - at - section_header) break;
        write_le32(h + 16, tenon::crc32(h + section_header, static_cast<std::size_t>(length)));
        write_le32(h + 20, tenon::crc32(h, 20));
        at += section_header + static_cast<std::size_t>(length);
    }
    write_le32(b.data() + 20, tenon::crc32(b.data(), 20));
    return b;
}

template <class T>
void load_and_predict(const std::vector<std::uint8_t>& bytes, const tenon::model_limits& limits) {
    try {
        const tenon::model_file<T> m = tenon::model_file_from_bytes<T>(bytes, limits, "fuzz.tnm");
        tenon::predictor<T> p(m, 2);
        const std::vector<T> zeros(p.feature_count() * 2, T(0));
        tenon::prediction_view<T> out;
        (void)p.try_predict_prepared(zeros.data(), 2, out);
        if (p.has_plan()) {
            const std::vector<std::string_view> cells(p.input_count(), std::string_view("1"));
            (void)p.try_predict_cells(cells.data(), 1, out);
        }
    } catch (const tenon::error&) {}
}

void exercise(const std::vector<std::uint8_t>& bytes) {
    tenon::model_limits limits;
    limits.max_file_bytes = std::uint64_t(1) << 20;
    limits.max_section_bytes = std::uint64_t(1) << 20;
    try {
        (void)tenon::inspect_model_bytes(bytes, limits, "fuzz.tnm");
    } catch (const tenon::error&) {}
    load_and_predict<float>(bytes, limits);
    load_and_predict<double>(bytes, limits);
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
    const std::vector<std::uint8_t> bytes(data, data + size);
    exercise(bytes);
    const std::vector<std::uint8_t> fixed = with_checksums_fixed(bytes);
    if (fixed != bytes) exercise(fixed);
    return 0;
}
