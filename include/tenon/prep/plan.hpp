// tenon: the preparation plan, measured on training rows only.
//
// A `plan` records column roles and each feature column's steps (imputation,
// missing indicator, scaling, one-hot encoding) but no statistics.
// `plan::measure(table, training_rows)` learns every statistic from the
// training rows alone and returns a `measured_plan`, the only type that
// prepares rows, applying the same state to training, validation, test and
// new rows, so nothing leaks into training. Rows without a target are dropped
// and counted, never silently. The state serializes to bytes model files
// embed. Feature layout and names: docs/design/prep.md.
#pragma once

#include <algorithm>
#include <charconv>
#include <cmath>
#include <cstdint>
#include <string>
#include <string_view>
#include <utility>
#include <vector>

#include "tenon/core/bytes.hpp"
#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"
#include "tenon/core/matrix.hpp"
#include "tenon/prep/cell_parsing.hpp"
#include "tenon/prep/encoding.hpp"
#include "tenon/prep/imputation.hpp"
#include "tenon/prep/scaling.hpp"
#include "tenon/prep/statistics.hpp"
#include "tenon/prep/table.hpp"

TENON_NAMESPACE_BEGIN

enum class column_role : std::uint8_t { feature = 0, target = 1, ignored = 2, group = 3, time = 4 };
enum class target_kind : std::uint8_t { classification = 0, regression = 1 };

/// What a date/time column gives the network. A time stamp itself only grows,
/// so a model sees values beyond its training range on every new row; the
/// position within the day, the week and the year repeats, and plant data
/// (shift patterns, weekends, seasons) often follows it. Each position is
/// given as a sine/cosine pair, so that 23:59 lies next to 00:00.
enum class time_encoding : std::uint8_t {
    value = 0,  // the scaled time stamp alone
    value_and_cycles = 1,  // the scaled time stamp, then the six cyclic values
    cycles = 2,  // the six cyclic values alone
};

/// The six cyclic values of a time stamp (seconds since 1970-01-01T00:00:00Z,
/// read as written: a stamp without an offset keeps its local clock time):
/// hour of day h in [0, 24) with minutes and seconds as fractions, day of
/// week w (0 = Monday) and day of year d (0 = 1 January, out of 365 or 366
/// days), each as (sin 2 pi x / period, cos 2 pi x / period). The weekday of
/// 1970-01-01 is Thursday; the civil year comes from Hinnant's
/// civil_from_days ("chrono-Compatible Low-Level Date Algorithms", 2013).
inline void time_cycles(double seconds, double* out) noexcept {
    constexpr double two_pi = 6.283185307179586476925286766559;
    const double days = std::floor(seconds / 86400.0);
    const double hour = (seconds - days * 86400.0) / 3600.0;
    const auto day_number = static_cast<std::int64_t>(days);
    const std::int64_t weekday = ((day_number + 3) % 7 + 7) % 7;  // 1970-01-01 (day 0) was a Thursday = 3
    // civil_from_days (Hinnant 2013): the year of the day.
    const std::int64_t z = day_number + 719468;
    const std::int64_t era = (z >= 0 ? z : z - 146096) / 146097;
    const auto doe = static_cast<unsigned>(z - era * 146097);
    const unsigned yoe = (doe - doe / 1460 + doe / 36524 - doe / 146096) / 365;
    const unsigned doy_from_march = doe - (365 * yoe + yoe / 4 - yoe / 100);
    const unsigned mp = (5 * doy_from_march + 2) / 153;
    const unsigned month = mp < 10 ? mp + 3 : mp - 9;
    const std::int64_t year = static_cast<std::int64_t>(yoe) + era * 400 + (month <= 2 ? 1 : 0);
    const auto year_day = static_cast<double>(day_number - detail::days_from_civil(year, 1, 1));
    const double year_length = detail::is_leap_year(static_cast<int>(year)) ? 366.0 : 365.0;
    out[0] = std::sin(two_pi * hour / 24.0);
    out[1] = std::cos(two_pi * hour / 24.0);
    out[2] = std::sin(two_pi * static_cast<double>(weekday) / 7.0);
    out[3] = std::cos(two_pi * static_cast<double>(weekday) / 7.0);
    out[4] = std::sin(two_pi * year_day / year_length);
    out[5] = std::cos(two_pi * year_day / year_length);
}

/// What to do with one feature column. The defaults are the tool's (`tenon
/// train`), so a table gives the same model through the library and the
/// tool: missing cells filled with the median (numbers, date/times) or the
/// most frequent category, a missing indicator for a column with a missing
/// cell among the training rows, z-scores, and categories unseen in
/// training written as all zeros (the predictor flags them:
/// range_flag::unseen_category). strict_feature_steps() refuses instead.
struct feature_steps {
    fill_method fill = fill_method::automatic;
    double fill_number = 0.0;  // fill_method::constant, numeric and date/time columns
    std::string fill_text;  // fill_method::constant, categorical columns
    bool missing_indicator = false;  // always add a 0/1 "was missing" feature
    /// Add the indicator when a training row (with a target) has the cell
    /// missing; decided when the plan is measured.
    bool indicator_if_missing_in_training = true;
    scaling_method scaling = scaling_method::z_score;  // numeric and date/time columns
    double range_low = 0.0, range_high = 1.0;  // target range of min-max scaling
    unseen_policy unseen = unseen_policy::all_zero;  // categorical columns
    bool omit_reference_level = false;  // categorical columns
    /// Date/time columns: the scaled stamp, cyclic values, or both. A column
    /// with the time role and cycles chosen gives the cyclic values alone.
    time_encoding time = time_encoding::value;
};

