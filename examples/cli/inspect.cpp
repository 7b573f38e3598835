// `tenon inspect`: a saved model described as text or JSON.
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

struct inspect_request {
    std::string model_path;
    bool json = false;
    bool help = false;
};

namespace detail {
namespace {

// The options of `tenon inspect`, in the order --help lists them.
const option_entry<inspect_request> inspect_options[] = {
    {"--model", "MODEL.tnm",
     "the model file (required). It is checked completely\n"
     "(checksums, version, layout) first.",
     [](inspect_request& q, const std::string& v) { q.model_path = file_name("--model", v); }},
    {"--json", nullptr, "print the description as JSON instead of text.", [](inspect_request& q, const std::string&) { q.json = true; }},
};

}  // namespace
}  // namespace detail

inspect_request parse_inspect_request(const std::vector<std::string>& args) {
    inspect_request q;
    detail::parse_options("inspect", args, detail::inspect_options, q);
    if (!q.help && q.model_path.empty()) fail(cli_codes::option_missing, "tenon inspect needs --model MODEL.tnm");
    return q;
}

std::string inspect_help() {
    return std::string("tenon inspect: describe a saved model\n"
                       "\n"
                       "Usage: tenon inspect --model MODEL.tnm [--json]\n"
                       "\n") +
        detail::options_help(detail::inspect_options) + R"(
Prints the file's format version and sections; provenance (creation time in
UTC, library version, seed, epochs, row counts, the training data's
fingerprint); the target and its classes; every input column with its kind,
categories, preparation and the range of the training rows; the network's
layers with their sizes and its parameter count; the validation and test
scores and the training settings; the calibration (band or temperature and
class sets, with their nominal coverage), or that the file carries none.

Exit status
  0 success; 2 bad command line or an unreadable or damaged model file (one
  line on stderr names the problem); 1 an unexpected failure.
)";
}

// `tenon inspect`

