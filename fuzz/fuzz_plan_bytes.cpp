// Fuzz target: the measured plan's deserializer (measured_plan::from_bytes,
// prep/plan.hpp). Any input must either give a plan or raise tenon::error.
// A plan that loads must also
//   - serialize to bytes that load again and serialize to the same bytes;
//   - prepare one raw row (apply_cells) inside its feature_count() outputs
//     (AddressSanitizer sees any write past them), whatever the cells say.
#include <cstddef>
#include <cstdint>
#include <cstdlib>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include <tenon/prep/plan.hpp>

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
    std::optional<tenon::measured_plan> loaded;
    try {
        loaded.emplace(tenon::measured_plan::from_bytes(data, size));
    } catch (const tenon::error&) {
        return 0;
    }
    const tenon::measured_plan& plan = *loaded;
    const std::vector<std::uint8_t> bytes = plan.to_bytes();
    try {
        if (tenon::measured_plan::from_bytes(bytes).to_bytes() != bytes) std::abort();
    } catch (const tenon::error&) {
        std::abort();  // bytes the plan wrote itself must load
    }
    const std::size_t inputs = plan.input_columns().size();
    if (inputs > 4096 || plan.feature_count() > (std::size_t(1) << 16)) return 0;
    // Exactly feature_count() values: one more would hide an overrun from ASan.
    std::vector<double> out(plan.feature_count());
    for (const std::string_view cell :
         {std::string_view("1.5"), std::string_view(""), std::string_view("unseen"), std::string_view("2024-01-02T03:04:05")}) {
        const std::vector<std::string_view> cells(inputs, cell);
        try {
            plan.apply_cells(cells.data(), cells.size(), out.data());
        } catch (const tenon::error&) {}
    }
    return 0;
}