/// Steps that refuse what the defaults repair: a missing cell raises
/// prep.value.missing (the predictor returns deploy.input.missing_value), an
/// unseen category prep.category.unseen; no missing indicator. Z-scores.
inline feature_steps strict_feature_steps() {
    feature_steps s;
    s.fill = fill_method::none;
    s.indicator_if_missing_in_training = false;
    s.unseen = unseen_policy::fail;
    return s;
}

/// Rows prepared by a measured plan. `rows[i]` is the table row that became
/// row i (rows with a missing target are left out and counted).
template <class T>
struct prepared_rows {
    matrix<T> features;  // rows x feature_count()
    matrix<T> targets;  // rows x class_count() one-hot, or rows x 1 scaled regression values
    std::vector<std::uint32_t> classes;  // class index per row (classification only)
    std::vector<std::size_t> rows;
    std::size_t dropped_missing_target = 0;
};

namespace detail {
struct measured_feature {
    std::string name;
    column_kind kind = column_kind::numeric;
    time_format time_form = time_format::detect;  // date/time: how raw cells are written
    time_encoding time = time_encoding::value;  // date/time: what the block holds
    fill_value fill;
    bool indicator = false;
    scaling scale;  // numeric and date/time
    one_hot_layout one_hot;  // categorical
    std::size_t offset = 0;  // first output column
    std::size_t width = 0;  // output columns, indicator included
};

// Shortest text of a number into a caller buffer (no allocation).
inline std::string_view number_text(double v, char (&buffer)[64]) {
    const auto r = std::to_chars(buffer, buffer + sizeof(buffer), v);
    return std::string_view(buffer, static_cast<std::size_t>(r.ptr - buffer));
}
}  // namespace detail

class measured_plan;

/// Column roles and step choices; measure() turns it into a measured_plan.
class plan {
public:
    /// Role of columns not named in set_role (feature unless changed).
    plan& set_default_role(column_role role) {
        default_role_ = role;
        return *this;
    }
    plan& set_role(const std::string& column_name, column_role role) {
        if (role == column_role::target)
            raise(codes::core_argument_invalid, "plan: use set_target to choose the target column ('" + column_name + "')");
        for (auto& r : roles_)
            if (r.first == column_name) {
                r.second = role;
                return *this;
            }
        roles_.emplace_back(column_name, role);
        return *this;
    }
    /// Steps of feature columns not named in set_steps.
    plan& set_default_steps(feature_steps steps) {
        default_steps_ = std::move(steps);
        return *this;
    }
    plan& set_steps(const std::string& column_name, feature_steps steps) {
        for (auto& s : steps_)
            if (s.first == column_name) {
                s.second = std::move(steps);
                return *this;
            }
        steps_.emplace_back(column_name, std::move(steps));
        return *this;
    }
    /// The target column; regression targets are scaled with `regression_scaling`.
    plan& set_target(const std::string& column_name, target_kind kind, scaling_method regression_scaling = scaling_method::z_score) {
        target_ = column_name;
        target_kind_ = kind;
        target_scaling_ = regression_scaling;
        return *this;
    }
    /// Cell texts that read as missing when raw rows are applied later.
    plan& set_missing_tokens(std::vector<std::string> tokens) {
        missing_tokens_ = std::move(tokens);
        return *this;
    }

    column_role role_of(const std::string& column_name) const {
        if (column_name == target_) return column_role::target;
        for (const auto& r : roles_)
            if (r.first == column_name) return r.second;
        return default_role_;
    }
    const feature_steps& steps_of(const std::string& column_name) const {
        for (const auto& s : steps_)
            if (s.first == column_name) return s.second;
        return default_steps_;
    }

    /// Learns every statistic from `training_rows` of `t` only. With an
    /// exchange, each participant passes its own table (same columns and
    /// kinds) and rows, and all learn the statistics of all participants'
    /// rows together (statistics_exchange): moments merged by Chan, Golub &
    /// LeVeque, so means and spreads equal a single measurement up to
    /// rounding; category and class sets by union, sorted as always;
    /// medians, quartiles and modes exact, from the gathered values.
    inline measured_plan measure(const table& t, const std::vector<std::size_t>& training_rows, statistics_exchange* exchange = nullptr) const;

private:
    std::vector<std::pair<std::string, column_role>> roles_;
    std::vector<std::pair<std::string, feature_steps>> steps_;
    column_role default_role_ = column_role::feature;
    feature_steps default_steps_;
    std::string target_;
    target_kind target_kind_ = target_kind::classification;
    scaling_method target_scaling_ = scaling_method::z_score;
    std::vector<std::string> missing_tokens_ = default_missing_tokens();
};

