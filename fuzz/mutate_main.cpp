// A random-mutation driver for a fuzz target's LLVMFuzzerTestOneInput, for
// compilers and targets without libFuzzer (GCC; armhf under qemu-user):
//   tenon_fuzz_mutate_<target> MUTANTS SEED DIRECTORY...
// runs every input of the directories, then MUTANTS mutants, each made from
// a randomly chosen input by 1 to 8 random edits (a bit flipped, a byte set
// to a boundary value, a 2-, 4- or 8-byte little-endian field set to a
// boundary of its width or to 2^32 and its neighbours, bytes inserted,
// erased or duplicated). Mutants are deterministic given the seed (tenon's
// random_engine), so a failure is reproduced by rerunning the command; the
// driver prints each mutant's number before running it. Unlike libFuzzer it
// has no coverage feedback and no sanitizer: it finds crashes, hangs,
// uncaught exceptions and failed assertions.
#include <algorithm>
#include <cstddef>
#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <string>
#include <vector>

#include <tenon/core/random.hpp>

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size);

namespace {

void set_le(std::vector<std::uint8_t>& b, std::size_t at, int bytes, std::uint64_t v) {
    for (int k = 0; k < bytes && at + static_cast<std::size_t>(k) < b.size(); ++k)
        b[at + static_cast<std::size_t>(k)] = static_cast<std::uint8_t>(v >> (8 * k));
}

void mutate(std::vector<std::uint8_t>& b, tenon::random_engine& rng) {
    const std::uint64_t boundaries[] = {0,
                                        1,
                                        0x7F,
                                        0x80,
                                        0xFF,
                                        0x7FFF,
                                        0xFFFF,
                                        0x7FFFFFFFu,
                                        0xFFFFFFFFu,
                                        std::uint64_t(1) << 32,
                                        (std::uint64_t(1) << 32) + 1,
                                        std::uint64_t(1) << 63,
                                        ~std::uint64_t(0)};
    const std::size_t edits = 1 + static_cast<std::size_t>(rng.below(8));
    for (std::size_t e = 0; e < edits; ++e) {
        const std::uint64_t kind = rng.below(6);
        const std::size_t at = b.empty() ? 0 : static_cast<std::size_t>(rng.below(b.size()));
        if (kind == 0 && !b.empty()) {
            b[at] = static_cast<std::uint8_t>(b[at] ^ (1u << rng.below(8)));
        } else if (kind == 1 && !b.empty()) {
            b[at] = static_cast<std::uint8_t>(boundaries[rng.below(5)]);
        } else if (kind == 2) {
            const int widths[] = {2, 4, 8};
            set_le(b, at, widths[rng.below(3)], boundaries[rng.below(std::size(boundaries))]);
        } else if (kind == 3) {
            const std::size_t n = 1 + static_cast<std::size_t>(rng.below(16));
            b.insert(b.begin() + static_cast<std::ptrdiff_t>(at), n, static_cast<std::uint8_t>(rng.below(256)));
        } else if (kind == 4 && !b.empty()) {
            const std::size_t n = std::min<std::size_t>(b.size() - at, 1 + static_cast<std::size_t>(rng.below(32)));
            b.erase(b.begin() + static_cast<std::ptrdiff_t>(at), b.begin() + static_cast<std::ptrdiff_t>(at + n));
        } else if (!b.empty()) {
            const std::size_t n = std::min<std::size_t>(b.size() - at, 1 + static_cast<std::size_t>(rng.below(64)));
            const std::vector<std::uint8_t> chunk(b.begin() + static_cast<std::ptrdiff_t>(at), b.begin() + static_cast<std::ptrdiff_t>(at + n));
            const std::size_t to = static_cast<std::size_t>(rng.below(b.size() + 1));
            b.insert(b.begin() + static_cast<std::ptrdiff_t>(to), chunk.begin(), chunk.end());
        }
    }
}

}  // namespace

int main(int argc, char** argv) {
    if (argc < 4) {
        std::fprintf(stderr, "usage: %s MUTANTS SEED DIRECTORY...\n", argv[0]);
        return 2;
    }
    const unsigned long long mutants = std::strtoull(argv[1], nullptr, 10);
    tenon::random_engine rng(std::strtoull(argv[2], nullptr, 10));
    std::vector<std::vector<std::uint8_t>> inputs;
    for (int k = 3; k < argc; ++k) {
        std::vector<std::filesystem::path> files;
        for (const auto& entry : std::filesystem::directory_iterator(argv[k]))
            if (entry.is_regular_file() && entry.path().filename().string()[0] != '.') files.push_back(entry.path());
        std::sort(files.begin(), files.end());
        for (const auto& path : files) {
            std::ifstream in(path, std::ios::binary);
            inputs.emplace_back((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
        }
    }
    if (inputs.empty()) {
        std::fprintf(stderr, "mutate: no inputs\n");
        return 1;
    }
    for (const auto& input : inputs) LLVMFuzzerTestOneInput(input.empty() ? nullptr : input.data(), input.size());
    for (unsigned long long m = 0; m < mutants; ++m) {
        std::vector<std::uint8_t> b = inputs[static_cast<std::size_t>(rng.below(inputs.size()))];
        mutate(b, rng);
        if (m % 500 == 0) std::fprintf(stderr, "mutate: mutant %llu of %llu\n", m, mutants);
        LLVMFuzzerTestOneInput(b.empty() ? nullptr : b.data(), b.size());
    }
    std::printf("mutate: %zu inputs and %llu mutants ran without a crash\n", inputs.size(), mutants);
    return 0;
}
