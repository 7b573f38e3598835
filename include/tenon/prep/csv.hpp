// tenon: reading delimited text (CSV) into a table, or streaming it row by row.
//
// The grammar is RFC 4180 (Shafranovich, 2005), section 2, with a
// configurable delimiter, bare LF or CR line ends, a skipped UTF-8 byte-order
// mark and skipped empty lines; the first record names the columns. Streaming
// keeps one record and one chunk in memory. detect_csv_dialect tells the
// delimiter and decimal mark from the first rows and refuses to guess. Errors
// name the source, the line and the column; fields and category counts are
// bounded (prep.csv.oversize). Grammar, limits and why: docs/design/prep.md.
#pragma once

#include <cerrno>
#include <cstddef>
#include <cstdint>
#include <cstring>
#include <fstream>
#include <functional>
#include <istream>
#include <map>
#include <sstream>
#include <string>
#include <string_view>
#include <utility>
#include <vector>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"
#include "tenon/prep/cell_parsing.hpp"
#include "tenon/prep/statistics.hpp"
#include "tenon/prep/table.hpp"

TENON_NAMESPACE_BEGIN

struct csv_options {
    char delimiter = ',';
    /// Read numbers written with a decimal comma ("59,8" is 59.8), as European
    /// plant exports commonly do with ';' as the delimiter. Only with a
    /// delimiter other than ','. A cell holding a '.' is then not a number:
    /// thousands separators are never read ("1.234" and "1.234,5" stay text),
    /// so no grouped number is silently taken for a small one.
    bool decimal_comma = false;
    /// Cell texts read as missing (compared after trimming blanks).
    std::vector<std::string> missing_tokens = default_missing_tokens();
    /// Column kinds chosen by the host instead of inferred, by column name.
    std::map<std::string, column_kind> forced_kinds;
    /// Time-stamp forms by column name. A column named here is read as
    /// date/time in that form (the only way to read epoch seconds or
    /// milliseconds, which otherwise are plain numbers).
    std::map<std::string, time_format> time_formats;
    /// The form of date/time columns not named in time_formats:
    /// time_format::detect picks, per column, the one text form every present
    /// cell reads in, and refuses slash dates that read both day-first and
    /// month-first (prep.time.ambiguous); day_slash or month_slash settles
    /// that choice; any other form is required of every date/time column.
    time_format default_time_format = time_format::detect;
    /// Bytes read from the stream at a time.
    std::size_t chunk_bytes = std::size_t(1) << 20;
    /// Longest field accepted, in bytes (after removing quotes).
    std::size_t max_field_bytes = std::size_t(1) << 16;
    /// Most distinct texts accepted in one categorical column.
    std::size_t max_categories = std::size_t(1) << 16;
};

/// Pulls one record at a time out of a stream. The views returned by field()
/// stay valid until the next call to next().
class csv_record_reader {
public:
    csv_record_reader(std::istream& in, char delimiter, std::string source, std::size_t chunk_bytes = std::size_t(1) << 20)
        : in_(in), delimiter_(delimiter), source_(std::move(source)), chunk_(chunk_bytes ? chunk_bytes : 1) {
        if (delimiter == '"' || delimiter == '\n' || delimiter == '\r')
            raise(codes::core_argument_invalid, source_ + ": the delimiter cannot be a quote or a line break");
    }

    /// Reads the next non-empty record; false at the end of the input.
    bool next() {
        for (;;) {
            text_.clear();
            ends_.clear();
            if (!read_record()) return false;
            if (!(ends_.size() == 1 && ends_[0] == 0 && !last_field_quoted_)) return true;  // skip empty lines
        }
    }

    /// Fields longer than this raise prep.csv.oversize (default 64 KiB).
    void set_max_field_bytes(std::size_t bytes) noexcept { max_field_bytes_ = bytes; }