/// A plan with its statistics learned; the only type that prepares rows.
/// Obtained from plan::measure or measured_plan::from_bytes.
class measured_plan {
public:
    // --- what the plan produces -------------------------------------------------------
    std::size_t feature_count() const noexcept { return feature_names_.size(); }
    const std::vector<std::string>& feature_names() const noexcept { return feature_names_; }
    /// Source columns the features come from, in the order apply_cells expects.
    const std::vector<std::string>& input_columns() const noexcept { return input_columns_; }
    bool has_target() const noexcept { return !target_name_.empty(); }
    const std::string& target_name() const noexcept { return target_name_; }
    target_kind target_type() const noexcept { return target_kind_; }
    std::size_t class_count() const noexcept { return classes_.size(); }
    const std::vector<std::string>& class_names() const noexcept { return classes_.names(); }
    const class_index& classes() const noexcept { return classes_; }
    const scaling& target_scaling() const noexcept { return target_scale_; }
    const std::string& group_column() const noexcept { return group_column_; }
    const std::string& time_column() const noexcept { return time_column_; }
    const std::vector<std::string>& missing_tokens() const noexcept { return missing_tokens_; }
    /// Training rows left out of the measurement because their target was missing.
    std::size_t dropped_training_rows() const noexcept { return dropped_training_rows_; }
    /// The learned scaling of a numeric or date/time feature column.
    const scaling& feature_scaling(const std::string& column_name) const { return feature(column_name).scale; }
    const fill_value& feature_fill(const std::string& column_name) const { return feature(column_name).fill; }
    const one_hot_layout& feature_categories(const std::string& column_name) const { return feature(column_name).one_hot; }
    /// The kind the feature column had in the training table.
    column_kind feature_kind(const std::string& column_name) const { return feature(column_name).kind; }
    /// How a date/time feature column's raw cells are written (read the same
    /// way in apply_cells); time_format::detect for plans from before forms were kept.
    time_format feature_time_form(const std::string& column_name) const { return feature(column_name).time_form; }
    /// What a date/time feature column's block holds.
    time_encoding feature_time_encoding(const std::string& column_name) const { return feature(column_name).time; }
    /// Whether the feature column has a 0/1 "was missing" indicator after its values.
    bool feature_has_indicator(const std::string& column_name) const { return feature(column_name).indicator; }
    /// First output column of the feature column's block.
    std::size_t feature_offset(const std::string& column_name) const { return feature(column_name).offset; }

    // --- applying ------------------------------------------------------------------------
    /// Prepares the given rows of a table (features and, if the plan has a
    /// target, targets), reusing out's buffers.
    template <class T>
    void apply(const table& t, const std::vector<std::size_t>& rows, prepared_rows<T>& out) const {
        TENON_REQUIRE_SCALAR(T);
        const column* target = has_target() ? &t.at(target_name_) : nullptr;
        out.rows.clear();
        out.dropped_missing_target = 0;
        for (auto r : rows) {
            if (r >= t.row_count())
                raise(codes::prep_rows_out_of_range,
                      where(t) + ": row " + std::to_string(r) + " is not below the row count " + std::to_string(t.row_count()));
            if (target && target->is_missing(r)) {
                ++out.dropped_missing_target;
                continue;
            }
            out.rows.push_back(r);
        }
        write_features(t, out.rows, out.features);
        if (!target) {
            ensure_shape(out.targets, shape2{out.rows.size(), 0});
            out.classes.clear();
            return;
        }
        const std::size_t n = out.rows.size();
        if (target_kind_ == target_kind::classification) {
            ensure_shape(out.targets, shape2{n, classes_.size()});
            out.classes.resize(n);
            std::fill(out.targets.data(), out.targets.data() + out.targets.size(), T(0));
            char buffer[64];
            for (std::size_t i = 0; i < n; ++i) {
                const std::size_t r = out.rows[i];
                const std::string_view name = target->kind() == column_kind::categorical ? std::string_view(target->category(r))
                                                                                         : detail::number_text(target->number(r), buffer);
                const std::int64_t k = classes_.find(name);
                if (k < 0)
                    raise(codes::prep_category_unseen,
                          t.row_place(r) + ": the class '" + std::string(name) + "' of target '" + target_name_ +
                              "' was not seen in the training rows");
                out.classes[i] = static_cast<std::uint32_t>(k);
                out.targets(i, static_cast<std::size_t>(k)) = T(1);
            }
        } else {
            require_number_target(*target);
            ensure_shape(out.targets, shape2{n, 1});
            out.classes.clear();
            for (std::size_t i = 0; i < n; ++i) {
                const double value = target->number(out.rows[i]);
                const double scaled = target_scale_.forward(value);
                if (!representable<T>(scaled)) overflow<T>(scaled, value, "column '" + target_name_ + "' (the target)", t.row_place(out.rows[i]));
                out.targets(i, 0) = static_cast<T>(scaled);
            }
        }
    }

