// tenon: the model file, a binary format of tenon's own.
//
// A 24-byte header, then sections (ARCH, WGHT, PLAN, META, REFS, RPLY, RSUM,
// RSVR, HIST, REFD, ENSM, CALB), each with its own section header and CRC-32;
// every number little-endian. A reader skips an unknown section unless its
// required flag is set. Loading trusts nothing: every checksum, length and
// limit is checked before the bytes are used or anything is allocated, and
// each failure raises its own deploy.model.* code. The byte layout:
// docs/model-file-format.md; the sections and checks: docs/design/model-file.md.
#pragma once

#include <chrono>
#include <cstddef>
#include <cstdint>
#include <cmath>
#include <cstring>
#include <limits>
#include <optional>
#include <string>
#include <utility>
#include <vector>

#include "tenon/core/bytes.hpp"
#include "tenon/core/compiled_once.hpp"
#include "tenon/format/architecture.hpp"
#include "tenon/format/atomic_file.hpp"
#include "tenon/format/calibration.hpp"
#include "tenon/format/checksum.hpp"
#include "tenon/format/training_state.hpp"
#include "tenon/prep/plan.hpp"
#include "tenon/prep/reference.hpp"

TENON_NAMESPACE_BEGIN

/// The newest model-file format version this build writes and reads
/// (2 added section CALB; a file without it is still written as version 1,
/// and version-1 files load without calibration).
inline constexpr std::uint16_t model_format_version = 2;

/// Limits checked while loading, before anything is allocated.
struct model_limits {
    std::uint64_t max_file_bytes = std::uint64_t(1) << 30;  // 1 GiB
    std::uint64_t max_section_bytes = std::uint64_t(256) << 20;  // 256 MiB
    std::uint32_t max_sections = 64;
};

/// How and when a model was trained (section META).
struct training_metadata {
    std::string library_version;
    std::int64_t created_unix_seconds = 0;
    std::uint64_t seed = 0;
    std::uint64_t epochs_planned = 0;
    std::uint64_t epochs_run = 0;
    std::uint64_t best_epoch = 0;
    std::uint64_t steps = 0;
    std::uint64_t training_rows = 0;
    std::uint64_t validation_rows = 0;
    std::uint64_t dropped_rows = 0;
    /// FNV-1a 64 of the training cells in row order (training_fingerprint).
    std::uint64_t data_fingerprint = 0;
    std::string stop_reason;
    std::string loss;
    std::vector<std::pair<std::string, double>> metrics;  // e.g. best_validation_loss
    std::vector<std::pair<std::string, std::string>> settings;  // e.g. hidden = "32,32"

    /// The metric of the given name, or NaN.
    double metric(const std::string& name) const noexcept {
        for (const auto& m : metrics)
            if (m.first == name) return m.second;
        return std::numeric_limits<double>::quiet_NaN();
    }
};

/// A bounded sample of raw training rows as cell texts (section RPLY), with
/// the state of the reservoir that keeps it uniform across retrainings
/// (section RSVR; absent from files written before it existed, then
/// rows_seen and capacity are 0 and engine is empty).
struct replay_sample {
    std::vector<std::string> columns;
    std::vector<column_kind> kinds;
    std::vector<std::string> cells;  // rows x columns, row-major; numbers as shortest text
    std::vector<std::uint8_t> missing;  // 1 where the cell is missing
    /// Rows offered to the reservoir so far, over all trainings (0 = unknown).
    std::uint64_t rows_seen = 0;
    /// The most rows the sample holds (0 = unknown).
    std::uint64_t capacity = 0;
    /// The engine that draws the reservoir's slots, to continue its stream.
    std::optional<random_state> engine;
    std::uint64_t rows() const noexcept { return columns.empty() ? 0 : cells.size() / columns.size(); }
};

/// A weight matrix or state buffer with its qualified name.
template <class T>
struct named_matrix {
    std::string name;
    matrix<T> values;
};

/// Everything needed to continue training (section RSUM).
template <class T>
struct resume_state {
    std::string update_kind;  // update_rule::kind()
    std::vector<std::uint8_t> update_state;  // update_rule::save_state()
    std::string schedule_kind;  // rate_schedule::kind()
    std::vector<std::uint8_t> schedule_state;
    training_progress<T> progress;
    /// Random engines inside layers (dropout), by qualified layer name.
    std::vector<std::pair<std::string, random_state>> layer_engines;
};

/// The contents of a model file.
template <class T>
struct model_file {
    layer_record architecture;
    std::vector<named_matrix<T>> weights;  // the network's parameters, then its state buffers
    /// The ensemble's other members (section ENSM), each weighted like
    /// `weights` for the same architecture; empty for one network.
    std::vector<std::vector<named_matrix<T>>> members;
    std::optional<measured_plan> plan;
    /// How the current weights were made (section META).
    std::optional<training_metadata> metadata;
    /// Earlier trainings whose weights these replaced, oldest first (section
    /// HIST; a retraining that is promoted appends the incumbent's metadata).
    std::vector<training_metadata> history;
    std::vector<feature_reference> references;
    std::optional<replay_sample> replay;
    std::optional<resume_state<T>> resume;
    /// The calibration of the current weights (section CALB; absent from
    /// version-1 files and from models never calibrated).
    std::optional<model_calibration> calibration;
    /// Set when read: the version of the file, and the ids of skipped sections.
    std::uint16_t format_version = model_format_version;
    std::vector<std::string> skipped_sections;
};

/// One section as found in a file.
struct model_section_info {
    std::string id;
    bool required = false;
    std::uint64_t offset = 0;  // of the payload
    std::uint64_t length = 0;
    std::uint32_t checksum = 0;
};

/// What inspect_model_bytes() finds without choosing a scalar type.
struct model_file_summary {
    std::uint16_t format_version = 0;
    std::size_t scalar_bytes = 0;  // 4 = float, 8 = double
    std::uint64_t file_bytes = 0;
    std::vector<model_section_info> sections;
    layer_record architecture;
    std::uint64_t parameter_values = 0;  // values in WGHT
    std::optional<measured_plan> plan;
    std::optional<training_metadata> metadata;
    std::vector<training_metadata> history;  // earlier trainings, oldest first (HIST)
    std::vector<feature_reference> references;
    std::uint64_t replay_rows = 0;
    std::uint64_t replay_rows_seen = 0;  // from RSVR; 0 when absent
    bool resumable = false;
    std::optional<model_calibration> calibration;  // from CALB
};