    std::size_t field_count() const noexcept { return ends_.size(); }
    std::string_view field(std::size_t k) const noexcept {
        const std::size_t begin = k == 0 ? 0 : ends_[k - 1];
        return std::string_view(text_.data() + begin, ends_[k] - begin);
    }
    /// Line (1-based) on which the current record starts.
    std::size_t line() const noexcept { return record_line_; }
    const std::string& source() const noexcept { return source_; }

private:
    // Returns the next byte, or -1 at the end of the input.
    int get() {
        if (position_ == filled_) {
            if (eof_) return -1;
            in_.read(chunk_.data(), static_cast<std::streamsize>(chunk_.size()));
            filled_ = static_cast<std::size_t>(in_.gcount());
            position_ = 0;
            if (in_.bad()) raise(codes::prep_file_open, source_ + ": read error");
            if (filled_ < chunk_.size()) eof_ = true;
            if (filled_ == 0) return -1;
            if (first_chunk_) {
                first_chunk_ = false;
                if (filled_ >= 3 && static_cast<unsigned char>(chunk_[0]) == 0xEF && static_cast<unsigned char>(chunk_[1]) == 0xBB &&
                    static_cast<unsigned char>(chunk_[2]) == 0xBF)
                    position_ = 3;
                if (position_ == filled_) return get();
            }
        }
        return static_cast<unsigned char>(chunk_[position_++]);
    }
    int peek() {
        const int c = get();
        if (c >= 0) --position_;
        return c;
    }

    [[noreturn]] void fail(const char* code, const std::string& message) const {
        raise(code, source_ + " line " + std::to_string(record_line_) + " column " + std::to_string(ends_.size() + 1) + ": " + message);
    }

    [[noreturn]] void field_too_long() const {
        fail(codes::prep_csv_oversize,
             "a field longer than the limit of " + std::to_string(max_field_bytes_) + " bytes (csv_options::max_field_bytes)");
    }

    bool read_record() {
        int c = get();
        if (c < 0) return false;
        record_line_ = line_;
        for (;;) {
            // Start of a field.
            last_field_quoted_ = false;
            const std::size_t field_limit = text_.size() + max_field_bytes_;
            if (c == '"') {
                last_field_quoted_ = true;
                const std::size_t open_line = line_;
                for (;;) {
                    c = get();
                    if (c < 0)
                        fail(codes::prep_csv_unterminated_quote,
                             "the quoted field opened on line " + std::to_string(open_line) + " is not closed before the end of the input");
                    if (c == '"') {
                        if (peek() == '"') {
                            get();
                            if (text_.size() == field_limit) field_too_long();
                            text_.push_back('"');
                            continue;
                        }
                        break;
                    }
                    if (c == '\n')
                        ++line_;
                    else if (c == '\r' && peek() != '\n')
                        ++line_;
                    if (text_.size() == field_limit) field_too_long();
                    text_.push_back(static_cast<char>(c));
                }
                c = get();
                if (c >= 0 && c != delimiter_ && c != '\n' && c != '\r')
                    fail(codes::prep_csv_stray_quote, "a closing quote must be followed by the delimiter or a line end");
            } else {
                while (c >= 0 && c != delimiter_ && c != '\n' && c != '\r') {
                    if (c == '"') fail(codes::prep_csv_stray_quote, "a quote inside an unquoted field (quote the whole field and double the quote)");
                    if (text_.size() == field_limit) field_too_long();
                    text_.push_back(static_cast<char>(c));
                    c = get();
                }
            }
            ends_.push_back(text_.size());
            if (c == delimiter_) {
                c = get();
                continue;
            }
            // End of record: line break or end of input.
            if (c == '\r' && peek() == '\n') get();
            if (c == '\n' || c == '\r') ++line_;
            return true;
        }
    }

    std::istream& in_;
    char delimiter_;
    std::string source_;
    std::vector<char> chunk_;
    std::size_t position_ = 0, filled_ = 0;
    bool eof_ = false, first_chunk_ = true, last_field_quoted_ = false;
    std::size_t line_ = 1, record_line_ = 1;
    std::size_t max_field_bytes_ = std::size_t(1) << 16;
    std::string text_;
    std::vector<std::size_t> ends_;
};