    template <class T>
    prepared_rows<T> apply(const table& t, const std::vector<std::size_t>& rows) const {
        prepared_rows<T> out;
        apply(t, rows, out);
        return out;
    }

    /// Prepares features only (the table need not have the target column);
    /// every given row is kept.
    template <class T>
    void apply_features(const table& t, const std::vector<std::size_t>& rows, matrix<T>& features) const {
        TENON_REQUIRE_SCALAR(T);
        for (auto r : rows)
            if (r >= t.row_count())
                raise(codes::prep_rows_out_of_range,
                      where(t) + ": row " + std::to_string(r) + " is not below the row count " + std::to_string(t.row_count()));
        write_features(t, rows, features);
    }

    /// Prepares one raw row given as cell texts, one per input_columns()
    /// entry in that order, into out[0 .. feature_count()). Allocates nothing
    /// on success.
    template <class T>
    void apply_cells(const std::string_view* cells, std::size_t count, T* out) const {
        TENON_REQUIRE_SCALAR(T);
        if (count != features_.size())
            raise(codes::core_shape_mismatch,
                  "apply_cells: the plan reads " + std::to_string(features_.size()) + " columns, got " + std::to_string(count) + " cells");
        for (std::size_t k = 0; k < features_.size(); ++k) {
            const auto& f = features_[k];
            const std::string_view cell = detail::trim_blanks(cells[k]);
            const bool missing = is_missing_cell(cell, missing_tokens_);
            T* o = out + f.offset;
            if (f.kind == column_kind::categorical) {
                write_category(f, missing, missing ? -1 : f.one_hot.find(cell), cell, o, "raw row");
            } else {
                double value = 0;
                if (!missing) {
                    const bool ok = f.kind == column_kind::numeric ? parse_number(cell, value) : parse_datetime(cell, f.time_form, value);
                    if (!ok)
                        raise(f.kind == column_kind::numeric ? codes::prep_cell_not_numeric : codes::prep_cell_not_datetime,
                              "raw row, column '" + f.name + "': '" + std::string(cell) + "' is not a " +
                                  (f.kind == column_kind::numeric           ? "finite number"
                                       : f.time_form == time_format::detect ? "date/time"
                                                                            : std::string("date/time in the form ") + to_string(f.time_form)));
                }
                write_number(f, missing, value, o, "raw row");
            }
        }
    }

    /// Prepares one raw row given as (column name, cell text) pairs in any
    /// order; extra columns are ignored.
    template <class T>
    void apply_named(const std::vector<std::pair<std::string, std::string>>& named_cells, T* out) const {
        std::vector<std::string_view> cells(features_.size());
        for (std::size_t k = 0; k < features_.size(); ++k) {
            bool found = false;
            for (const auto& nc : named_cells)
                if (nc.first == features_[k].name) {
                    cells[k] = nc.second;
                    found = true;
                    break;
                }
            if (!found) raise(codes::prep_column_unknown, "apply_named: the row has no cell for column '" + features_[k].name + "'");
        }
        apply_cells(cells.data(), cells.size(), out);
    }

    /// Brings a scaled regression value back to the target's original units.
    double restore_target(double scaled) const {
        require_regression("restore_target");
        return target_scale_.inverse(scaled);
    }
    template <class T>
    void restore_targets(matrix<T>& values) const {
        require_regression("restore_targets");
        invert_scalings(values, std::vector<scaling>(values.shape()[1], target_scale_));
    }

    // --- serialization -------------------------------------------------------------------
    /// Version 2 added, per feature column, the time-stamp form and the
    /// time encoding; version 1 bytes still read (form detect, value alone)
    /// and are still written when every form is detect and no column has
    /// cyclic values.
    static constexpr std::uint16_t format_version = 2;

    std::vector<std::uint8_t> to_bytes() const {
        std::vector<std::uint8_t> bytes;
        byte_writer w(bytes);
        // Version 1 when no column has a time form or cyclic values, so that
        // plans without them stay readable by builds that read version 1 only.
        bool needs_forms = false;
        for (const auto& f : features_) needs_forms = needs_forms || f.time_form != time_format::detect || f.time != time_encoding::value;
        const std::uint16_t version = needs_forms ? format_version : 1;
        w.raw("TNPL", 4);
        w.u16(version);
        w.u32(static_cast<std::uint32_t>(missing_tokens_.size()));
        for (const auto& s : missing_tokens_) w.text(s);
        w.u32(static_cast<std::uint32_t>(features_.size()));
        for (const auto& f : features_) {
            w.u8(tag_feature);
            w.text(f.name);
            w.u8(static_cast<std::uint8_t>(f.kind));
            if (version >= 2) {
                w.u8(static_cast<std::uint8_t>(f.time_form));
                w.u8(static_cast<std::uint8_t>(f.time));
            }
            w.u8(static_cast<std::uint8_t>(f.fill.method));
            w.f64(f.fill.number);
            w.text(f.fill.text);
            w.u8(f.indicator ? 1 : 0);
            write_scaling(w, f.scale);
            w.u8(static_cast<std::uint8_t>(f.one_hot.policy()));
            w.u8(f.one_hot.omit_reference_level() ? 1 : 0);
            w.u32(static_cast<std::uint32_t>(f.one_hot.categories().size()));
            for (const auto& c : f.one_hot.categories()) w.text(c);
        }
        w.u8(has_target() ? 1 : 0);
        if (has_target()) {
            w.u8(tag_target);
            w.text(target_name_);
            w.u8(static_cast<std::uint8_t>(target_kind_));
            w.u32(static_cast<std::uint32_t>(classes_.size()));
            for (const auto& c : classes_.names()) w.text(c);
            write_scaling(w, target_scale_);
        }
        w.text(group_column_);
        w.text(time_column_);
        w.u64(dropped_training_rows_);
        return bytes;
    }