namespace detail {

inline constexpr std::uint8_t model_magic[8] = {0x89, 'T', 'E', 'N', 'O', 'N', 0x0D, 0x0A};
inline constexpr std::size_t model_header_bytes = 24;
inline constexpr std::size_t section_header_bytes = 24;
inline constexpr std::uint32_t byte_order_mark = 0x01020304u;
inline constexpr std::uint16_t section_required = 1;

inline std::uint32_t section_id(const char (&id)[5]) noexcept {
    return static_cast<std::uint32_t>(static_cast<std::uint8_t>(id[0])) | static_cast<std::uint32_t>(static_cast<std::uint8_t>(id[1])) << 8 |
        static_cast<std::uint32_t>(static_cast<std::uint8_t>(id[2])) << 16 | static_cast<std::uint32_t>(static_cast<std::uint8_t>(id[3])) << 24;
}
inline std::string section_name(std::uint32_t id) {
    std::string s;
    for (int k = 0; k < 4; ++k) {
        const auto c = static_cast<char>((id >> (8 * k)) & 0xFFu);
        if (c >= 0x20 && c < 0x7F)
            s += c;
        else
            s += "\\x" + std::to_string(static_cast<unsigned>(static_cast<std::uint8_t>(c)));
    }
    return s;
}

inline std::string hex_u32(std::uint32_t v) {
    std::string s(8, '0');
    for (int k = 7; k >= 0; --k, v >>= 4) s[static_cast<std::size_t>(k)] = "0123456789abcdef"[v & 0xFu];
    return s;
}

// Scalars of the file's type, bit for bit.
template <class T>
void put_scalar(byte_writer& w, T v) {
    if constexpr (sizeof(T) == 4) {
        std::uint32_t bits;
        std::memcpy(&bits, &v, 4);
        w.u32(bits);
    } else {
        w.f64(static_cast<double>(v));
    }
}
template <class T>
T get_scalar(byte_reader& in) {
    if constexpr (sizeof(T) == 4) {
        const std::uint32_t bits = in.u32();
        float v;
        std::memcpy(&v, &bits, 4);
        return v;
    } else {
        return static_cast<T>(in.f64());
    }
}

template <class T>
void put_matrix(byte_writer& w, const matrix<T>& m) {
    w.u64(m.shape()[0]);
    w.u64(m.shape()[1]);
    for (std::size_t k = 0; k < m.size(); ++k) put_scalar<T>(w, m.data()[k]);
}
template <class T>
matrix<T> get_matrix(byte_reader& in) {
    const auto sides = in.matrix_sides(sizeof(T), "a matrix");
    matrix<T> m({sides.first, sides.second});
    for (std::size_t k = 0; k < m.size(); ++k) m.data()[k] = get_scalar<T>(in);
    return m;
}

inline void put_random_state(byte_writer& w, const random_state& s) {
    for (auto word : s.words) w.u64(word);
    w.f64(s.spare_normal);
    w.u8(s.has_spare_normal ? 1 : 0);
}
inline random_state get_random_state(byte_reader& in) {
    random_state s;
    for (auto& word : s.words) word = in.u64();
    s.spare_normal = in.f64();
    const std::uint8_t flag = in.u8();
    if (flag > 1) in.fail("a random-engine flag is " + std::to_string(flag) + ", not 0 or 1");
    s.has_spare_normal = flag == 1;
    return s;
}

inline void put_bytes(byte_writer& w, const std::vector<std::uint8_t>& b) {
    w.u32(static_cast<std::uint32_t>(b.size()));
    for (auto x : b) w.u8(x);
}
inline std::vector<std::uint8_t> get_bytes(byte_reader& in) {
    const std::size_t n = in.count(1, "bytes");
    std::vector<std::uint8_t> b(n);
    for (auto& x : b) x = in.u8();
    return b;
}

// Runs a section parser and reports any failure inside it as
// deploy.model.malformed: the payload passed its checksum, so a bad value
// inside it means a faulty writer, not a damaged file.
template <class F>
auto parse_section(const std::string& where, F&& parse) {
#if TENON_HAS_EXCEPTIONS
    try {
        return parse();
    } catch (const error& e) {
        if (e.code().rfind("deploy.", 0) == 0) throw;
        raise(codes::deploy_model_malformed, where + ": " + e.what());
    }
#else
    (void)where;
    return parse();
#endif
}

// --- section payloads ---------------------------------------------------------------------

template <class T>
void put_weights(byte_writer& w, const std::vector<named_matrix<T>>& weights) {
    w.u32(static_cast<std::uint32_t>(weights.size()));
    for (const auto& nm : weights) {
        w.text(nm.name);
        put_matrix(w, nm.values);
    }
}
template <class T>
std::vector<std::uint8_t> weights_payload(const std::vector<named_matrix<T>>& weights) {
    std::vector<std::uint8_t> out;
    byte_writer w(out);
    put_weights(w, weights);
    return out;
}
template <class T>
std::vector<named_matrix<T>> read_weights(byte_reader& in) {
    std::vector<named_matrix<T>> weights(in.count(20, "weight matrices"));
    for (auto& nm : weights) {
        nm.name = current_state_name(in.text());  // names of earlier files map to the current ones
        nm.values = get_matrix<T>(in);
    }
    return weights;
}
template <class T>
std::vector<std::uint8_t> members_payload(const std::vector<std::vector<named_matrix<T>>>& members) {
    std::vector<std::uint8_t> out;
    byte_writer w(out);
    w.u32(static_cast<std::uint32_t>(members.size()));
    for (const auto& weights : members) put_weights(w, weights);
    return out;
}
template <class T>
std::vector<std::vector<named_matrix<T>>> read_members(byte_reader& in) {
    std::vector<std::vector<named_matrix<T>>> members(in.count(4, "ensemble members"));
    for (auto& m : members) m = read_weights<T>(in);
    return members;
}

inline std::vector<std::uint8_t> metadata_payload(const training_metadata& m) {
    std::vector<std::uint8_t> out;
    byte_writer w(out);
    const std::uint32_t fields = 13 + static_cast<std::uint32_t>(m.metrics.size() + m.settings.size());
    w.u32(fields);
    const auto number = [&](const char* key, std::uint64_t v) {
        w.text(key);
        w.u8(0);
        w.u64(v);
    };
    const auto text = [&](const std::string& key, const std::string& v) {
        w.text(key);
        w.u8(2);
        w.text(v);
    };
    text("library_version", m.library_version);
    number("created_unix_seconds", static_cast<std::uint64_t>(m.created_unix_seconds));
    number("seed", m.seed);
    number("epochs_planned", m.epochs_planned);
    number("epochs_run", m.epochs_run);
    number("best_epoch", m.best_epoch);
    number("steps", m.steps);
    number("training_rows", m.training_rows);
    number("validation_rows", m.validation_rows);
    number("dropped_rows", m.dropped_rows);
    number("data_fingerprint", m.data_fingerprint);
    text("stop_reason", m.stop_reason);
    text("loss", m.loss);
    for (const auto& kv : m.metrics) {
        w.text("metric." + kv.first);
        w.u8(1);
        w.f64(kv.second);
    }
    for (const auto& kv : m.settings) text("setting." + kv.first, kv.second);
    return out;
}
// The current name of a stored metric: earlier files wrote the last epoch's
// training loss as "final_train_loss".
inline std::string current_metric_name(const std::string& stored) {
    return stored == "final_train_loss" ? std::string("final_training_loss") : stored;
}

inline training_metadata read_metadata(byte_reader& in) {
    training_metadata m;
    const std::size_t fields = in.count(6, "metadata fields");
    for (std::size_t i = 0; i < fields; ++i) {
        const std::string key = in.text();
        const std::uint8_t type = in.u8();
        std::uint64_t n = 0;
        double d = 0;
        std::string s;
        if (type == 0)
            n = in.u64();
        else if (type == 1)
            d = in.f64();
        else if (type == 2)
            s = in.text();
        else
            in.fail("metadata field '" + key + "' has type " + std::to_string(type) + " (0 integer, 1 real, 2 text)");
        if (key == "library_version")
            m.library_version = s;
        else if (key == "created_unix_seconds")
            m.created_unix_seconds = static_cast<std::int64_t>(n);
        else if (key == "seed")
            m.seed = n;
        else if (key == "epochs_planned")
            m.epochs_planned = n;
        else if (key == "epochs_run")
            m.epochs_run = n;
        else if (key == "best_epoch")
            m.best_epoch = n;
        else if (key == "steps")
            m.steps = n;
        else if (key == "training_rows")
            m.training_rows = n;
        else if (key == "validation_rows")
            m.validation_rows = n;
        else if (key == "dropped_rows")
            m.dropped_rows = n;
        else if (key == "data_fingerprint")
            m.data_fingerprint = n;
        else if (key == "stop_reason")
            m.stop_reason = s;
        else if (key == "loss")
            m.loss = s;
        else if (key.rfind("metric.", 0) == 0 && type == 1)
            m.metrics.emplace_back(current_metric_name(key.substr(7)), d);
        else if (key.rfind("setting.", 0) == 0 && type == 2)
            m.settings.emplace_back(key.substr(8), s);
        // Other keys come from newer writers: skipped.
    }
    return m;
}

// HIST: u32 n, then n metadata records, each as META's payload.
inline std::vector<std::uint8_t> history_payload(const std::vector<training_metadata>& history) {
    std::vector<std::uint8_t> out;
    byte_writer w(out);
    w.u32(static_cast<std::uint32_t>(history.size()));
    for (const auto& m : history) {
        const auto record = metadata_payload(m);
        out.insert(out.end(), record.begin(), record.end());
    }
    return out;
}
inline std::vector<training_metadata> read_history(byte_reader& in) {
    std::vector<training_metadata> history(in.count(4, "earlier trainings"));  // a record is at least its u32 field count
    for (auto& m : history) m = read_metadata(in);
    return history;
}

inline std::vector<std::uint8_t> references_payload(const std::vector<feature_reference>& refs) {
    std::vector<std::uint8_t> out;
    byte_writer w(out);
    w.u32(static_cast<std::uint32_t>(refs.size()));
    for (const auto& f : refs) {
        w.text(f.column);
        w.u8(static_cast<std::uint8_t>(f.kind));
        w.u64(f.present);
        w.u64(f.missing);
        w.f64(f.minimum);
        w.f64(f.maximum);
        w.u32(static_cast<std::uint32_t>(f.deciles.size()));
        for (double q : f.deciles) w.f64(q);
        w.u32(static_cast<std::uint32_t>(f.histogram.size()));
        for (auto c : f.histogram) w.u64(c);
        w.u32(static_cast<std::uint32_t>(f.categories.size()));
        for (const auto& kv : f.categories) {
            w.text(kv.first);
            w.u64(kv.second);
        }
    }
    return out;
}
inline std::vector<feature_reference> read_references(byte_reader& in) {
    std::vector<feature_reference> refs(in.count(49, "reference summaries"));
    for (auto& f : refs) {
        f.column = in.text();
        const std::uint8_t kind = in.u8();
        if (kind > 2) in.fail("column kind " + std::to_string(kind) + " is not known");
        f.kind = static_cast<column_kind>(kind);
        f.present = in.u64();
        f.missing = in.u64();
        f.minimum = in.f64();
        f.maximum = in.f64();
        f.deciles.resize(in.count(8, "deciles"));
        for (auto& q : f.deciles) q = in.f64();
        f.histogram.resize(in.count(8, "histogram bins"));
        for (auto& c : f.histogram) c = in.u64();
        f.categories.resize(in.count(12, "categories"));
        for (auto& kv : f.categories) {
            kv.first = in.text();
            kv.second = in.u64();
        }
    }
    return refs;
}

inline std::vector<std::uint8_t> replay_payload(const replay_sample& r) {
    std::vector<std::uint8_t> out;
    byte_writer w(out);
    w.u32(static_cast<std::uint32_t>(r.columns.size()));
    for (std::size_t k = 0; k < r.columns.size(); ++k) {
        w.text(r.columns[k]);
        w.u8(static_cast<std::uint8_t>(r.kinds[k]));
    }
    w.u64(r.rows());
    for (std::size_t i = 0; i < r.cells.size(); ++i) {
        w.u8(r.missing[i]);
        if (!r.missing[i]) w.text(r.cells[i]);
    }
    return out;
}
inline replay_sample read_replay(byte_reader& in) {
    replay_sample r;
    const std::size_t columns = in.count(5, "replay columns");
    for (std::size_t k = 0; k < columns; ++k) {
        r.columns.push_back(in.text());
        const std::uint8_t kind = in.u8();
        if (kind > 2) in.fail("column kind " + std::to_string(kind) + " is not known");
        r.kinds.push_back(static_cast<column_kind>(kind));
    }
    const std::uint64_t rows = in.u64();
    if (columns == 0 ? rows != 0 : rows > in.remaining() / columns)
        in.fail(std::to_string(rows) + " replay rows of " + std::to_string(columns) + " cells cannot fit in the " + std::to_string(in.remaining()) +
                " bytes left");
    const auto cells = static_cast<std::size_t>(rows) * columns;
    r.cells.resize(cells);
    r.missing.resize(cells);
    for (std::size_t i = 0; i < cells; ++i) {
        r.missing[i] = in.u8();
        if (r.missing[i] > 1) in.fail("a replay cell's missing flag is " + std::to_string(r.missing[i]));
        if (!r.missing[i]) r.cells[i] = in.text();
    }
    return r;
}

// RSVR: u64 rows seen, u64 capacity, random_state of the reservoir engine.
inline std::vector<std::uint8_t> reservoir_payload(const replay_sample& r) {
    std::vector<std::uint8_t> out;
    byte_writer w(out);
    w.u64(r.rows_seen);
    w.u64(r.capacity);
    put_random_state(w, r.engine ? *r.engine : random_state{});
    return out;
}
inline void read_reservoir(byte_reader& in, replay_sample& r) {
    r.rows_seen = in.u64();
    r.capacity = in.u64();
    r.engine = get_random_state(in);
    if (r.rows_seen < r.rows() || r.capacity < r.rows())
        in.fail("the reservoir has seen " + std::to_string(r.rows_seen) + " rows with capacity " + std::to_string(r.capacity) + " but holds " +
                std::to_string(r.rows()));
}

template <class T>
std::vector<std::uint8_t> resume_payload(const resume_state<T>& s) {
    std::vector<std::uint8_t> out;
    byte_writer w(out);
    w.text(s.update_kind);
    put_bytes(w, s.update_state);
    w.text(s.schedule_kind);
    put_bytes(w, s.schedule_state);
    const training_progress<T>& p = s.progress;
    w.u64(p.epochs_done);
    w.u64(p.steps);
    put_random_state(w, p.shuffle_engine);
    w.u64(p.order.size());
    for (auto i : p.order) w.u64(i);
    w.u32(static_cast<std::uint32_t>(p.history.size()));
    for (const auto& e : p.history) {
        w.u64(e.epoch);
        w.f64(e.training_loss);
        w.f64(e.validation_loss);
        w.f64(e.validation_metric);
        w.f64(e.learning_rate);
        w.f64(e.seconds);
        w.u64(e.retries);
    }
    w.u64(p.best_epoch);
    w.f64(p.best_validation_loss);
    w.u64(p.epochs_since_best);
    w.f64(p.rate_factor);
    w.u32(static_cast<std::uint32_t>(p.best.values.size()));
    for (const auto& m : p.best.values) put_matrix(w, m);
    w.u32(static_cast<std::uint32_t>(s.layer_engines.size()));
    for (const auto& e : s.layer_engines) {
        w.text(e.first);
        put_random_state(w, e.second);
    }
    return out;
}
template <class T>
resume_state<T> read_resume(byte_reader& in) {
    resume_state<T> s;
    s.update_kind = in.text();
    s.update_state = get_bytes(in);
    s.schedule_kind = in.text();
    s.schedule_state = get_bytes(in);
    training_progress<T>& p = s.progress;
    p.epochs_done = in.u64_size("epochs done");
    p.steps = in.u64();
    p.shuffle_engine = get_random_state(in);
    const std::uint64_t order = in.u64();
    if (order > in.remaining() / 8) in.fail(std::to_string(order) + " row indices cannot fit in the bytes left");
    p.order.resize(static_cast<std::size_t>(order));
    for (auto& i : p.order) i = in.u64_size("a row index");
    p.history.resize(in.count(56, "history epochs"));
    for (auto& e : p.history) {
        e.epoch = in.u64_size("an epoch number");
        e.training_loss = in.f64();
        e.validation_loss = in.f64();
        e.validation_metric = in.f64();
        e.learning_rate = in.f64();
        e.seconds = in.f64();
        e.retries = in.u64_size("a retry count");
    }
    p.best_epoch = in.u64_size("the best epoch");
    p.best_validation_loss = in.f64();
    p.epochs_since_best = in.u64_size("epochs since the best");
    p.rate_factor = in.f64();
    p.best.values.resize(in.count(16, "best-epoch matrices"));
    for (auto& m : p.best.values) m = get_matrix<T>(in);
    s.layer_engines.resize(in.count(45, "layer engines"));
    for (auto& e : s.layer_engines) {
        e.first = in.text();
        e.second = get_random_state(in);
    }
    return s;
}

// --- the container ------------------------------------------------------------------------

inline void append_section(std::vector<std::uint8_t>& file, const char (&id)[5], bool required, const std::vector<std::uint8_t>& payload) {
    const std::size_t start = file.size();
    byte_writer w(file);
    w.u32(section_id(id));
    w.u16(required ? section_required : 0);
    w.u16(0);
    w.u64(payload.size());
    w.u32(crc32(payload.data(), payload.size()));
    w.u32(crc32(file.data() + start, 20));
    file.insert(file.end(), payload.begin(), payload.end());
}

struct container {
    std::uint16_t version = 0;
    std::size_t scalar_bytes = 0;
    std::vector<model_section_info> sections;
};

// Checks the header and every section's framing and checksums into `c`,
// raising nothing: a failure is returned (the non-throwing loader needs it).
inline load_status check_container(const std::uint8_t* data, std::size_t size, const model_limits& limits, const std::string& source, container& c) {
    const std::size_t magic_bytes = size < 8 ? size : 8;
    // An empty input may come with a null pointer, which memcmp must not see.
    if (magic_bytes > 0 && std::memcmp(data, model_magic, magic_bytes) != 0)
        return load_status(codes::deploy_model_magic, source + ": not a tenon model file (the first bytes are not the tenon model magic)");
    if (size > limits.max_file_bytes)
        return load_status(codes::deploy_model_oversize,
                           source + ": " + std::to_string(size) + " bytes, more than the limit of " + std::to_string(limits.max_file_bytes));
    if (size < model_header_bytes)
        return load_status(codes::deploy_model_truncated,
                           source + ": the file has " + std::to_string(size) + " bytes, fewer than the " + std::to_string(model_header_bytes) +
                               "-byte header");
    // A file written with the other byte order has every number reversed,
    // its checksum and version included: its mark names it first.
    if (get_u32(data + 12) == 0x04030201u)
        return load_status(codes::deploy_model_byte_order,
                           source +
                               ": the byte-order mark reads 0x04030201 instead of 0x01020304: the file was "
                               "written with the other (big-endian) byte order; tenon's files are little-endian");
    if (crc32(data, 20) != get_u32(data + 20))
        return load_status(codes::deploy_model_checksum, source + ": the header checksum does not match (the file is damaged)");
    if (get_u32(data + 12) != byte_order_mark)
        return load_status(codes::deploy_model_byte_order,
                           source + ": the byte-order mark reads 0x" + hex_u32(get_u32(data + 12)) +
                               " instead of 0x01020304 (files are little-endian)");
    c.version = get_u16(data + 8);
    if (c.version > model_format_version)
        return load_status(codes::deploy_model_version,
                           source + ": model format version " + std::to_string(c.version) + " is newer than this build of tenon (" +
                               version_string() + ") reads (up to version " + std::to_string(model_format_version) + "); load it with a newer tenon");
    if (c.version == 0) return load_status(codes::deploy_model_malformed, source + ": model format version 0 does not exist");
    c.scalar_bytes = data[16];
    if (c.scalar_bytes != 4 && c.scalar_bytes != 8)
        return load_status(codes::deploy_model_malformed,
                           source + ": scalar size " + std::to_string(c.scalar_bytes) + " is neither 4 (float) nor 8 (double)");
    if (get_u16(data + 10) != 0 || data[17] != 0) return load_status(codes::deploy_model_malformed, source + ": reserved header bytes are not zero");
    const std::uint16_t count = get_u16(data + 18);
    if (count > limits.max_sections)
        return load_status(codes::deploy_model_oversize,
                           source + ": " + std::to_string(count) + " sections, more than the limit of " + std::to_string(limits.max_sections));
    std::size_t at = model_header_bytes;
    for (std::uint16_t k = 0; k < count; ++k) {
        if (size - at < section_header_bytes)
            return load_status(codes::deploy_model_truncated,
                               source + ": the file ends at byte " + std::to_string(size) + " inside the header of section " + std::to_string(k + 1) +
                                   " of " + std::to_string(count));
        const std::uint8_t* h = data + at;
        if (crc32(h, 20) != get_u32(h + 20))
            return load_status(codes::deploy_model_checksum,
                               source + ": the header of section " + std::to_string(k + 1) + " at byte " + std::to_string(at) +
                                   " fails its checksum (the file is damaged)");
        model_section_info s;
        s.id = section_name(get_u32(h));
        const std::uint16_t flags = get_u16(h + 4);
        if ((flags & ~section_required) != 0 || get_u16(h + 6) != 0)
            return load_status(codes::deploy_model_malformed, source + ": section '" + s.id + "' has unknown flags " + std::to_string(flags));
        s.required = (flags & section_required) != 0;
        s.length = get_u64(h + 8);
        s.checksum = get_u32(h + 16);
        at += section_header_bytes;
        if (s.length > limits.max_section_bytes)
            return load_status(codes::deploy_model_oversize,
                               source + ": section '" + s.id + "' declares " + std::to_string(s.length) + " bytes, more than the limit of " +
                                   std::to_string(limits.max_section_bytes));
        if (s.length > size - at)
            return load_status(codes::deploy_model_truncated,
                               source + ": section '" + s.id + "' declares " + std::to_string(s.length) + " bytes but the file ends " +
                                   std::to_string(size - at) + " bytes after its start");
        if (crc32(data + at, static_cast<std::size_t>(s.length)) != s.checksum)
            return load_status(codes::deploy_model_checksum, source + ": section '" + s.id + "' fails its checksum (the file is damaged)");
        for (const auto& other : c.sections)
            if (other.id == s.id) return load_status(codes::deploy_model_malformed, source + ": section '" + s.id + "' appears twice");
        s.offset = at;
        at += static_cast<std::size_t>(s.length);
        c.sections.push_back(s);
    }
    if (at != size)
        return load_status(codes::deploy_model_malformed,
                           source + ": " + std::to_string(size - at) + " bytes follow the last of the " + std::to_string(count) + " sections");
    for (const auto& s : c.sections) {
        const bool known = s.id == "ARCH" || s.id == "WGHT" || s.id == "PLAN" || s.id == "META" || s.id == "REFS" || s.id == "RPLY" ||
            s.id == "RSUM" || s.id == "RSVR" || s.id == "HIST" || s.id == "REFD" || s.id == "ENSM" || s.id == "CALB";
        if (!known && s.required)
            return load_status(codes::deploy_model_unknown_required_section,
                               source + ": section '" + s.id + "' is marked required but this build of tenon does not know it");
    }
    for (const char* needed : {"ARCH", "WGHT"}) {
        bool found = false;
        for (const auto& s : c.sections) found = found || s.id == needed;
        if (!found) return load_status(codes::deploy_model_missing_section, source + ": the file has no '" + needed + "' section");
    }
    return {};
}

inline container read_container(const std::uint8_t* data, std::size_t size, const model_limits& limits, const std::string& source) {
    container c;
    const load_status st = check_container(data, size, limits, source, c);
    if (!st.ok()) raise(st.code, st.message);
    return c;
}

inline const model_section_info* find_section(const container& c, const char* id) {
    for (const auto& s : c.sections)
        if (s.id == id) return &s;
    return nullptr;
}

// Parses one section's payload with a byte reader that must end exactly.
template <class F>
auto parse_payload(const std::uint8_t* data, const model_section_info& s, const std::string& source, F&& parse) {
    const std::string where = source + ", section '" + s.id + "'";
    return parse_section(where, [&] {
        byte_reader in(data + s.offset, static_cast<std::size_t>(s.length), where);
        auto value = parse(in);
        if (!in.at_end()) in.fail(std::to_string(in.remaining()) + " bytes follow the section's contents");
        return value;
    });
}

inline layer_record parse_architecture(const std::uint8_t* data, const model_section_info& s, const std::string& source) {
    return parse_section(source + ", section 'ARCH'", [&] {
        const std::vector<std::uint8_t> bytes(data + s.offset, data + s.offset + s.length);
        return record_from_bytes(bytes);
    });
}
inline measured_plan parse_plan(const std::uint8_t* data, const model_section_info& s, const std::string& source) {
    return parse_section(source + ", section 'PLAN'", [&] { return measured_plan::from_bytes(data + s.offset, static_cast<std::size_t>(s.length)); });
}

}  // namespace detail

