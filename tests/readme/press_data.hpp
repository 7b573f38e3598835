// An invented press log for the README's examples: a serial number, ram
// speed (mm/s, one decimal), die (D1..D8), oil temperature (degrees C) and
// the fault seen (ok, crack, wrinkle), with what plant logs hold: about 3%
// of the faults not recorded (NA) and about 2% of the speed and die cells
// empty. The fault depends on speed, oil temperature and die, so a model
// has something to learn. Seeded: the same seed writes the same file.
#pragma once

#include <cstdint>
#include <fstream>
#include <stdexcept>
#include <string>

#include <tenon/core/random.hpp>
#include <tenon/prep/cell_parsing.hpp>

namespace readme_test {

inline void write_press_log(const std::string& path, std::size_t rows, std::uint64_t seed) {
    std::ofstream out(path, std::ios::binary);
    if (!out) throw std::runtime_error("cannot write " + path);
    tenon::random_engine engine(seed);
    out << "serial_no,ram_speed,die,oil_temp,fault\n";
    for (std::size_t i = 0; i < rows; ++i) {
        const double speed = 30.0 + 0.1 * static_cast<double>(engine.below(250));  // 30.0 .. 54.9
        const unsigned die = 1 + static_cast<unsigned>(engine.below(8));
        const unsigned oil = 50 + static_cast<unsigned>(engine.below(26));  // 50 .. 75
        const char* fault = speed > 47.0 && oil < 58 ? "crack" : (die >= 7 && oil > 68) ? "wrinkle" : "ok";
        out << "S-" << (100000 + seed * 10000 + i) << ',';
        if (engine.below(50) != 0) out << tenon::number_to_text(speed);
        out << ',';
        if (engine.below(50) != 0) out << 'D' << die;
        out << ',' << oil << ',' << (engine.below(33) == 0 ? "NA" : fault) << '\n';
    }
    if (!out.flush()) throw std::runtime_error("cannot write " + path);
}

}  // namespace readme_test