/// Parses a number written with a decimal comma ("59,8", "-0,5", "1,5e3",
/// "12"): the whole cell (blanks around it ignored) with at most one ',' and
/// no '.', otherwise as parse_number. Allocates nothing.
inline bool parse_decimal_comma_number(std::string_view cell, double& out) noexcept {
    const std::string_view s = detail::trim_blanks(cell);
    char buffer[128];
    if (s.size() > sizeof(buffer)) return false;  // no finite number needs that many characters
    std::size_t commas = 0;
    for (std::size_t k = 0; k < s.size(); ++k) {
        const char c = s[k];
        if (c == '.') return false;
        if (c == ',') ++commas;
        buffer[k] = c == ',' ? '.' : c;
    }
    if (commas > 1) return false;
    return parse_number(std::string_view(buffer, s.size()), out);
}

namespace detail {
inline bool read_number(std::string_view cell, bool decimal_comma, double& out) noexcept {
    return decimal_comma ? parse_decimal_comma_number(cell, out) : parse_number(cell, out);
}

inline void require_dialect(const csv_options& options, const std::string& source) {
    if (options.decimal_comma && options.delimiter == ',')
        raise(codes::core_argument_invalid, source + ": decimal commas cannot be read when ',' is also the delimiter");
}

inline std::ifstream open_for_reading(const std::string& path) {
    errno = 0;
    std::ifstream in(path, std::ios::binary);
    if (!in) {
        const int e = errno;
        raise(codes::prep_file_open, path + ": cannot open for reading" + (e ? std::string(" (") + std::strerror(e) + ")" : std::string()));
    }
    // A directory opens on some systems and fails at the first read: named here.
    in.peek();
    if (in.bad()) raise(codes::prep_file_open, path + ": cannot be read (a directory?)");
    in.clear();
    return in;
}

inline std::vector<std::string> read_header(csv_record_reader& reader) {
    if (!reader.next()) raise(codes::prep_csv_no_header, reader.source() + ": no header row (the input is empty)");
    std::vector<std::string> names;
    for (std::size_t k = 0; k < reader.field_count(); ++k) {
        std::string name(trim_blanks(reader.field(k)));
        for (const auto& earlier : names)
            if (earlier == name)
                raise(codes::prep_csv_duplicate_column,
                      reader.source() + " line " + std::to_string(reader.line()) + " column " + std::to_string(k + 1) + ": the name '" + name +
                          "' is used twice in the header");
        names.push_back(std::move(name));
    }
    return names;
}

inline void require_field_count(const csv_record_reader& reader, std::size_t expected) {
    if (reader.field_count() != expected)
        raise(codes::prep_csv_ragged,
              reader.source() + " line " + std::to_string(reader.line()) + ": expected " + std::to_string(expected) + " fields, found " +
                  std::to_string(reader.field_count()));
}
}  // namespace detail

/// Calls `on_record(reader)` for every data record after the header (whose
/// names are passed to `on_header` first). Ragged records raise prep.csv.ragged.
inline void for_each_csv_record(std::istream& in, const csv_options& options, const std::string& source,
                                const std::function<void(const std::vector<std::string>&)>& on_header,
                                const std::function<void(const csv_record_reader&)>& on_record) {
    csv_record_reader reader(in, options.delimiter, source, options.chunk_bytes);
    reader.set_max_field_bytes(options.max_field_bytes);
    const auto names = detail::read_header(reader);
    if (on_header) on_header(names);
    while (reader.next()) {
        detail::require_field_count(reader, names.size());
        on_record(reader);
    }
}

/// What one streaming pass learns about a column, without keeping the rows.
struct column_summary {
    std::string name;
    std::size_t present = 0;  // cells that are not missing
    std::size_t missing = 0;  // cells equal to a missing token
    std::size_t numeric_cells = 0;  // present cells that read as a finite number
    std::size_t datetime_cells = 0;  // present cells that read as a date/time
    running_moments numbers;  // over the numeric cells
    running_moments times;  // over the date/time cells (seconds since the epoch)
    /// Counts per distinct text, up to the summary's category limit.
    std::map<std::string, std::size_t> category_counts;
    /// True when more distinct texts were seen than the limit kept.
    bool categories_truncated = false;