    static measured_plan from_bytes(const std::uint8_t* data, std::size_t size) {
        byte_reader r(data, size, "measured plan", prep_bytes_errors);
        const char magic[4] = {'T', 'N', 'P', 'L'};
        for (char m : magic)
            if (r.u8() != static_cast<std::uint8_t>(m))
                raise(codes::prep_bytes_bad_tag, "measured plan: the bytes do not start with the magic 'TNPL'");
        const std::uint16_t version = r.u16();
        if (version != 1 && version != format_version)
            raise(codes::prep_bytes_bad_tag,
                  "measured plan: format version " + std::to_string(version) + " is not supported (this build reads versions 1 to " +
                      std::to_string(format_version) + ")");
        measured_plan p;
        p.missing_tokens_.resize(r.count(4, "missing tokens"));
        for (auto& s : p.missing_tokens_) s = r.text();
        p.features_.resize(r.count(40, "feature columns"));
        for (auto& f : p.features_) {
            r.expect_tag(tag_feature, "a feature column");
            f.name = r.text();
            f.kind = r.enumeration<column_kind>(2, "column kind");
            if (version >= 2) {
                f.time_form = r.enumeration<time_format>(7, "time format");
                f.time = r.enumeration<time_encoding>(2, "time encoding");
                if (f.kind != column_kind::datetime && f.time != time_encoding::value)
                    raise(codes::prep_bytes_bad_tag, "measured plan: column '" + f.name + "' is not date/time but carries cyclic time values");
            }
            f.fill.method = r.enumeration<fill_method>(4, "fill method");
            f.fill.number = r.f64();
            f.fill.text = r.text();
            f.indicator = r.flag("missing indicator");
            f.scale = read_scaling(r);
            const auto policy = r.enumeration<unseen_policy>(2, "unseen-category policy");
            const bool omit_reference_level = r.flag("omit-reference-level");
            std::vector<std::string> categories(r.count(4, "categories"));
            for (auto& c : categories) c = r.text();
            f.one_hot = one_hot_layout(std::move(categories), policy, omit_reference_level);
        }
        if (r.flag("has-target")) {
            r.expect_tag(tag_target, "the target");
            p.target_name_ = r.text();
            p.target_kind_ = r.enumeration<target_kind>(1, "target kind");
            std::vector<std::string> names(r.count(4, "classes"));
            for (auto& c : names) c = r.text();
            p.classes_ = class_index(std::move(names));
            p.target_scale_ = read_scaling(r);
        }
        p.group_column_ = r.text();
        p.time_column_ = r.text();
        p.dropped_training_rows_ = r.u64_size("dropped training rows");
        r.expect_end();
        p.lay_out();
        return p;
    }
    static measured_plan from_bytes(const std::vector<std::uint8_t>& bytes) { return from_bytes(bytes.data(), bytes.size()); }

private:
    friend class plan;
    measured_plan() = default;

    static constexpr std::uint8_t tag_feature = 0xF1, tag_target = 0x7A;

    static void write_scaling(byte_writer& w, const scaling& s) {
        w.u8(static_cast<std::uint8_t>(s.method));
        w.f64(s.center);
        w.f64(s.spread);
        w.f64(s.low);
        w.f64(s.high);
    }
    static scaling read_scaling(byte_reader& r) {
        scaling s;
        s.method = r.enumeration<scaling_method>(3, "scaling method");
        s.center = r.f64();
        s.spread = r.f64();
        s.low = r.f64();
        s.high = r.f64();
        return s;
    }

    // Computes offsets, widths, feature and input names from features_.
    void lay_out() {
        feature_names_.clear();
        input_columns_.clear();
        std::size_t offset = 0;
        for (auto& f : features_) {
            f.offset = offset;
            input_columns_.push_back(f.name);
            if (f.kind == column_kind::categorical) {
                for (auto& n : f.one_hot.slot_names(f.name)) feature_names_.push_back(std::move(n));
                f.width = f.one_hot.width();
            } else {
                f.width = 0;
                if (f.time != time_encoding::cycles) {
                    feature_names_.push_back(f.name);
                    f.width = 1;
                }
                if (f.time != time_encoding::value) {
                    for (const char* part : {"#hour_sin", "#hour_cos", "#weekday_sin", "#weekday_cos", "#yearday_sin", "#yearday_cos"})
                        feature_names_.push_back(f.name + part);
                    f.width += 6;
                }
            }
            if (f.indicator) {
                feature_names_.push_back(f.name + "#missing");
                ++f.width;
            }
            offset += f.width;
        }
    }