namespace detail {
// Section REFD: the distributions of the numeric and date/time references
// (added within format version 1; files without it still load, and their
// Kolmogorov-Smirnov statistics fall back to the histogram's ogive).
inline bool references_have_distributions(const std::vector<feature_reference>& refs) {
    for (const auto& f : refs)
        if (f.has_distribution()) return true;
    return false;
}
inline std::vector<std::uint8_t> distributions_payload(const std::vector<feature_reference>& refs) {
    std::vector<std::uint8_t> out;
    byte_writer w(out);
    w.u32(static_cast<std::uint32_t>(refs.size()));
    for (const auto& f : refs) {
        w.text(f.column);
        w.u8(f.whole_numbers ? 1 : 0);
        w.u32(static_cast<std::uint32_t>(f.distinct.size()));
        for (const auto& kv : f.distinct) {
            w.f64(kv.first);
            w.u64(kv.second);
        }
        w.u32(static_cast<std::uint32_t>(f.quantile_points.size()));
        for (double q : f.quantile_points) w.f64(q);
    }
    return out;
}
// Reads REFD into the references read from REFS (same columns, same order).
inline void read_distributions(byte_reader& in, std::vector<feature_reference>& refs) {
    const std::size_t n = in.count(13, "reference distributions");
    if (n != refs.size()) in.fail(std::to_string(n) + " reference distributions for " + std::to_string(refs.size()) + " reference summaries");
    for (auto& f : refs) {
        const std::string name = in.text();
        if (name != f.column) in.fail("the distribution of column '" + name + "' where the summaries hold '" + f.column + "'");
        f.whole_numbers = in.flag("whole numbers");
        f.distinct.resize(in.count(16, "distinct values"));
        std::uint64_t total = 0;
        for (std::size_t k = 0; k < f.distinct.size(); ++k) {
            f.distinct[k].first = in.f64();
            f.distinct[k].second = in.u64();
            if (!std::isfinite(f.distinct[k].first) || (k > 0 && !(f.distinct[k].first > f.distinct[k - 1].first)))
                in.fail("the distinct values of column '" + f.column + "' are not finite and ascending");
            total += f.distinct[k].second;
        }
        if (!f.distinct.empty() && total != f.present)
            in.fail("the distinct values of column '" + f.column + "' count " + std::to_string(total) + " rows, not the " +
                    std::to_string(f.present) + " present");
        f.quantile_points.resize(in.count(8, "quantile points"));
        for (std::size_t k = 0; k < f.quantile_points.size(); ++k) {
            f.quantile_points[k] = in.f64();
            if (!std::isfinite(f.quantile_points[k]) || (k > 0 && f.quantile_points[k] < f.quantile_points[k - 1]))
                in.fail("the quantile points of column '" + f.column + "' are not finite and ascending");
        }
        if (f.quantile_points.size() == 1) in.fail("column '" + f.column + "' has one quantile point; at least two are needed");
    }
}

// Section CALB (format version 2): u8 parts (bit 0 a regression band, bit 1
// class calibration), then for the band: f64 coverage, u64 rows, f64 half
// width, u8 has spread, f64 spread quantile, f64 spread floor; for classes:
// f64 coverage, u64 rows, f64 temperature, f64 set threshold. Half width
// and thresholds may be +infinity (too few rows for the coverage).
inline bool has_calibration(const std::optional<model_calibration>& c) noexcept { return c && (c->interval || c->classes); }
inline std::vector<std::uint8_t> calibration_payload(const model_calibration& c) {
    std::vector<std::uint8_t> out;
    byte_writer w(out);
    w.u8(static_cast<std::uint8_t>((c.interval ? 1 : 0) | (c.classes ? 2 : 0)));
    if (c.interval) {
        const interval_calibration& i = *c.interval;
        w.f64(i.coverage);
        w.u64(i.rows);
        w.f64(i.half_width);
        w.u8(i.has_spread ? 1 : 0);
        w.f64(i.spread_quantile);
        w.f64(i.spread_floor);
    }
    if (c.classes) {
        const class_calibration& k = *c.classes;
        w.f64(k.coverage);
        w.u64(k.rows);
        w.f64(k.temperature);
        w.f64(k.set_threshold);
    }
    return out;
}
inline model_calibration read_calibration(byte_reader& in) {
    model_calibration c;
    const std::uint8_t parts = in.u8();
    if (parts == 0 || parts > 3) in.fail("the calibration parts are " + std::to_string(parts) + " (1 band, 2 classes)");
    const auto coverage = [&in] {
        const double v = in.f64();
        if (!(v > 0.0 && v < 1.0)) in.fail("a calibration coverage is " + number_to_text(v) + ", not strictly between 0 and 1");
        return v;
    };
    const auto not_negative = [&in](const char* what) {
        const double v = in.f64();
        if (!(v >= 0.0)) in.fail(std::string("the calibration's ") + what + " is " + number_to_text(v) + ", not zero or more");
        return v;
    };
    if (parts & 1) {
        interval_calibration i;
        i.coverage = coverage();
        i.rows = in.u64();
        i.half_width = not_negative("half width");
        i.has_spread = in.flag("has spread");
        i.spread_quantile = not_negative("spread quantile");
        i.spread_floor = not_negative("spread floor");
        c.interval = i;
    }
    if (parts & 2) {
        class_calibration k;
        k.coverage = coverage();
        k.rows = in.u64();
        k.temperature = in.f64();
        if (!(k.temperature > 0.0) || !std::isfinite(k.temperature))
            in.fail("the calibration's temperature is " + number_to_text(k.temperature) + ", not positive and finite");
        k.set_threshold = not_negative("set threshold");
        c.classes = k;
    }
    return c;
}
}  // namespace detail