    /// The kind read_csv would infer from the same cells.
    column_kind inferred_kind() const noexcept {
        if (numeric_cells == present) return column_kind::numeric;
        if (datetime_cells == present) return column_kind::datetime;
        return column_kind::categorical;
    }
};

/// One streaming pass over CSV text: counts, min/max, mean and variance
/// (Welford), and category sets for every column. Memory is bounded by one
/// chunk, one record and at most `max_categories` texts per column, so files
/// larger than memory can be measured. Quantiles need read_csv and
/// column_quartiles (exact, in memory).
inline std::vector<column_summary> summarize_csv(std::istream& in, const csv_options& options = {}, const std::string& source = "<stream>",
                                                 std::size_t max_categories = 65536) {
    detail::require_dialect(options, source);
    std::vector<column_summary> summaries;
    for_each_csv_record(
        in, options, source,
        [&](const std::vector<std::string>& names) {
            summaries.resize(names.size());
            for (std::size_t k = 0; k < names.size(); ++k) summaries[k].name = names[k];
        },
        [&](const csv_record_reader& reader) {
            std::string key;
            for (std::size_t k = 0; k < summaries.size(); ++k) {
                auto& s = summaries[k];
                const std::string_view cell = reader.field(k);
                if (is_missing_cell(cell, options.missing_tokens)) {
                    ++s.missing;
                    continue;
                }
                ++s.present;
                double value = 0;
                if (detail::read_number(cell, options.decimal_comma, value)) {
                    ++s.numeric_cells;
                    s.numbers.add(value);
                } else if (parse_datetime(cell, value)) {
                    ++s.datetime_cells;
                    s.times.add(value);
                }
                key.assign(detail::trim_blanks(cell));
                auto it = s.category_counts.find(key);
                if (it != s.category_counts.end())
                    ++it->second;
                else if (s.category_counts.size() < max_categories)
                    s.category_counts.emplace(key, 1);
                else
                    s.categories_truncated = true;
            }
        });
    return summaries;
}

inline std::vector<column_summary> summarize_csv_file(const std::string& path, const csv_options& options = {}, std::size_t max_categories = 65536) {
    auto in = detail::open_for_reading(path);
    return summarize_csv(in, options, path, max_categories);
}

namespace detail {
// The one time-stamp form every present cell of a column reads in, or
// time_format::detect when no text form fits them all (the column is then
// not a date/time column). `preferred` other than detect is the only form
// tried, except that day_slash / month_slash only settle the slash-date
// choice. Raises prep.time.ambiguous when both slash orders fit every cell.
template <class Cell>
time_format detect_time_form(const std::string& name, std::size_t rows, const std::vector<std::uint8_t>& missing, const Cell& cell,
                             time_format preferred, const std::string& source) {
    const bool slash_choice = preferred == time_format::day_slash || preferred == time_format::month_slash;
    const auto fits = [&](time_format form) {
        double value = 0;
        for (std::size_t i = 0; i < rows; ++i)
            if (!missing[i] && !parse_datetime(cell(i), form, value)) return false;
        return true;
    };
    bool any_present = false;
    for (std::size_t i = 0; i < rows && !any_present; ++i) any_present = !missing[i];
    if (!any_present) return time_format::detect;
    if (preferred != time_format::detect && !slash_choice) return fits(preferred) ? preferred : time_format::detect;
    for (time_format form : {time_format::iso, time_format::year_slash, time_format::day_dot})
        if (fits(form)) return form;
    const bool day_first = fits(time_format::day_slash), month_first = fits(time_format::month_slash);
    if (day_first && month_first) {
        if (slash_choice) return preferred;
        std::size_t example = 0;
        while (missing[example]) ++example;
        raise(codes::prep_time_ambiguous,
              source + ", column '" + name + "': dates such as '" + std::string(trim_blanks(cell(example))) +
                  "' read both day-first (DD/MM/YYYY) and month-first (MM/DD/YYYY); give the time format");
    }
    return day_first ? time_format::day_slash : month_first ? time_format::month_slash : time_format::detect;
}

// True when the column reads as date/time: in one form (set in `form`), or
// in several unambiguous ones (form detect).
template <class Cell>
bool detect_time_format(const std::string& name, std::size_t rows, const std::vector<std::uint8_t>& missing, const Cell& cell, time_format preferred,
                        const std::string& source, time_format& form) {
    form = detect_time_form(name, rows, missing, cell, preferred, source);
    if (form != time_format::detect) return true;
    if (preferred != time_format::detect && preferred != time_format::day_slash && preferred != time_format::month_slash) return false;
    bool any_present = false;
    double value = 0;
    for (std::size_t i = 0; i < rows; ++i) {
        if (missing[i]) continue;
        any_present = true;
        if (!parse_datetime(cell(i), time_format::detect, value)) return false;
    }
    return any_present;
}
}  // namespace detail