namespace detail {

std::string hex64(std::uint64_t v) {
    char buffer[32];
    std::snprintf(buffer, sizeof buffer, "0x%016llx", static_cast<unsigned long long>(v));
    return buffer;
}

std::string byte_size(std::uint64_t bytes) {
    if (bytes < 10240) return std::to_string(bytes) + " bytes";
    if (bytes < 10u * 1024 * 1024) return fixed(static_cast<double>(bytes) / 1024.0, 1) + " KiB";
    return fixed(static_cast<double>(bytes) / (1024.0 * 1024.0), 1) + " MiB";
}

// A value of a numeric or date/time column, as text.
std::string column_value(tenon::column_kind kind, double v) {
    return kind == tenon::column_kind::datetime ? utc_text(static_cast<std::int64_t>(std::floor(v))) : significant(v);
}

std::string list_head(const std::vector<std::string>& items, std::size_t shown, const char* noun) {
    std::string s;
    for (std::size_t k = 0; k < std::min(shown, items.size()); ++k) s += (k ? ", " : "") + items[k];
    if (items.size() > shown) s += ", ... (" + std::to_string(items.size()) + " " + noun + ")";
    return s;
}

const char* unseen_text(tenon::unseen_policy p) {
    switch (p) {
    case tenon::unseen_policy::fail: return "refused";
    case tenon::unseen_policy::all_zero: return "all zeros";
    case tenon::unseen_policy::other_slot: return "an 'other' slot";
    }
    return "?";
}

const tenon::feature_reference* reference_of(const tenon::model_file_summary& m, const std::string& column) {
    for (const auto& r : m.references)
        if (r.column == column) return &r;
    return nullptr;
}

// One line per layer, nested layers indented: "name  kind  details".
void describe_layers(const tenon::layer_record& r, std::size_t depth, std::string& out) {
    for (const auto& l : r.children) {
        std::string details;
        if (l.kind == "dense") {
            details = significant(l.number("inputs")) + " -> " + significant(l.number("outputs")) +
                (l.has("bias") && l.number("bias") == 0 ? ", no bias" : "");
        } else if (l.kind == "activation" && l.has("function")) {
            for (const auto& t : l.texts)
                if (t.first == "function") details = t.second;
            if (l.has("coefficient") && l.number("coefficient") != 0) details += " (coefficient " + significant(l.number("coefficient")) + ")";
        } else {
            for (const auto& t : l.texts) details += (details.empty() ? "" : ", ") + t.first + " " + t.second;
            for (const auto& n : l.numbers) details += (details.empty() ? "" : ", ") + n.first + " " + significant(n.second);
        }
        char buffer[160];
        std::snprintf(buffer, sizeof buffer, "  %*s%-16s %-12s ", static_cast<int>(2 * depth), "", l.name.c_str(), l.kind.c_str());
        out += buffer + details + "\n";
        if (!l.children.empty()) describe_layers(l, depth + 1, out);
    }
}

void layers_json(json_writer& j, const tenon::layer_record& r) {
    j.open_array("layers");
    for (const auto& l : r.children) {
        j.open_object();
        j.text("name", l.name).text("kind", l.kind);
        for (const auto& t : l.texts) j.text(t.first.c_str(), t.second);
        for (const auto& n : l.numbers) j.number(n.first.c_str(), n.second);
        if (!l.children.empty()) layers_json(j, l);
        j.close_object();
    }
    j.close_array();
}

std::string fill_text(const tenon::fill_value& f, tenon::column_kind kind) {
    switch (f.method) {
    case tenon::fill_method::none: return "refused";
    case tenon::fill_method::mode: return "mode '" + f.text + "'";
    case tenon::fill_method::constant:
        return kind == tenon::column_kind::categorical ? "constant '" + f.text + "'" : "constant " + column_value(kind, f.number);
    default: return std::string(tenon::to_string(f.method)) + " " + column_value(kind, f.number);
    }
}

std::string metadata_setting(const tenon::training_metadata& t, const char* key) {
    for (const auto& kv : t.settings)
        if (kv.first == key) return kv.second;
    return std::string();
}

// "tenon train", or "retraining 2 (promoted over the weights before it)".
std::string made_by(const tenon::training_metadata& t) {
    if (metadata_setting(t, "origin") != "retraining") return "training";
    const double n = t.metric("retrainings");
    return "retraining" + (std::isfinite(n) ? " " + significant(n) : std::string()) + " (promoted over the weights before it)";
}

std::string inspect_text(const tenon::model_file_summary& m, const std::string& path) {
    std::string s = path + "\n";
    std::vector<std::string> ids;
    for (const auto& sec : m.sections) ids.push_back(sec.id);
    s += "  tenon model file, format version " + std::to_string(m.format_version) + ", " + (m.scalar_bytes == 8 ? "double" : "float") + " weights, " +
        byte_size(m.file_bytes) + "; sections " + join(ids, " ") + "\n";
    s += "  replay sample: " + std::to_string(m.replay_rows) + " training rows; resumable: " + (m.resumable ? "yes" : "no") + "\n";

    if (m.metadata) {
        const tenon::training_metadata& t = *m.metadata;
        s += "\nProvenance of the current weights\n";
        s += "  made by      " + made_by(t) + "\n";
        s += "  created      " + utc_text(t.created_unix_seconds) + "\n";
        s += "  library      tenon " + t.library_version + "\n";
        const std::string data = metadata_setting(t, "data");
        s += "  data         " + (data.empty() ? std::string() : data + ", ") + "fingerprint " + hex64(t.data_fingerprint) + "\n";
        if (metadata_setting(t, "origin") == "retraining") {
            s += "  rows         " + std::to_string(t.training_rows) + " training (" + significant(t.metric("new_training_rows")) + " new, " +
                significant(t.metric("replay_training_rows")) + " from the replay sample), " + std::to_string(t.validation_rows) + " validation, " +
                significant(t.metric("gate_holdout_rows")) + " new rows held out for the gate, " + std::to_string(t.dropped_rows) +
                " new rows refused\n";
            s += "  gate         " + metadata_setting(t, "gate_metric") + " " + significant(t.metric("gate_candidate_score")) +
                " against the replaced weights' " + significant(t.metric("gate_incumbent_score")) + " on the held-out new rows\n";
        } else {
            s += "  rows         " + std::to_string(t.training_rows) + " training, " + std::to_string(t.validation_rows) + " validation, " +
                std::to_string(t.dropped_rows) + " dropped for a missing target\n";
        }
        s += "  seed         " + std::to_string(t.seed) + "\n";
        s += "  epochs       " + std::to_string(t.epochs_run) + " run of " + std::to_string(t.epochs_planned) + ", best " +
            std::to_string(t.best_epoch) + ", stopped: " + t.stop_reason + "; " + std::to_string(t.steps) + " steps; loss " + t.loss + "\n";
    }

    if (m.plan) {
        const tenon::measured_plan& p = *m.plan;
        s += "\nTarget\n";
        if (!p.has_target()) {
            s += "  none (the network's outputs are given as they are)\n";
        } else if (p.target_type() == tenon::target_kind::classification) {
            s += "  " + p.target_name() + ": classification into " + std::to_string(p.class_count()) +
                " classes: " + list_head(p.class_names(), 50, "classes") + "\n";
        } else {
            const tenon::scaling& ts = p.target_scaling();
            s += "  " + p.target_name() + ": regression; trained on the " + tenon::to_string(ts.method) + "-scaled target (centre " +
                significant(ts.center) + ", spread " + significant(ts.spread) + "), predicted in its original units\n";
        }
        s += "\nInputs: " + std::to_string(p.input_columns().size()) + " columns -> " + std::to_string(p.feature_count()) + " features\n";
        for (const auto& name : p.input_columns()) {
            const tenon::column_kind kind = p.feature_kind(name);
            s += "  " + name + " (" + tenon::to_string(kind) + ")\n";
            std::string prep = "missing -> " + fill_text(p.feature_fill(name), kind);
            if (p.feature_has_indicator(name)) prep += ", with a missing indicator";
            if (kind == tenon::column_kind::categorical) {
                const tenon::one_hot_layout& h = p.feature_categories(name);
                s += "    categories   " + list_head(h.categories(), 20, "categories") + "\n";
                prep += "; one-hot, unseen -> " + std::string(unseen_text(h.policy()));
            } else {
                const tenon::scaling& c = p.feature_scaling(name);
                const tenon::time_encoding encoding =
                    kind == tenon::column_kind::datetime ? p.feature_time_encoding(name) : tenon::time_encoding::value;
                if (encoding != tenon::time_encoding::cycles)
                    prep += "; " + std::string(tenon::to_string(c.method)) + " (centre " + significant(c.center) + ", spread " +
                        significant(c.spread) + ")";
                if (kind == tenon::column_kind::datetime) {
                    const tenon::time_format form = p.feature_time_form(name);
                    s += "    time form    " +
                        (form == tenon::time_format::detect ? std::string("any of YYYY-MM-DD, YYYY/MM/DD, DD.MM.YYYY")
                                                            : std::string(tenon::to_string(form))) +
                        "\n";
                    if (encoding != tenon::time_encoding::value)
                        prep += std::string(encoding == tenon::time_encoding::cycles ? "; only" : ";") +
                            " hour of day, day of week, day of year as sine/cosine pairs";
                }
            }
            s += "    preparation  " + prep + "\n";
            if (const tenon::feature_reference* r = reference_of(m, name)) {
                std::string seen;
                if (kind == tenon::column_kind::categorical) {
                    std::vector<std::string> counts;
                    for (const auto& c : r->categories) counts.push_back(c.first + " " + std::to_string(c.second));
                    seen = list_head(counts, 20, "categories");
                } else if (r->present > 0) {
                    seen = column_value(kind, r->minimum) + " .. " + column_value(kind, r->maximum);
                    if (r->deciles.size() == 11) seen += ", median " + column_value(kind, r->deciles[5]);
                }
                s += "    training     " + seen + (seen.empty() ? "" : "; ") + std::to_string(r->present) + " present, " +
                    std::to_string(r->missing) + " missing\n";
            }
        }
    }

    s += "\nNetwork: " + std::to_string(m.architecture.children.size()) + " layers, " + std::to_string(m.parameter_values) + " parameter values\n";
    describe_layers(m.architecture, 0, s);

    s += "\nCalibration\n";
    if (!m.calibration) {
        s += "  none: the file carries no calibration (written by tenon train before format version 2, or without validation rows)\n";
    } else {
        if (const auto& i = m.calibration->interval) {
            s += "  band         split-conformal, nominal coverage " + significant(i->coverage) + ", from " + std::to_string(i->rows) +
                " calibration rows\n";
            s += "  half width   " +
                (std::isfinite(i->half_width) ? significant(i->half_width) : std::string("infinite (too few rows for the coverage)")) +
                " in the target's units" +
                (i->has_spread ? "; normalized: " + significant(i->spread_quantile) + " x (spread + " + significant(i->spread_floor) +
                         ") when a spread is given"
                               : std::string()) +
                "\n";
        }
        if (const auto& k = m.calibration->classes) {
            s += "  classes      temperature " + significant(k->temperature) + " (fitted on the validation log loss), from " +
                std::to_string(k->rows) + " calibration rows\n";
            s += "  class sets   nominal coverage " + significant(k->coverage) + "; a class joins when 1 - p <= " +
                (std::isfinite(k->set_threshold) ? significant(k->set_threshold) : std::string("infinity (every class)")) + "\n";
        }
        s += "  The coverage is promised for rows like the training rows; not for rows with cells out of range or under drift.\n";
    }

    if (m.metadata) {
        s += "\nScores and training metrics\n";
        for (const auto& kv : m.metadata->metrics) {
            char buffer[96];
            std::snprintf(buffer, sizeof buffer, "  %-24s ", kv.first.c_str());
            s += buffer + significant(kv.second) + "\n";
        }
        s += "\nSettings\n";
        for (const auto& kv : m.metadata->settings) {
            char buffer[96];
            std::snprintf(buffer, sizeof buffer, "  %-24s ", kv.first.c_str());
            s += buffer + kv.second + "\n";
        }
    }
    if (!m.history.empty()) {
        s += "\nHistory: " + std::to_string(m.history.size()) + " earlier " + (m.history.size() == 1 ? "training" : "trainings") +
            " whose weights were replaced, oldest first\n";
        for (std::size_t k = 0; k < m.history.size(); ++k) {
            const tenon::training_metadata& t = m.history[k];
            const std::string data = metadata_setting(t, "data");
            s += "  " + std::to_string(k + 1) + ". " + utc_text(t.created_unix_seconds) + ", " + made_by(t) + ", data " +
                (data.empty() ? std::string() : data + ", ") + "fingerprint " + hex64(t.data_fingerprint) + ", " + std::to_string(t.training_rows) +
                " training rows\n";
            std::vector<std::string> scores;
            for (const auto& kv : t.metrics) scores.push_back(kv.first + " " + significant(kv.second));
            if (!scores.empty()) s += "     " + join(scores, ", ") + "\n";
        }
    }
    return s;
}

std::string inspect_json(const tenon::model_file_summary& m, const std::string& path) {
    json_writer j;
    j.open_object();
    j.text("file", path)
        .count("format_version", m.format_version)
        .text("scalar", m.scalar_bytes == 8 ? "double" : "float")
        .count("bytes", m.file_bytes);
    j.open_array("sections");
    for (const auto& sec : m.sections) j.open_object().text("id", sec.id).count("bytes", sec.length).close_object();
    j.close_array();
    j.count("replay_rows", m.replay_rows);
    j.boolean("resumable", m.resumable);
    if (m.metadata) {
        const tenon::training_metadata& t = *m.metadata;
        j.open_object("provenance");
        j.text("created", utc_text(t.created_unix_seconds)).number("created_unix_seconds", static_cast<double>(t.created_unix_seconds));
        j.text("library_version", t.library_version).text("data_fingerprint", hex64(t.data_fingerprint)).count("seed", t.seed);
        j.count("epochs_planned", t.epochs_planned).count("epochs_run", t.epochs_run).count("best_epoch", t.best_epoch).count("steps", t.steps);
        j.count("training_rows", t.training_rows).count("validation_rows", t.validation_rows).count("dropped_rows", t.dropped_rows);
        j.text("stop_reason", t.stop_reason).text("loss", t.loss);
        j.text("origin", metadata_setting(t, "origin").empty() ? "training" : metadata_setting(t, "origin"));
        j.text("data", metadata_setting(t, "data"));
        j.close_object();
    } else {
        j.null("provenance");
    }
    j.open_array("history");
    for (const auto& t : m.history) {
        j.open_object();
        j.text("created", utc_text(t.created_unix_seconds)).text("library_version", t.library_version);
        j.text("origin", metadata_setting(t, "origin").empty() ? "training" : metadata_setting(t, "origin"));
        j.text("data", metadata_setting(t, "data")).text("data_fingerprint", hex64(t.data_fingerprint)).count("seed", t.seed);
        j.count("training_rows", t.training_rows).count("validation_rows", t.validation_rows).count("dropped_rows", t.dropped_rows);
        j.open_object("metrics");
        for (const auto& kv : t.metrics) j.number(kv.first.c_str(), kv.second);
        j.close_object();
        j.open_object("settings");
        for (const auto& kv : t.settings) j.text(kv.first.c_str(), kv.second);
        j.close_object();
        j.close_object();
    }
    j.close_array();
    if (m.plan) {
        const tenon::measured_plan& p = *m.plan;
        j.open_object("target");
        if (p.has_target()) {
            j.text("column", p.target_name());
            j.text("task", p.target_type() == tenon::target_kind::classification ? "classification" : "regression");
            if (p.target_type() == tenon::target_kind::classification) {
                j.open_array("classes");
                for (const auto& c : p.class_names()) j.text(nullptr, c);
                j.close_array();
            }
        }
        j.close_object();
        j.count("features", p.feature_count());
        j.open_array("inputs");
        for (const auto& name : p.input_columns()) {
            const tenon::column_kind kind = p.feature_kind(name);
            j.open_object().text("column", name).text("kind", tenon::to_string(kind));
            j.text("fill", fill_text(p.feature_fill(name), kind));
            j.boolean("missing_indicator", p.feature_has_indicator(name));
            if (kind == tenon::column_kind::categorical) {
                j.open_array("categories");
                for (const auto& c : p.feature_categories(name).categories()) j.text(nullptr, c);
                j.close_array();
                j.text("unseen", unseen_text(p.feature_categories(name).policy()));
            } else {
                const tenon::scaling& c = p.feature_scaling(name);
                j.text("scaling", tenon::to_string(c.method)).number("centre", c.center).number("spread", c.spread);
                if (kind == tenon::column_kind::datetime) {
                    const tenon::time_encoding encoding = p.feature_time_encoding(name);
                    j.text("time_format", tenon::to_string(p.feature_time_form(name)));
                    j.text("time_features",
                           encoding == tenon::time_encoding::value        ? "stamp"
                               : encoding == tenon::time_encoding::cycles ? "cycles"
                                                                          : "stamp and cycles");
                }
            }
            if (const tenon::feature_reference* r = reference_of(m, name)) {
                j.open_object("training").count("present", r->present).count("missing", r->missing);
                if (kind == tenon::column_kind::categorical) {
                    j.open_object("counts");
                    for (const auto& c : r->categories) j.count(c.first.c_str(), c.second);
                    j.close_object();
                } else if (r->present > 0) {
                    j.number("minimum", r->minimum).number("maximum", r->maximum);
                }
                j.close_object();
            }
            j.close_object();
        }
        j.close_array();
    }
    j.open_object("network").count("parameter_values", m.parameter_values);
    layers_json(j, m.architecture);
    j.close_object();
    if (m.calibration)
        write_calibration(j, "calibration", *m.calibration);
    else
        j.null("calibration");
    if (m.metadata) {
        j.open_object("metrics");
        for (const auto& kv : m.metadata->metrics) j.number(kv.first.c_str(), kv.second);
        j.close_object();
        j.open_object("settings");
        for (const auto& kv : m.metadata->settings) j.text(kv.first.c_str(), kv.second);
        j.close_object();
    }
    j.close_object();
    return j.finish();
}

}  // namespace detail

int run_inspect(const std::vector<std::string>& args, std::ostream& out, std::ostream& err, const cli_environment& env) {
    (void)err;
    (void)env;
    const inspect_request q = parse_inspect_request(args);
    if (q.help) {
        out << inspect_help();
        return exit_success;
    }
    files::check_input(tenon::codes::deploy_file_io, "--model", q.model_path);
    const tenon::model_file_summary m = tenon::inspect_model_file(q.model_path);
    out << (q.json ? detail::inspect_json(m, q.model_path) : detail::inspect_text(m, q.model_path));
    return exit_success;
}

}  // namespace tenon_cli
