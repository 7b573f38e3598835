// `tenon infer`: predictions of a saved model for the rows of a CSV file,
// one output row per input row.
#include <algorithm>
#include <charconv>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <fstream>
#include <string>
#include <string_view>
#include <utility>
#include <vector>

#include "tool_parts.hpp"

namespace tenon_cli {

struct infer_request {
    std::string model_path;
    std::string data_path;
    std::string out_path;
    std::vector<std::string> keep;
    bool quiet = false;
    bool help = false;
};

namespace detail {
namespace {

// The options of `tenon infer`, in the order --help lists them.
const option_entry<infer_request> infer_options[] = {
    {"--model", "MODEL.tnm",
     "a model saved by tenon train --model (required). The\n"
     "file is checked completely (checksums, version,\n"
     "layout) before anything is predicted.",
     [](infer_request& q, const std::string& v) { q.model_path = file_name("--model", v); }},
    {"--data", "NEW.csv",
     "CSV file with a header row (required). It must hold\n"
     "every column the model reads (tenon inspect lists\n"
     "them), in any order; other columns, the target among\n"
     "them, are ignored. The cells training read as\n"
     "missing (see tenon train --help) read as missing and\n"
     "are filled as in training. The delimiter and decimal\n"
     "commas are told from the file as tenon train tells\n"
     "them.",
     [](infer_request& q, const std::string& v) { q.data_path = file_name("--data", v); }},
    {"--out", "PREDICTIONS.csv",
     "where to write the predictions (required); '-' or\n"
     "/dev/stdout: standard output.",
     [](infer_request& q, const std::string& v) { q.out_path = file_name("--out", v); }},
    {"--keep", "COL,COL",
     "columns of NEW.csv copied unchanged to the front of\n"
     "each output row, e.g. an id (default: none).",
     [](infer_request& q, const std::string& v) {
         q.keep = split_list(v);
         for (std::size_t k = 0; k < q.keep.size(); ++k) {
             if (q.keep[k].empty()) fail(cli_codes::option_value, "--keep '" + v + "': an empty column name");
             for (std::size_t j = 0; j < k; ++j)
                 if (q.keep[j] == q.keep[k]) fail(cli_codes::option_conflict, "--keep names '" + q.keep[k] + "' twice");
         }
     }},
    {"--quiet", nullptr, "print nothing but errors.", [](infer_request& q, const std::string&) { q.quiet = true; }},
};

}  // namespace
}  // namespace detail

/// Reads the arguments after `infer`. Throws cli_failure on a bad command line.
infer_request parse_infer_request(const std::vector<std::string>& args) {
    infer_request q;
    detail::parse_options("infer", args, detail::infer_options, q);
    if (q.help) return q;
    if (q.model_path.empty()) fail(cli_codes::option_missing, "tenon infer needs --model MODEL.tnm");
    if (q.data_path.empty()) fail(cli_codes::option_missing, "tenon infer needs --data FILE.csv");
    if (q.out_path.empty()) fail(cli_codes::option_missing, "tenon infer needs --out PREDICTIONS.csv");
    if (files::same_file(q.out_path, q.data_path)) fail(cli_codes::option_conflict, "--out and --data name the same file '" + q.out_path + "'");
    if (files::same_file(q.out_path, q.model_path)) fail(cli_codes::option_conflict, "--out and --model name the same file '" + q.out_path + "'");
    return q;
}

std::string infer_help() {
    return std::string("tenon infer: predict with a saved model, one output row per input row\n"
                       "\n"
                       "Usage: tenon infer --model MODEL.tnm --data NEW.csv --out PREDICTIONS.csv [options]\n"
                       "\n") +
        detail::options_help(detail::infer_options) + R"(
Output: a CSV file with a header, one row per data row, in the same order
  COL,...          the --keep columns, as read;
  predicted        classification: the most probable class;
                   regression: the predicted target in its original units;
  predicted_low, predicted_high
                   regression with a calibrated model: the band meant to
                   hold the true value for the model's coverage (tenon
                   inspect shows it, e.g. 90%) of rows like the training
                   rows; not promised for a row with out_of_range cells;
  p(CLASS)         classification only: one column per class, in the order
                   tenon inspect lists them; each row sums to 1 (rescaled by
                   the calibration's temperature when the model has one);
  likely_classes   classification with a calibrated model: the classes of
                   the set meant to hold the true class for the model's
                   coverage of such rows, joined by '|' (the most probable
                   class always among them);
  out_of_range     the input cells outside what the training rows held, as
                   COLUMN:below (under the training minimum), COLUMN:above
                   (over the training maximum) or COLUMN:unseen (a category
                   training never saw; it is encoded as all zeros), several
                   joined by ';'; empty when every cell lies inside.
  Numbers are written in the shortest form that reads back to the same value
  in the model's precision (single precision for models of tenon train).

)" + detail::files_help() +
        R"(
Exit status
  0 success; 2 bad command line, model file or data (one line on stderr names
  the problem; a cell that cannot be predicted fails the whole command and is
  named by file, line, column and value); 3 the output could not be written;
  1 an unexpected failure. On failure no --out file is created or changed.
)";
}