/// Reads CSV text into a table. Column kinds are forced (options.forced_kinds,
/// options.time_formats) or inferred: numeric if every present cell reads as
/// a finite number, date/time if every present cell reads as a time stamp in
/// one form (detect_time_format; the column keeps its form, time_form()),
/// categorical otherwise; a column with no present cell is numeric.
inline table read_csv(std::istream& in, const csv_options& options = {}, const std::string& source = "<stream>") {
    detail::require_dialect(options, source);
    csv_record_reader reader(in, options.delimiter, source, options.chunk_bytes);
    reader.set_max_field_bytes(options.max_field_bytes);
    const auto names = detail::read_header(reader);
    for (const auto& forced : options.forced_kinds) {
        bool found = false;
        for (const auto& n : names) found = found || n == forced.first;
        if (!found)
            raise(codes::prep_column_unknown, source + ": a kind is forced for column '" + forced.first + "', which the header does not name");
    }
    for (const auto& named : options.time_formats) {
        bool found = false;
        for (const auto& n : names) found = found || n == named.first;
        if (!found)
            raise(codes::prep_column_unknown, source + ": a time format is given for column '" + named.first + "', which the header does not name");
        if (named.second == time_format::detect)
            raise(codes::core_argument_invalid, source + ": column '" + named.first + "': name a time format, not 'detect'");
    }
    const std::size_t width = names.size();
    // Pass 1: keep the raw cells, column by column, in one text arena each.
    std::vector<std::string> arena(width);
    std::vector<std::vector<std::size_t>> ends(width);
    std::vector<std::size_t> lines;
    while (reader.next()) {
        detail::require_field_count(reader, width);
        lines.push_back(reader.line());
        for (std::size_t k = 0; k < width; ++k) {
            arena[k].append(reader.field(k));
            ends[k].push_back(arena[k].size());
        }
    }
    const std::size_t rows = lines.size();
    table result(source);
    // Pass 2: decide each column's kind and convert.
    for (std::size_t k = 0; k < width; ++k) {
        auto cell = [&](std::size_t i) {
            const std::size_t begin = i == 0 ? 0 : ends[k][i - 1];
            return std::string_view(arena[k].data() + begin, ends[k][i] - begin);
        };
        std::vector<std::uint8_t> missing(rows);
        for (std::size_t i = 0; i < rows; ++i) missing[i] = is_missing_cell(cell(i), options.missing_tokens) ? 1 : 0;
        column_kind kind;
        time_format form = time_format::detect;
        auto forced = options.forced_kinds.find(names[k]);
        auto named_form = options.time_formats.find(names[k]);
        if (named_form != options.time_formats.end()) {
            kind = column_kind::datetime;
            form = named_form->second;
        } else if (forced != options.forced_kinds.end() && forced->second != column_kind::datetime) {
            kind = forced->second;
        } else {
            bool all_numbers = forced == options.forced_kinds.end();
            double value = 0;
            for (std::size_t i = 0; i < rows && all_numbers; ++i)
                if (!missing[i] && !detail::read_number(cell(i), options.decimal_comma, value)) all_numbers = false;
            if (all_numbers) {
                kind = column_kind::numeric;
            } else {
                // Cells in several unambiguous forms (each reads one way only) stay
                // readable, as before forms were detected, under the form detect.
                const bool dates = detail::detect_time_format(names[k], rows, missing, cell, options.default_time_format, source, form);
                kind = dates || forced != options.forced_kinds.end() ? column_kind::datetime : column_kind::categorical;
            }
        }
        column& c = result.add_column(names[k], kind);
        c.set_time_form(form);
        c.reserve(rows);
        for (std::size_t i = 0; i < rows; ++i) {
            if (missing[i]) {
                c.push_missing();
                continue;
            }
            const std::string_view text = cell(i);
            double value = 0;
            if (kind == column_kind::numeric) {
                if (!detail::read_number(text, options.decimal_comma, value))
                    raise(codes::prep_cell_not_numeric,
                          source + " line " + std::to_string(lines[i]) + " column " + std::to_string(k + 1) + " ('" + names[k] + "'): '" +
                              std::string(text) + "' is not a finite number" + (options.decimal_comma ? " (read with a decimal comma)" : ""));
                c.push_number(value);
            } else if (kind == column_kind::datetime) {
                if (!parse_datetime(text, form, value))
                    raise(codes::prep_cell_not_datetime,
                          source + " line " + std::to_string(lines[i]) + " column " + std::to_string(k + 1) + " ('" + names[k] + "'): '" +
                              std::string(text) + "' is not a date/time" +
                              (form == time_format::detect ? std::string() : std::string(" in the form ") + to_string(form)));
                c.push_number(value);
            } else {
                c.push_category(detail::trim_blanks(text));
                if (c.categories().size() > options.max_categories)
                    raise(codes::prep_csv_oversize,
                          source + " line " + std::to_string(lines[i]) + " column " + std::to_string(k + 1) + " ('" + names[k] + "'): more than " +
                              std::to_string(options.max_categories) +
                              " distinct categories (csv_options::max_categories); a column of that many "
                              "levels is not a category (an identifier or free text?)");
            }
        }
        std::string().swap(arena[k]);  // free the raw text of this column early
    }
    result.set_row_lines(std::move(lines));  // messages about a row name its file line
    return result;
}