/// Checks that `weights` are exactly what `architecture` holds: first the
/// count of values (before anything is built, so a damaged architecture
/// cannot ask for more memory than the weights beside it take), then each
/// matrix's name and shape in order (architecture_weights). Raises
/// deploy.model.shape_mismatch, or deploy.model.malformed when the
/// architecture itself is invalid. Returns the slots.
template <class T>
std::vector<weight_slot> check_weights_fit(const layer_record& architecture, const std::vector<named_matrix<T>>& weights) {
    std::size_t stored = 0;
    for (const auto& w : weights) stored += w.values.size();
    const std::size_t declared = detail::parse_section("model file architecture", [&] { return record_value_count(architecture); });
    if (declared != stored)
        raise(codes::deploy_model_shape_mismatch,
              "model file: the architecture declares " +
                  (declared == std::numeric_limits<std::size_t>::max() ? std::string(sizeof(std::size_t) >= 8 ? "more than 2^64" : "more than 2^32")
                                                                       : std::to_string(declared)) +
                  " weight values, the file stores " + std::to_string(stored));
    std::vector<weight_slot> slots = detail::parse_section("model file architecture", [&] { return architecture_weights(architecture); });
    if (weights.size() != slots.size())
        raise(codes::deploy_model_shape_mismatch,
              "model file: " + std::to_string(weights.size()) + " weight matrices stored, the architecture has " + std::to_string(slots.size()));
    for (std::size_t i = 0; i < slots.size(); ++i) {
        const named_matrix<T>& w = weights[i];
        const shape2 expected{slots[i].rows, slots[i].cols};
        if (w.name != slots[i].name || shape_of(w.values) != expected)
            raise(codes::deploy_model_shape_mismatch,
                  "model file: weight " + std::to_string(i) + " is '" + w.name + "' " + to_string(shape_of(w.values)) +
                      ", the architecture expects '" + slots[i].name + "' " + to_string(expected));
    }
    return slots;
}