    const detail::measured_feature& feature(const std::string& column_name) const {
        for (const auto& f : features_)
            if (f.name == column_name) return f;
        raise(codes::prep_column_unknown, "measured plan: no feature column named '" + column_name + "'");
    }

    static std::string where(const table& t) { return t.source().empty() ? std::string("table") : t.source(); }

    void require_regression(const char* what) const {
        if (!has_target() || target_kind_ != target_kind::regression)
            raise(codes::prep_column_kind, std::string(what) + ": the plan has no regression target");
    }
    void require_number_target(const column& c) const {
        if (c.kind() != column_kind::numeric)
            raise(codes::prep_column_kind, "regression target '" + c.name() + "' is " + to_string(c.kind()) + ", not numeric");
    }

    // A scaled value outside T's finite range (1e300 in a column whose
    // spread overflowed, or 1e39 in single precision) would reach the
    // trainer as infinity: raised here in the data's terms instead.
    template <class T>
    static bool representable(double scaled) noexcept {
        return std::isfinite(static_cast<T>(scaled));
    }
    template <class T>
    [[noreturn]] static void overflow(double scaled, double value, const std::string& column_text, const std::string& at) {
        raise(codes::prep_value_overflow,
              at + ", " + column_text + ": the value " + number_to_text(value) + " scales to " + number_to_text(scaled) + ", beyond the " +
                  (sizeof(T) == 4 ? "single" : "double") + " precision range (about " + (sizeof(T) == 4 ? "3.4e38" : "1.8e308") +
                  "); rescale the column (another unit) or leave it out");
    }

    template <class T>
    void write_number(const detail::measured_feature& f, bool missing, double value, T* out, const std::string& at) const {
        if (missing) {
            if (f.fill.method == fill_method::none)
                raise(codes::prep_value_missing, at + ", column '" + f.name + "': the cell is missing and the plan has no fill for it");
            value = f.fill.number;
        }
        std::size_t k = 0;
        if (f.time != time_encoding::cycles) {
            const double scaled = f.scale.forward(value);
            if (!representable<T>(scaled)) overflow<T>(scaled, value, "column '" + f.name + "'", at);
            out[k++] = static_cast<T>(scaled);
        }
        if (f.time != time_encoding::value) {
            double cycles[6];
            time_cycles(value, cycles);
            for (double c : cycles) out[k++] = static_cast<T>(c);
        }
        if (f.indicator) out[k] = missing ? T(1) : T(0);
    }

    template <class T>
    void write_category(const detail::measured_feature& f, bool missing, std::int64_t index, std::string_view text, T* out,
                        const std::string& at) const {
        if (missing) {
            if (f.fill.method == fill_method::none)
                raise(codes::prep_value_missing, at + ", column '" + f.name + "': the cell is missing and the plan has no fill for it");
            text = f.fill.text;
            index = f.one_hot.find(text);
        }
        if (index < 0 && f.one_hot.policy() == unseen_policy::fail)
            raise(codes::prep_category_unseen,
                  at + ", column '" + f.name + "': the category '" + std::string(text) + "' was not seen in the training rows");
        f.one_hot.encode(index, out, f.name, text);
        if (f.indicator) out[f.width - 1] = missing ? T(1) : T(0);
    }

    template <class T>
    void write_features(const table& t, const std::vector<std::size_t>& rows, matrix<T>& features) const {
        const std::size_t n = rows.size(), width = feature_names_.size();
        ensure_shape(features, shape2{n, width});
        std::vector<std::int64_t> category_map;
        for (const auto& f : features_) {
            const column& c = t.at(f.name);
            const bool table_categorical = c.kind() == column_kind::categorical;
            if (table_categorical != (f.kind == column_kind::categorical))
                raise(codes::prep_column_kind,
                      where(t) + ", column '" + f.name + "' is " + to_string(c.kind()) + " but the plan was measured on a " + to_string(f.kind) +
                          " column");
            if (f.kind == column_kind::categorical) {
                category_map.resize(c.categories().size());
                for (std::size_t k = 0; k < category_map.size(); ++k) category_map[k] = f.one_hot.find(c.categories()[k]);
            }
            for (std::size_t i = 0; i < n; ++i) {
                const std::size_t r = rows[i];
                T* o = features.data() + i * width + f.offset;
                const bool missing = c.is_missing(r);
                if (missing && f.fill.method == fill_method::none)
                    raise(codes::prep_value_missing,
                          t.row_place(r) + ", column '" + f.name + "': the cell is missing and the plan has no fill for it");
                if (f.kind == column_kind::categorical) {
                    if (missing || category_map[c.code(r)] >= 0 || f.one_hot.policy() != unseen_policy::fail)
                        write_category(f, missing, missing ? -1 : category_map[c.code(r)],
                                       missing ? std::string_view() : std::string_view(c.category(r)), o, std::string());
                    else
                        raise(codes::prep_category_unseen,
                              t.row_place(r) + ", column '" + f.name + "': the category '" + c.category(r) + "' was not seen in the training rows");
                } else {
                    const double value = missing ? 0.0 : c.number(r);
                    if (f.time != time_encoding::cycles && !representable<T>(f.scale.forward(value)))
                        overflow<T>(f.scale.forward(value), value, "column '" + f.name + "'", t.row_place(r));
                    write_number(f, missing, value, o, std::string());
                }
            }
        }
    }