inline table read_csv_file(const std::string& path, const csv_options& options = {}) {
    auto in = detail::open_for_reading(path);
    return read_csv(in, options, path);
}

// ---------------------------------------------------------------------------
// Telling a file's dialect: its delimiter and its decimal mark.

/// Which parts of the dialect detect_csv_dialect decides from the file; the
/// others are kept as given.
struct csv_detection {
    bool delimiter = true;  // among ',', ';', tab and '|'
    bool decimal_comma = true;  // only looked for when the delimiter is not ','
    /// Data records looked at after the header (and at most 1 MiB of text).
    std::size_t sample_records = 200;
};

namespace detail {

inline std::string delimiter_name(char d) {
    if (d == '\t') return "tab";
    return std::string("'") + d + "'";
}

// Field count of the header when every sampled record has as many fields,
// else 0 (also when the sample does not parse with this delimiter).
inline std::size_t consistent_field_count(const std::string& sample, bool truncated, char delimiter, const std::string& source, std::size_t records,
                                          std::size_t& header_fields) {
    std::istringstream in(sample);
    csv_record_reader reader(in, delimiter, source, sample.size() + 1);
    header_fields = 0;
    try {
        if (!reader.next()) return 0;
        header_fields = reader.field_count();
        for (std::size_t n = 0; n < records && reader.next();)
            if (reader.field_count() != header_fields)
                return 0;
            else
                ++n;
    } catch (const error& e) {
        // A quoted field cut by the end of a truncated sample proves nothing.
        if (!(truncated && std::string(e.code()) == codes::prep_csv_unterminated_quote)) return 0;
    }
    return header_fields;
}

inline bool is_digit(char c) noexcept { return c >= '0' && c <= '9'; }

// "59,8", "-1234,5": digits, one comma, digits (an exponent may follow).
inline bool has_decimal_comma_form(std::string_view s) noexcept {
    double ignored = 0;
    const auto comma = s.find(',');
    if (comma == std::string_view::npos || comma == 0 || comma + 1 >= s.size()) return false;
    if (!is_digit(s[comma - 1]) || !is_digit(s[comma + 1])) return false;
    return parse_decimal_comma_number(s, ignored);
}

// "1,234" or "12,500": one to three digits, not starting with 0, a comma and
// exactly three digits, as a thousands separator would group them.
inline bool has_grouping_form(std::string_view s) noexcept {
    if (!s.empty() && (s.front() == '+' || s.front() == '-')) s.remove_prefix(1);
    const auto comma = s.find(',');
    if (comma == std::string_view::npos || comma == 0 || comma > 3 || s[0] == '0' || s.size() != comma + 4) return false;
    for (std::size_t k = 0; k < s.size(); ++k)
        if (k != comma && !is_digit(s[k])) return false;
    return true;
}

// Digits with both '.' and ',' ("1.234,5", "1,234.5"): a grouped number.
inline bool has_both_marks(std::string_view s) noexcept {
    if (!s.empty() && (s.front() == '+' || s.front() == '-')) s.remove_prefix(1);
    if (s.empty() || !is_digit(s.front()) || !is_digit(s.back())) return false;
    bool point = false, comma = false;
    for (char c : s) {
        if (c == '.')
            point = true;
        else if (c == ',')
            comma = true;
        else if (!is_digit(c))
            return false;
    }
    return point && comma;
}

}  // namespace detail