/// The file's bytes: header, then ARCH, WGHT and the optional sections present.
template <class T>
std::vector<std::uint8_t> model_file_to_bytes(const model_file<T>& m) {
    TENON_REQUIRE_SCALAR(T);
    std::vector<std::uint8_t> out(detail::model_magic, detail::model_magic + 8);
    // Version 2 only where it is needed (section CALB), so that files without
    // calibration still load in builds that read version 1.
    byte_writer w(out);
    w.u16(detail::has_calibration(m.calibration) ? model_format_version : std::uint16_t(1));
    w.u16(0);
    w.u32(detail::byte_order_mark);
    out.push_back(static_cast<std::uint8_t>(sizeof(T)));
    out.push_back(0);
    const std::uint16_t count = static_cast<std::uint16_t>(
        2 + (m.plan ? 1 : 0) + (m.metadata ? 1 : 0) + (m.references.empty() ? 0 : 1) + (m.replay ? 1 : 0) + (m.resume ? 1 : 0) +
        (m.replay && m.replay->rows_seen > 0 ? 1 : 0) + (m.history.empty() ? 0 : 1) + (detail::references_have_distributions(m.references) ? 1 : 0) +
        (m.members.empty() ? 0 : 1) + (detail::has_calibration(m.calibration) ? 1 : 0));
    w.u16(count);
    w.u32(crc32(out.data(), 20));
    detail::append_section(out, "ARCH", true, to_bytes(m.architecture));
    detail::append_section(out, "WGHT", true, detail::weights_payload(m.weights));
    if (!m.members.empty()) detail::append_section(out, "ENSM", true, detail::members_payload(m.members));
    if (m.plan) detail::append_section(out, "PLAN", true, m.plan->to_bytes());
    if (m.metadata) detail::append_section(out, "META", false, detail::metadata_payload(*m.metadata));
    if (!m.history.empty()) detail::append_section(out, "HIST", false, detail::history_payload(m.history));
    if (!m.references.empty()) detail::append_section(out, "REFS", false, detail::references_payload(m.references));
    if (m.replay) detail::append_section(out, "RPLY", false, detail::replay_payload(*m.replay));
    if (m.resume) detail::append_section(out, "RSUM", false, detail::resume_payload(*m.resume));
    if (m.replay && m.replay->rows_seen > 0) detail::append_section(out, "RSVR", false, detail::reservoir_payload(*m.replay));
    if (detail::references_have_distributions(m.references)) detail::append_section(out, "REFD", false, detail::distributions_payload(m.references));
    if (detail::has_calibration(m.calibration)) detail::append_section(out, "CALB", false, detail::calibration_payload(*m.calibration));
    return out;
}