    std::vector<detail::measured_feature> features_;
    std::vector<std::string> feature_names_;
    std::vector<std::string> input_columns_;
    std::vector<std::string> missing_tokens_;
    std::string target_name_;
    target_kind target_kind_ = target_kind::classification;
    class_index classes_;
    scaling target_scale_;
    std::string group_column_, time_column_;
    std::size_t dropped_training_rows_ = 0;
};

namespace detail {

// The named counts of the present categories of `c` over `rows`, merged.
inline std::vector<std::pair<std::string, std::uint64_t>> shared_category_counts(const column& c, const std::vector<std::size_t>& rows,
                                                                                 statistics_exchange& ex) {
    const auto counts = category_counts(c, rows);
    std::vector<std::pair<std::string, std::uint64_t>> named;
    for (std::size_t j = 0; j < counts.size(); ++j)
        if (counts[j] > 0) named.emplace_back(c.categories()[j], counts[j]);
    return ex.merge_named_counts(named);
}

// measure_fill over all participants' rows (same rules, same messages).
inline fill_value shared_fill(const column& c, const std::vector<std::size_t>& rows, const feature_steps& steps, statistics_exchange& ex) {
    feature_steps s = steps;
    s.fill = resolve_fill(s.fill, c.kind());
    if (s.fill == fill_method::none || s.fill == fill_method::constant) return measure_fill(c, rows, s.fill, s.fill_number, s.fill_text);
    fill_value f;
    f.method = s.fill;
    const auto nothing = [&] { raise(codes::prep_rows_empty, "column '" + c.name() + "': no present values to learn a fill value from"); };
    if (c.kind() == column_kind::categorical) {
        if (s.fill != fill_method::mode) measure_fill(c, rows, s.fill);  // raises prep.column.kind as alone
        std::uint64_t best = 0;
        for (const auto& kv : shared_category_counts(c, rows, ex))  // sorted: the smallest name wins ties
            if (kv.second > best) {
                best = kv.second;
                f.text = kv.first;
            }
        if (best == 0) nothing();
        return f;
    }
    if (s.fill == fill_method::mean) {
        const running_moments m = ex.merge_moments(column_moments(c, rows));
        if (m.count == 0) nothing();
        f.number = m.mean;
        return f;
    }
    std::vector<double> v = ex.gather_values(present_values(c, rows));
    if (v.empty()) nothing();
    if (s.fill == fill_method::median) {
        f.number = exact_quantile(v, 0.5);
        return f;
    }
    std::sort(v.begin(), v.end());  // most frequent: the smallest value wins ties, as alone
    std::size_t best = 0;
    for (std::size_t i = 0; i < v.size();) {
        std::size_t j = i;
        while (j < v.size() && v[j] == v[i]) ++j;
        if (j - i > best) {
            best = j - i;
            f.number = v[i];
        }
        i = j;
    }
    return f;
}

// measure_scaling over all participants' rows.
inline scaling shared_scaling(const column& c, const std::vector<std::size_t>& rows, scaling_method method, double low, double high,
                              statistics_exchange& ex) {
    if (method == scaling_method::none) return scaling{};
    if (method == scaling_method::median_iqr) {
        std::vector<double> v = ex.gather_values(present_values(c, rows));
        if (v.empty()) raise(codes::prep_rows_empty, "column '" + c.name() + "': no present values for quartiles");
        quartile_summary q;
        q.median = exact_quantile(v, 0.5);
        q.interquartile_range = exact_quantile(v, 0.75) - exact_quantile(v, 0.25);
        return median_iqr_scaling(q);
    }
    const running_moments m = ex.merge_moments(column_moments(c, rows));
    if (m.count == 0) raise(codes::prep_rows_empty, "column '" + c.name() + "': no present values to measure a scaling on");
    return scaling_from_moments(method, m, low, high);
}

}  // namespace detail

