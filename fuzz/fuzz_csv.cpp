// Fuzz target: the CSV reader (prep/csv.hpp). Any input must either give a
// table or raise tenon::error; anything else (a crash, another exception, a
// sanitizer report, a hang) is a finding.
//
// The first byte chooses the options, the rest is the text: bits 0-1 the
// delimiter, bit 2 a tiny read chunk (1 to 32 bytes, so records, quotes and
// CRLF pairs straddle chunk boundaries), bit 3 the streaming summary as well.
// Without bit 2, bits 4-7 (N > 0) set tiny limits, so short inputs reach
// them: fields of at most 4N bytes, at most N categories per column.
#include <cstddef>
#include <cstdint>
#include <cstdlib>
#include <sstream>
#include <string>

#include <tenon/prep/csv.hpp>

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
    if (size == 0) return 0;
    const std::uint8_t choice = data[0];
    tenon::csv_options options;
    const char delimiters[] = {',', ';', '\t', '|'};
    options.delimiter = delimiters[choice & 3u];
    if (choice & 4u)
        options.chunk_bytes = 1 + (choice >> 4) * 2;
    else if (choice >> 4) {
        options.max_field_bytes = 4u * (choice >> 4);
        options.max_categories = choice >> 4;
    }
    const std::string text(reinterpret_cast<const char*>(data + 1), size - 1);
    try {
        std::istringstream in(text);
        const tenon::table t = tenon::read_csv(in, options, "fuzz.csv");
        // Every column holds one cell per row; touch each through the accessors.
        std::size_t present = 0;
        for (std::size_t c = 0; c < t.column_count(); ++c) {
            const tenon::column& col = t[c];
            if (col.size() != t.row_count()) std::abort();
            for (std::size_t r = 0; r < t.row_count(); ++r) present += col.is_missing(r) ? 0 : 1;
        }
        (void)present;
    } catch (const tenon::error&) {}
    if (choice & 8u) {
        try {
            std::istringstream in(text);
            (void)tenon::summarize_csv(in, options, "fuzz.csv");
        } catch (const tenon::error&) {}
    }
    return 0;
}