/// Reads a model file from bytes (see docs/design/model-file.md for the checks).
/// `source` names the bytes in error messages.
template <class T>
model_file<T> model_file_from_bytes(const std::uint8_t* data, std::size_t size, const model_limits& limits = {},
                                    const std::string& source = "model file") {
    TENON_REQUIRE_SCALAR(T);
    const detail::container c = detail::read_container(data, size, limits, source);
    if (c.scalar_bytes != sizeof(T))
        raise(codes::deploy_model_scalar_type,
              source + ": the weights are stored as " + (c.scalar_bytes == 4 ? "float" : "double") + ", but the model was loaded as " +
                  (sizeof(T) == 4 ? "float" : "double") + " (load it with the stored type, e.g. load_model_file<" +
                  (c.scalar_bytes == 4 ? "float" : "double") + ">)");
    model_file<T> m;
    m.format_version = c.version;
    for (const auto& s : c.sections) {
        if (s.id == "ARCH")
            m.architecture = detail::parse_architecture(data, s, source);
        else if (s.id == "WGHT")
            m.weights = detail::parse_payload(data, s, source, [](byte_reader& in) { return detail::read_weights<T>(in); });
        else if (s.id == "ENSM")
            m.members = detail::parse_payload(data, s, source, [](byte_reader& in) { return detail::read_members<T>(in); });
        else if (s.id == "PLAN")
            m.plan.emplace(detail::parse_plan(data, s, source));
        else if (s.id == "META")
            m.metadata = detail::parse_payload(data, s, source, [](byte_reader& in) { return detail::read_metadata(in); });
        else if (s.id == "HIST")
            m.history = detail::parse_payload(data, s, source, [](byte_reader& in) { return detail::read_history(in); });
        else if (s.id == "REFS")
            m.references = detail::parse_payload(data, s, source, [](byte_reader& in) { return detail::read_references(in); });
        else if (s.id == "RPLY")
            m.replay = detail::parse_payload(data, s, source, [](byte_reader& in) { return detail::read_replay(in); });
        else if (s.id == "RSUM")
            m.resume = detail::parse_payload(data, s, source, [](byte_reader& in) { return detail::read_resume<T>(in); });
        else if (s.id == "CALB")
            m.calibration = detail::parse_payload(data, s, source, [](byte_reader& in) { return detail::read_calibration(in); });
        else if (s.id != "RSVR" && s.id != "REFD")
            m.skipped_sections.push_back(s.id);
    }
    // The distributions belong to the reference summaries; without them REFD is skipped.
    if (const auto* rd = detail::find_section(c, "REFD")) {
        if (!m.references.empty())
            detail::parse_payload(data, *rd, source, [&](byte_reader& in) {
                detail::read_distributions(in, m.references);
                return 0;
            });
        else
            m.skipped_sections.push_back("REFD");
    }
    // The reservoir state belongs to the replay sample; without one it is skipped.
    if (const auto* rs = detail::find_section(c, "RSVR")) {
        if (m.replay)
            detail::parse_payload(data, *rs, source, [&](byte_reader& in) {
                detail::read_reservoir(in, *m.replay);
                return 0;
            });
        else
            m.skipped_sections.push_back("RSVR");
    }
    return m;
}
template <class T>
model_file<T> model_file_from_bytes(const std::vector<std::uint8_t>& bytes, const model_limits& limits = {},
                                    const std::string& source = "model file") {
    return model_file_from_bytes<T>(bytes.data(), bytes.size(), limits, source);
}