// `tenon infer`

namespace detail {

// A CSV field (RFC 4180, section 2: fields with commas, quotes or line
// breaks are quoted, and quotes inside are doubled).
void append_csv_field(std::string& line, std::string_view text) {
    if (text.find_first_of(",\"\r\n") == std::string_view::npos) {
        line.append(text.data(), text.size());
        return;
    }
    line += '"';
    for (char c : text) {
        if (c == '"') line += '"';
        line += c;
    }
    line += '"';
}

template <class T>
void append_number(std::string& line, T v) {
    char buffer[64];
    const auto r = std::to_chars(buffer, buffer + sizeof buffer, v);  // shortest text that reads back exactly
    line.append(buffer, r.ptr);
}

const char* flag_name(tenon::range_flag f) {
    switch (f) {
    case tenon::range_flag::below: return "below";
    case tenon::range_flag::above: return "above";
    case tenon::range_flag::unseen_category: return "unseen";
    case tenon::range_flag::inside: break;
    }
    return "inside";
}

// Without the blanks (spaces, tabs) around it, as the CSV reader trims names.
std::string trimmed(std::string_view s) {
    while (!s.empty() && (s.front() == ' ' || s.front() == '\t')) s.remove_prefix(1);
    while (!s.empty() && (s.back() == ' ' || s.back() == '\t')) s.remove_suffix(1);
    return std::string(s);
}

// The header of a data file: trimmed names, each once.
std::vector<std::string> read_data_header(tenon::csv_record_reader& reader) {
    if (!reader.next()) tenon::raise(tenon::codes::prep_csv_no_header, reader.source() + ": no header row (the input is empty)");
    std::vector<std::string> names;
    for (std::size_t k = 0; k < reader.field_count(); ++k) {
        std::string name = trimmed(reader.field(k));
        if (std::find(names.begin(), names.end(), name) != names.end())
            tenon::raise(tenon::codes::prep_csv_duplicate_column,
                         reader.source() + " line " + std::to_string(reader.line()) + " column " + std::to_string(k + 1) + ": the name '" + name +
                             "' is used twice in the header");
        names.push_back(std::move(name));
    }
    return names;
}

std::size_t position_of(const std::vector<std::string>& names, const std::string& name) {
    return static_cast<std::size_t>(std::find(names.begin(), names.end(), name) - names.begin());
}

template <class T>
int infer_with(const tenon::model_file<T>& file, const infer_request& q, std::ostream& out, pending_output& result) {
    if (!file.plan) fail(cli_codes::model_unusable, q.model_path + ": the model holds no preparation plan, so it cannot read raw rows");
    constexpr std::size_t batch_rows = 64;
    tenon::predictor<T> model(file, batch_rows);
    const std::size_t inputs = model.input_count();

    // The file's delimiter and decimal mark are told from its first rows, as tenon train does.
    const tenon::csv_options dialect = data_dialect(q.data_path, 0, false);
    std::ifstream in(q.data_path, std::ios::binary);
    if (!in) tenon::raise(tenon::codes::prep_file_open, q.data_path + ": cannot open for reading");
    tenon::csv_record_reader reader(in, dialect.delimiter, q.data_path);
    const std::vector<std::string> header = read_data_header(reader);

    // Where each input column and each kept column is in the data.
    std::vector<std::size_t> input_field(inputs), keep_field;
    std::vector<std::string> absent;
    for (std::size_t k = 0; k < inputs; ++k) {
        input_field[k] = position_of(header, model.input_name(k));
        if (input_field[k] == header.size()) absent.push_back("'" + model.input_name(k) + "'");
    }
    if (!absent.empty())
        fail(cli_codes::column_missing,
             q.data_path + ": the model reads " + (absent.size() == 1 ? "column " : "columns ") + join(absent, ", ") +
                 ", which the data does not have (columns: " + column_listing(header) + ")");
    for (const auto& name : q.keep) {
        keep_field.push_back(position_of(header, name));
        if (keep_field.back() == header.size())
            fail(cli_codes::column_unknown,
                 q.data_path + ": --keep names '" + name + "', which is not a column (columns: " + column_listing(header) + ")");
    }

    // A kept column named like an output column would make two columns of
    // one name, which a reader of the CSV cannot tell apart.
    {
        std::vector<std::string> produced{"out_of_range"};
        if (model.is_classification()) {
            produced.push_back("predicted");
            for (const auto& c : model.class_names()) produced.push_back("p(" + c + ")");
            if (model.class_sets()) produced.push_back("likely_classes");
        } else if (model.output_count() == 1) {
            produced.push_back("predicted");
            if (model.interval()) {
                produced.push_back("predicted_low");
                produced.push_back("predicted_high");
            }
        } else {
            for (std::size_t j = 0; j < model.output_count(); ++j) produced.push_back("output_" + std::to_string(j + 1));
        }
        for (const auto& name : q.keep)
            if (std::find(produced.begin(), produced.end(), name) != produced.end())
                fail(cli_codes::option_conflict,
                     "--keep names '" + name + "', which is also a column the predictions write; rename it in " + q.data_path + " or leave it out");
    }
    std::ostream& stream = result.stream();
    std::string line;
    for (const auto& name : q.keep) {
        append_csv_field(line, name);
        line += ',';
    }
    const bool classify = model.is_classification();
    const bool sets = classify && model.class_sets().has_value();
    const bool band = !classify && model.output_count() == 1 && model.interval().has_value();
    if (classify) {
        line += "predicted";
        for (const auto& c : model.class_names()) {
            line += ',';
            append_csv_field(line, "p(" + c + ")");
        }
        if (sets) line += ",likely_classes";
    } else if (model.output_count() == 1) {
        line += band ? "predicted,predicted_low,predicted_high" : "predicted";
    } else {
        for (std::size_t j = 0; j < model.output_count(); ++j) line += (j ? ",output_" : "output_") + std::to_string(j + 1);
    }
    line += ",out_of_range\n";
    stream << line;

    // Rows are predicted in batches; the cells are copied because the
    // reader's views end at its next record.
    std::vector<std::string> cells(batch_rows * inputs), kept(batch_rows * q.keep.size());
    std::vector<std::string_view> views(batch_rows * inputs);
    std::vector<std::size_t> lines(batch_rows);
    std::size_t pending = 0, total = 0, flagged_rows = 0;
    const auto flush = [&] {
        if (pending == 0) return;
        for (std::size_t k = 0; k < pending * inputs; ++k) views[k] = cells[k];
        tenon::prediction_view<T> v;
        const tenon::predict_status s = model.try_predict_cells(views.data(), pending, v);
        if (!s.ok()) {
            const std::string cell = s.row < pending && s.column < inputs ? cells[s.row * inputs + s.column] : std::string();
            std::string what;
            switch (s.code) {
            case tenon::input_status::not_numeric:
                what = "'" + cell + "' is not a finite " +
                    (file.plan->feature_kind(model.input_name(s.column)) == tenon::column_kind::datetime ? "date/time" : "number");
                break;
            case tenon::input_status::missing_value: what = "the cell is missing and the model has no fill value for the column"; break;
            case tenon::input_status::unseen_category: what = "'" + cell + "' is a category the training rows did not hold"; break;
            case tenon::input_status::non_finite:
                what = "'" + cell + "' is beyond what the model computes with (its prepared value is not finite)";
                break;
            default: tenon::raise(s.code_text(), model.describe(s, pending));
            }
            tenon::raise(s.code_text(),
                         q.data_path + " line " + std::to_string(lines[s.row]) + " column " + std::to_string(input_field[s.column] + 1) + " ('" +
                             model.input_name(s.column) + "'): " + what);
        }
        for (std::size_t i = 0; i < pending; ++i) {
            line.clear();
            for (std::size_t j = 0; j < q.keep.size(); ++j) {
                append_csv_field(line, kept[i * q.keep.size() + j]);
                line += ',';
            }
            if (classify) {
                append_csv_field(line, model.class_names()[v.best_class(i)]);
                for (std::size_t j = 0; j < v.width; ++j) {
                    line += ',';
                    append_number(line, v.at(i, j));
                }
                if (sets) {
                    std::string likely;
                    for (std::size_t j = 0; j < v.width; ++j)
                        if (v.in_set(i, j)) likely += (likely.empty() ? "" : "|") + model.class_names()[j];
                    line += ',';
                    append_csv_field(line, likely);
                }
            } else {
                for (std::size_t j = 0; j < v.width; ++j) {
                    if (j) line += ',';
                    append_number(line, v.at(i, j));
                }
                if (band) {
                    line += ',';
                    append_number(line, v.low_at(i, 0));
                    line += ',';
                    append_number(line, v.high_at(i, 0));
                }
            }
            line += ',';
            std::string flags;
            for (std::size_t k = 0; k < inputs; ++k) {
                const tenon::range_flag f = v.flag(i, k);
                if (f == tenon::range_flag::inside) continue;
                flags += (flags.empty() ? "" : ";") + model.input_name(k) + ":" + flag_name(f);
            }
            flagged_rows += flags.empty() ? 0 : 1;
            append_csv_field(line, flags);
            line += '\n';
            stream << line;
        }
        total += pending;
        pending = 0;
    };
    while (reader.next()) {
        if (reader.field_count() != header.size())
            tenon::raise(tenon::codes::prep_csv_ragged,
                         q.data_path + " line " + std::to_string(reader.line()) + ": expected " + std::to_string(header.size()) + " fields, found " +
                             std::to_string(reader.field_count()));
        for (std::size_t k = 0; k < inputs; ++k) {
            std::string& cell = cells[pending * inputs + k];
            cell.assign(reader.field(input_field[k]));
            // The predictor reads decimal points: a decimal comma becomes one.
            double value = 0;
            if (dialect.decimal_comma && file.plan->feature_kind(model.input_name(k)) == tenon::column_kind::numeric &&
                tenon::parse_decimal_comma_number(cell, value))
                std::replace(cell.begin(), cell.end(), ',', '.');
        }
        for (std::size_t j = 0; j < q.keep.size(); ++j) kept[pending * q.keep.size() + j].assign(reader.field(keep_field[j]));
        lines[pending] = reader.line();
        if (++pending == batch_rows) flush();
    }
    flush();
    result.finish_stream();
    const bool on_standard_output = result.to_standard_output();
    result.commit();
    if (!q.quiet && !on_standard_output)
        out << "predicted " << total << (total == 1 ? " row" : " rows") << " (" << flagged_rows << " with inputs outside the training range) into "
            << q.out_path << "\n";
    return exit_success;
}

}  // namespace detail

int run_infer(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env) {
    (void)err;
    (void)env;
    const infer_request q = parse_infer_request(args);
    if (q.help) {
        out << infer_help();
        return exit_success;
    }
    // Every file is checked, by identity, before anything is read.
    files::file_roster roster;
    roster.input("--model", q.model_path, files::check_input(tenon::codes::deploy_file_io, "--model", q.model_path));
    roster.input("--data", q.data_path, files::check_input(tenon::codes::prep_file_open, "--data", q.data_path));
    pending_output result("--out", q.out_path, &out);
    roster.output("--out", result);
    roster.check();
    // The whole file is checked (inspect) before a scalar type is chosen.
    const tenon::model_limits limits;
    const std::vector<std::uint8_t> bytes = tenon::read_file_bounded(q.model_path, limits.max_file_bytes);
    const tenon::model_file_summary summary = tenon::inspect_model_bytes(bytes, limits, q.model_path);
    if (summary.scalar_bytes == 8) return detail::infer_with(tenon::model_file_from_bytes<double>(bytes, limits, q.model_path), q, out, result);
    return detail::infer_with(tenon::model_file_from_bytes<float>(bytes, limits, q.model_path), q, out, result);
}

}  // namespace tenon_cli