inline measured_plan plan::measure(const table& t, const std::vector<std::size_t>& training_rows, statistics_exchange* exchange) const {
    const std::string where = t.source().empty() ? std::string("table") : t.source();
    for (const auto& r : roles_) t.index_of(r.first);
    for (const auto& s : steps_) t.index_of(s.first);
    const column* target = target_.empty() ? nullptr : &t.at(target_);
    measured_plan p;
    p.missing_tokens_ = missing_tokens_;
    std::vector<std::size_t> kept;
    kept.reserve(training_rows.size());
    for (auto r : training_rows) {
        if (r >= t.row_count())
            raise(codes::prep_rows_out_of_range,
                  where + ": training row " + std::to_string(r) + " is not below the row count " + std::to_string(t.row_count()));
        if (target && target->is_missing(r)) {
            ++p.dropped_training_rows_;
            continue;
        }
        kept.push_back(r);
    }
    std::vector<std::uint64_t> totals = {kept.size(), training_rows.size(), p.dropped_training_rows_};
    if (exchange) {
        exchange->sum_counts(totals);  // all participants' rows
        p.dropped_training_rows_ = static_cast<std::size_t>(totals[2]);
    }
    if (totals[0] == 0)
        raise(codes::prep_rows_empty,
              where + ": no training rows to measure the plan on (" + std::to_string(totals[1]) + " given, " +
                  std::to_string(p.dropped_training_rows_) + " dropped for a missing target)");
    for (std::size_t k = 0; k < t.column_count(); ++k) {
        const column& c = t[k];
        const column_role role = role_of(c.name());
        if (role == column_role::group) p.group_column_ = c.name();
        if (role == column_role::time) p.time_column_ = c.name();
        const feature_steps& s = steps_of(c.name());
        // A time column gives no feature, except its cyclic values when chosen.
        const bool time_cycles_only = role == column_role::time && c.kind() == column_kind::datetime && s.time != time_encoding::value;
        if (role != column_role::feature && !time_cycles_only) continue;
        bool steps_named = false;
        for (const auto& named : steps_) steps_named = steps_named || named.first == c.name();
        if (s.time != time_encoding::value && c.kind() != column_kind::datetime && steps_named)
            raise(codes::prep_column_kind,
                  where + ", column '" + c.name() + "' is " + to_string(c.kind()) + ": cyclic time values need a date/time column");
        detail::measured_feature f;
        f.name = c.name();
        f.kind = c.kind();
        f.time_form = c.time_form();
        f.time = c.kind() != column_kind::datetime ? time_encoding::value : time_cycles_only ? time_encoding::cycles : s.time;
        f.indicator = s.missing_indicator;
        if (!f.indicator && s.indicator_if_missing_in_training) {
            std::vector<std::uint64_t> missing{0};
            for (auto r : kept) missing[0] += c.is_missing(r) ? 1u : 0u;
            if (exchange) exchange->sum_counts(missing);  // every participant decides alike
            f.indicator = missing[0] > 0;
        }
        f.fill = exchange ? detail::shared_fill(c, kept, s, *exchange) : measure_fill(c, kept, s.fill, s.fill_number, s.fill_text);
        if (c.kind() == column_kind::categorical) {
            std::vector<std::string> seen;
            if (exchange) {
                for (const auto& kv : detail::shared_category_counts(c, kept, *exchange)) seen.push_back(kv.first);
            } else {
                const auto counts = category_counts(c, kept);
                for (std::size_t j = 0; j < counts.size(); ++j)
                    if (counts[j] > 0) seen.push_back(c.categories()[j]);
            }
            if (f.fill.method == fill_method::constant) seen.push_back(f.fill.text);
            if (seen.empty()) raise(codes::prep_rows_empty, where + ", column '" + c.name() + "': no present category in the training rows");
            f.one_hot = one_hot_layout(std::move(seen), s.unseen, s.omit_reference_level);
        } else {
            f.scale = exchange ? detail::shared_scaling(c, kept, s.scaling, s.range_low, s.range_high, *exchange)
                               : measure_scaling(c, kept, s.scaling, s.range_low, s.range_high);
        }
        p.features_.push_back(std::move(f));
    }
    if (target) {
        p.target_name_ = target_;
        p.target_kind_ = target_kind_;
        if (target_kind_ == target_kind::classification) {
            std::vector<std::string> names;
            if (target->kind() == column_kind::categorical) {
                const auto counts = category_counts(*target, kept);
                for (std::size_t j = 0; j < counts.size(); ++j)
                    if (counts[j] > 0) names.push_back(target->categories()[j]);
            } else {
                std::vector<double> values = present_values(*target, kept);
                std::sort(values.begin(), values.end());
                values.erase(std::unique(values.begin(), values.end()), values.end());
                for (double v : values) names.push_back(number_to_text(v));
            }
            if (exchange) {  // the union of the participants' classes (class_index sorts them)
                std::vector<std::pair<std::string, std::uint64_t>> named;
                for (auto& n : names) named.emplace_back(std::move(n), 1);
                names.clear();
                for (auto& kv : exchange->merge_named_counts(named)) names.push_back(std::move(kv.first));
            }
            p.classes_ = class_index(std::move(names));
        } else {
            p.require_number_target(*target);
            p.target_scale_ = exchange ? detail::shared_scaling(*target, kept, target_scaling_, 0.0, 1.0, *exchange)
                                       : measure_scaling(*target, kept, target_scaling_);
        }
    }
    p.lay_out();
    return p;
}

TENON_NAMESPACE_END