/// Decides the delimiter and the decimal mark of CSV text from its header and
/// first records (csv_detection::sample_records, at most 1 MiB), reading `in`
/// forward; the caller reopens or rewinds it to read the table. Returns
/// `given` with the detected parts set.
///
/// Delimiter: the one of ',', ';', tab and '|' that splits the header into at
/// least two fields and every sampled record into as many. None: the one
/// giving the header the most fields (the reader then names the first ragged
/// record), or ',' for a one-column file. Two or more: refused.
///
/// Decimal comma (only with a delimiter other than ','): on when some present
/// cell reads as a number with a decimal comma ("59,8"). Refused, because a
/// reading could be silently wrong, when: a cell holds both '.' and ','
/// ("1.234,5": thousands separators are not read); cells with a decimal comma
/// and cells with a decimal point ("3.5") are both present; or every
/// decimal-comma cell could be a thousands group ("1,234", "12,500": one to
/// three digits not starting with 0, a comma, three digits), so that 1.234
/// and 1234 are equally likely. Name the dialect explicitly then.
///
/// Raises prep.csv.dialect_ambiguous naming the file, the candidates and, for
/// the decimal mark, the line, column and cell.
inline csv_options detect_csv_dialect(std::istream& in, const std::string& source, csv_options given = {}, const csv_detection& what = {}) {
    constexpr std::size_t sample_limit = std::size_t(1) << 20;
    std::string sample(sample_limit, '\0');
    in.read(&sample[0], static_cast<std::streamsize>(sample_limit));
    if (in.bad()) raise(codes::prep_file_open, source + ": read error");
    sample.resize(static_cast<std::size_t>(in.gcount()));
    const bool truncated = sample.size() == sample_limit && in.peek() != std::char_traits<char>::eof();
    if (truncated) {
        const auto last_break = sample.find_last_of("\r\n");
        if (last_break != std::string::npos) sample.resize(last_break + 1);
    }
    if (what.delimiter) {
        const char candidates[] = {',', ';', '\t', '|'};
        std::vector<char> fitting;
        std::vector<std::size_t> counts;
        char widest = ',';
        std::size_t widest_fields = 1;
        for (char d : candidates) {
            std::size_t header_fields = 0;
            const std::size_t fields = detail::consistent_field_count(sample, truncated, d, source, what.sample_records, header_fields);
            if (fields >= 2) {
                fitting.push_back(d);
                counts.push_back(fields);
            }
            if (header_fields > widest_fields) {
                widest = d;
                widest_fields = header_fields;
            }
        }
        if (fitting.size() > 1) {
            std::string listed;
            for (std::size_t k = 0; k < fitting.size(); ++k)
                listed += (k ? (k + 1 == fitting.size() ? " and " : ", ") : "") + detail::delimiter_name(fitting[k]) + " (" +
                    std::to_string(counts[k]) + " fields)";
            raise(codes::prep_csv_dialect_ambiguous,
                  source + ": the delimiter is ambiguous: " + listed + " each split the header and the first rows evenly; name the delimiter");
        }
        given.delimiter = fitting.empty() ? widest : fitting.front();
    }
    if (what.decimal_comma) {
        given.decimal_comma = false;
        if (given.delimiter == ',') return given;
        std::istringstream text(sample);
        csv_record_reader reader(text, given.delimiter, source, sample.size() + 1);
        std::vector<std::string> names;
        struct sighting {
            std::string cell, column;
            std::size_t line = 0, field = 0;
            bool seen = false;
            std::string where(const std::string& file) const {
                return file + " line " + std::to_string(line) + " column " + std::to_string(field + 1) + " ('" + column + "'): '" + cell + "'";
            }
        } comma, point, grouped_only;
        bool comma_not_grouping = false;
        const auto note = [&](sighting& s, std::string_view cell, std::size_t k) {
            if (s.seen) return;
            s = {std::string(cell), k < names.size() ? names[k] : std::string(), reader.line(), k, true};
        };
        try {
            if (reader.next()) {
                for (std::size_t k = 0; k < reader.field_count(); ++k) names.emplace_back(detail::trim_blanks(reader.field(k)));
                for (std::size_t n = 0; n < what.sample_records && reader.next(); ++n) {
                    for (std::size_t k = 0; k < reader.field_count(); ++k) {
                        const std::string_view cell = detail::trim_blanks(reader.field(k));
                        if (is_missing_cell(cell, given.missing_tokens)) continue;
                        double value = 0;
                        if (detail::has_both_marks(cell))
                            raise(codes::prep_csv_dialect_ambiguous,
                                  source + " line " + std::to_string(reader.line()) + " column " + std::to_string(k + 1) + " ('" +
                                      (k < names.size() ? names[k] : std::string()) + "'): '" + std::string(cell) +
                                      "' holds both '.' and ',': thousands separators are not read; write numbers without them");
                        if (detail::has_decimal_comma_form(cell)) {
                            note(comma, cell, k);
                            if (!detail::has_grouping_form(cell))
                                comma_not_grouping = true;
                            else
                                note(grouped_only, cell, k);
                        } else if (cell.find('.') != std::string_view::npos && parse_number(cell, value)) {
                            note(point, cell, k);
                        }
                    }
                }
            }
        } catch (const error& e) {
            if (std::string(e.code()) == codes::prep_csv_dialect_ambiguous) throw;
            // A malformed sample is reported by the reader that reads the table.
        }
        if (comma.seen && point.seen)
            raise(codes::prep_csv_dialect_ambiguous,
                  source + ": the decimal mark is ambiguous: " + comma.where(source) + " has a decimal comma and " + point.where(source) +
                      " a decimal point");
        if (comma.seen && !comma_not_grouping)
            raise(codes::prep_csv_dialect_ambiguous,
                  source + ": the decimal mark is ambiguous: every cell with a comma, such as " + grouped_only.where(source) +
                      ", could be a decimal comma or a thousands separator; name the decimal mark");
        given.decimal_comma = comma.seen;
    }
    return given;
}

inline csv_options detect_csv_dialect_file(const std::string& path, const csv_options& given = {}, const csv_detection& what = {}) {
    auto in = detail::open_for_reading(path);
    return detect_csv_dialect(in, path, given, what);
}

TENON_NAMESPACE_END