/// Checks a model file and summarizes it without choosing a scalar type
/// (e.g. to decide between load_model_file<float> and <double>).
inline model_file_summary inspect_model_bytes(const std::vector<std::uint8_t>& bytes, const model_limits& limits = {},
                                              const std::string& source = "model file") {
    const detail::container c = detail::read_container(bytes.data(), bytes.size(), limits, source);
    model_file_summary s;
    s.format_version = c.version;
    s.scalar_bytes = c.scalar_bytes;
    s.file_bytes = bytes.size();
    s.sections = c.sections;
    for (const auto& sec : c.sections) {
        if (sec.id == "ARCH")
            s.architecture = detail::parse_architecture(bytes.data(), sec, source);
        else if (sec.id == "PLAN")
            s.plan.emplace(detail::parse_plan(bytes.data(), sec, source));
        else if (sec.id == "META")
            s.metadata = detail::parse_payload(bytes.data(), sec, source, [](byte_reader& in) { return detail::read_metadata(in); });
        else if (sec.id == "HIST")
            s.history = detail::parse_payload(bytes.data(), sec, source, [](byte_reader& in) { return detail::read_history(in); });
        else if (sec.id == "REFS")
            s.references = detail::parse_payload(bytes.data(), sec, source, [](byte_reader& in) { return detail::read_references(in); });
        else if (sec.id == "RPLY")
            s.replay_rows = detail::parse_payload(bytes.data(), sec, source, [](byte_reader& in) { return detail::read_replay(in); }).rows();
        else if (sec.id == "RSUM")
            s.resumable = true;
        else if (sec.id == "CALB")
            s.calibration = detail::parse_payload(bytes.data(), sec, source, [](byte_reader& in) { return detail::read_calibration(in); });
        else if (sec.id == "RSVR")
            s.replay_rows_seen = detail::parse_payload(bytes.data(), sec, source, [](byte_reader& in) {
                const std::uint64_t seen = in.u64();
                in.u64();
                detail::get_random_state(in);
                return seen;
            });
        else if (sec.id == "WGHT") {
            s.parameter_values = detail::parse_payload(bytes.data(), sec, source, [&](byte_reader& in) {
                std::uint64_t values = 0;
                const std::size_t n = in.count(20, "weight matrices");
                for (std::size_t i = 0; i < n; ++i) {
                    in.text();
                    const auto sides = in.matrix_sides(c.scalar_bytes, "a weight matrix");
                    const std::uint64_t rows = sides.first, cols = sides.second;
                    const std::uint64_t skip = rows * cols * c.scalar_bytes;
                    for (std::uint64_t k = 0; k < skip; ++k) in.u8();
                    values += rows * cols;
                }
                return values;
            });
        }
    }
    if (const auto* rd = detail::find_section(c, "REFD"))
        if (!s.references.empty())
            detail::parse_payload(bytes.data(), *rd, source, [&](byte_reader& in) {
                detail::read_distributions(in, s.references);
                return 0;
            });
    return s;
}
inline model_file_summary inspect_model_file(const std::string& path, const model_limits& limits = {}) {
    return inspect_model_bytes(read_file_bounded(path, limits.max_file_bytes), limits, path);
}

/// Saves atomically and durably (write_file_atomically).
template <class T>
void save_model_file(const std::string& path, const model_file<T>& m, file_system& fs) {
    write_file_atomically(path, model_file_to_bytes(m), fs);
}
template <class T>
void save_model_file(const std::string& path, const model_file<T>& m) {
    native_file_system fs;
    save_model_file(path, m, fs);
}

template <class T>
model_file<T> load_model_file(const std::string& path, const model_limits& limits = {}) {
    const std::vector<std::uint8_t> bytes = read_file_bounded(path, limits.max_file_bytes);
    return model_file_from_bytes<T>(bytes.data(), bytes.size(), limits, path);
}

/// Loads like load_model_file() and checks that the weights fit the
/// architecture (check_weights_fit, for every ensemble member), without
/// throwing: the result's status says what failed. For hosts built with
/// -fno-exceptions: a missing, unreadable, oversize, truncated, damaged
/// (checksum), foreign (magic), newer-version, other-byte-order or
/// other-scalar-type file is reported without anything raising. A file
/// whose checksums all hold but whose contents are invalid (a faulty or
/// hostile writer) is still refused; without exceptions that refusal goes
/// to the failure handler (core/error.hpp) and ends the process. Only
/// running out of memory still throws (std::bad_alloc), as any allocation.
template <class T>
load_status try_load_model_file(const std::string& path, model_file<T>& out, const model_limits& limits = {}) {
    const auto load = [&]() -> load_status {
        std::vector<std::uint8_t> bytes;
        load_status st = detail::try_read_file_bounded(path, limits.max_file_bytes, bytes);
        if (!st.ok()) return st;
        detail::container c;
        st = detail::check_container(bytes.data(), bytes.size(), limits, path, c);
        if (!st.ok()) return st;
        if (c.scalar_bytes != sizeof(T))
            return {codes::deploy_model_scalar_type,
                    path + ": the weights are stored as " + (c.scalar_bytes == 4 ? "float" : "double") + ", but the model was loaded as " +
                        (sizeof(T) == 4 ? "float" : "double")};
        model_file<T> m = model_file_from_bytes<T>(bytes.data(), bytes.size(), limits, path);
        check_weights_fit(m.architecture, m.weights);
        for (const auto& member : m.members) check_weights_fit(m.architecture, member);
        out = std::move(m);
        return {};
    };
#if TENON_HAS_EXCEPTIONS
    try {
        return load();
    } catch (const error& e) {
        return {registered_code(e.code()), e.what()};
    }
#else
    return load();
#endif
}

TENON_NAMESPACE_END

// The compiled-once mode (core/compiled_once.hpp).
#if defined(TENON_DETAIL_SERVE_INSTANCE)
TENON_NAMESPACE_BEGIN
#define TENON_DETAIL_LOADER_INSTANCES(T)                                                                                                             \
    TENON_DETAIL_SERVE_INSTANCE load_status try_load_model_file<T>(const std::string&, model_file<T>&, const model_limits&);                         \
    TENON_DETAIL_SERVE_INSTANCE model_file<T> load_model_file<T>(const std::string&, const model_limits&);                                           \
    TENON_DETAIL_SERVE_INSTANCE model_file<T> model_file_from_bytes<T>(const std::uint8_t*, std::size_t, const model_limits&, const std::string&);
TENON_DETAIL_LOADER_INSTANCES(float)
TENON_DETAIL_LOADER_INSTANCES(double)
#undef TENON_DETAIL_LOADER_INSTANCES
TENON_NAMESPACE_END
#endif
