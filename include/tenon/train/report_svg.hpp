// tenon: a self-contained SVG report of a training run.
//
// Panels: training and validation loss per epoch; for classification the test
// confusion matrix as a row-normalized heat map (heat_colour); with a
// calibration, predictions against truth with their bands (regression) or a
// reliability diagram before and after temperature scaling (Guo et al. 2017,
// figure 1). No scripts, fonts or styles from outside: the file opens in any
// browser and can be archived beside the model. The panels in detail:
// docs/design/evaluation.md.
#pragma once

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <string>
#include <vector>

#include "tenon/train/metrics.hpp"

TENON_NAMESPACE_BEGIN

struct report_curve_point {
    double training_loss = 0.0;
    double validation_loss = 0.0;  // NaN when there was no validation
};

struct report_content {
    std::string title;
    std::vector<report_curve_point> epochs;
    std::size_t kept_epoch = 0;  // 1-based; 0 = none marked
    const confusion_matrix* confusion = nullptr;  // classification only
    std::vector<std::string> class_names;  // labels for the heat map
    /// Regression with a band: test rows as (predicted, actual, low, high).
    struct band_point {
        double predicted = 0.0, actual = 0.0, low = 0.0, high = 0.0;
    };
    std::vector<band_point> bands;
    /// Classification with calibration: reliability bins of the test rows
    /// before (raw softmax) and after temperature scaling.
    std::vector<reliability_bin> reliability_raw, reliability_calibrated;
    /// The calibration's nominal coverage and the test rows' coverage, for the legend.
    double nominal_coverage = 0.0, test_coverage = 0.0;
};

namespace detail {

/// The heat map's fill for a share in [0, 1] as "#rrggbb": tenon's own scale,
/// from pale parchment (245, 241, 230) at 0 through ochre (214, 150, 62) at
/// 0.5 to dark umber (90, 35, 30) at 1, linear in each half. Its relative
/// luminance (0.2126 R + 0.7152 G + 0.0722 B, ITU-R BT.709) falls from 241
/// through 157 to 46, so the shading also reads when printed in grey.
inline std::string heat_colour(double share) {
    static const int stops[3][3] = {{245, 241, 230}, {214, 150, 62}, {90, 35, 30}};
    const double s = std::isfinite(share) ? std::min(1.0, std::max(0.0, share)) : 0.0;
    const int half = s < 0.5 ? 0 : 1;
    const double f = s < 0.5 ? s / 0.5 : (s - 0.5) / 0.5;
    int channel[3];
    for (int c = 0; c < 3; ++c) channel[c] = static_cast<int>(std::lround(stops[half][c] + f * (stops[half + 1][c] - stops[half][c])));
    char text[16];
    std::snprintf(text, sizeof text, "#%02x%02x%02x", channel[0], channel[1], channel[2]);
    return text;
}

inline std::string svg_escape(const std::string& s) {
    std::string out;
    out.reserve(s.size());
    for (char c : s) {
        switch (c) {
        case '&': out += "&amp;"; break;
        case '<': out += "&lt;"; break;
        case '>': out += "&gt;"; break;
        case '"': out += "&quot;"; break;
        default: out += c;
        }
    }
    return out;
}

inline std::string svg_number(double v, int precision = 4) {
    char buf[64];
    std::snprintf(buf, sizeof buf, "%.*g", precision, v);
    return buf;
}

inline std::string svg_fixed(double v) {
    char buf[64];
    std::snprintf(buf, sizeof buf, "%.1f", v);
    return buf;
}

// Loss curves in a box at (x0, y0) of size w x h.
inline void svg_loss_panel(std::string& s, const report_content& r, double x0, double y0, double w, double h) {
    const double left = x0 + 60, right = x0 + w - 20, top = y0 + 30, bottom = y0 + h - 40;
    s += "<text x=\"" + svg_fixed(x0 + w / 2) + "\" y=\"" + svg_fixed(y0 + 18) +
        "\" text-anchor=\"middle\" font-size=\"14\" font-weight=\"bold\">Loss per epoch</text>\n";
    double lo = INFINITY, hi = -INFINITY;
    for (const auto& p : r.epochs) {
        for (double v : {p.training_loss, p.validation_loss}) {
            if (std::isfinite(v)) {
                lo = std::min(lo, v);
                hi = std::max(hi, v);
            }
        }
    }
    if (!(lo <= hi)) {
        lo = 0;
        hi = 1;
    }
    if (hi - lo < 1e-12) {
        hi = lo + 1;
    }
    const double pad = 0.05 * (hi - lo);
    lo -= pad;
    hi += pad;
    const std::size_t n = r.epochs.size();
    auto px = [&](std::size_t i) {
        return n <= 1 ? (left + right) / 2 : left + (right - left) * static_cast<double>(i) / static_cast<double>(n - 1);
    };
    auto py = [&](double v) { return bottom - (bottom - top) * (v - lo) / (hi - lo); };
    s += "<rect x=\"" + svg_fixed(left) + "\" y=\"" + svg_fixed(top) + "\" width=\"" + svg_fixed(right - left) + "\" height=\"" +
        svg_fixed(bottom - top) + "\" fill=\"none\" stroke=\"#888\"/>\n";
    for (int t = 0; t <= 4; ++t) {
        const double v = lo + (hi - lo) * t / 4.0;
        s += "<text x=\"" + svg_fixed(left - 6) + "\" y=\"" + svg_fixed(py(v) + 4) + "\" text-anchor=\"end\" font-size=\"10\">" + svg_number(v, 3) +
            "</text>\n";
        s += "<line x1=\"" + svg_fixed(left) + "\" x2=\"" + svg_fixed(right) + "\" y1=\"" + svg_fixed(py(v)) + "\" y2=\"" + svg_fixed(py(v)) +
            "\" stroke=\"#eee\"/>\n";
    }
    const std::size_t ticks = std::min<std::size_t>(n, 6);
    for (std::size_t t = 0; t < ticks; ++t) {
        const std::size_t i = ticks <= 1 ? 0 : t * (n - 1) / (ticks - 1);
        s += "<text x=\"" + svg_fixed(px(i)) + "\" y=\"" + svg_fixed(bottom + 14) + "\" text-anchor=\"middle\" font-size=\"10\">" +
            std::to_string(i + 1) + "</text>\n";
    }
    s += "<text x=\"" + svg_fixed((left + right) / 2) + "\" y=\"" + svg_fixed(bottom + 30) +
        "\" text-anchor=\"middle\" font-size=\"11\">epoch</text>\n";
    auto polyline = [&](bool validation, const char* colour) {
        std::string pts;
        for (std::size_t i = 0; i < n; ++i) {
            const double v = validation ? r.epochs[i].validation_loss : r.epochs[i].training_loss;
            if (!std::isfinite(v)) continue;
            pts += svg_fixed(px(i)) + "," + svg_fixed(py(v)) + " ";
        }
        if (!pts.empty()) s += "<polyline fill=\"none\" stroke=\"" + std::string(colour) + "\" stroke-width=\"2\" points=\"" + pts + "\"/>\n";
    };
    polyline(false, "#1f5fa8");
    polyline(true, "#d9731a");
    if (r.kept_epoch >= 1 && r.kept_epoch <= n) {
        const double x = px(r.kept_epoch - 1);
        s += "<line x1=\"" + svg_fixed(x) + "\" x2=\"" + svg_fixed(x) + "\" y1=\"" + svg_fixed(top) + "\" y2=\"" + svg_fixed(bottom) +
            "\" stroke=\"#555\" stroke-dasharray=\"4 3\"/>\n";
        s += "<text x=\"" + svg_fixed(x + 4) + "\" y=\"" + svg_fixed(bottom - 6) + "\" font-size=\"10\">kept: epoch " + std::to_string(r.kept_epoch) +
            "</text>\n";
    }
    const double lx = right - 150, ly = top + 8;
    s += "<rect x=\"" + svg_fixed(lx) + "\" y=\"" + svg_fixed(ly) + "\" width=\"140\" height=\"38\" fill=\"white\" stroke=\"#ccc\"/>\n";
    s += "<line x1=\"" + svg_fixed(lx + 8) + "\" x2=\"" + svg_fixed(lx + 30) + "\" y1=\"" + svg_fixed(ly + 12) + "\" y2=\"" + svg_fixed(ly + 12) +
        "\" stroke=\"#1f5fa8\" stroke-width=\"2\"/><text x=\"" + svg_fixed(lx + 36) + "\" y=\"" + svg_fixed(ly + 16) +
        "\" font-size=\"11\">training</text>\n";
    s += "<line x1=\"" + svg_fixed(lx + 8) + "\" x2=\"" + svg_fixed(lx + 30) + "\" y1=\"" + svg_fixed(ly + 28) + "\" y2=\"" + svg_fixed(ly + 28) +
        "\" stroke=\"#d9731a\" stroke-width=\"2\"/><text x=\"" + svg_fixed(lx + 36) + "\" y=\"" + svg_fixed(ly + 32) +
        "\" font-size=\"11\">validation</text>\n";
}

inline void svg_confusion_panel(std::string& s, const report_content& r, double x0, double y0, double size) {
    const confusion_matrix& cm = *r.confusion;
    const std::size_t k = cm.class_count();
    s += "<text x=\"" + svg_fixed(x0 + size / 2) + "\" y=\"" + svg_fixed(y0 + 18) +
        "\" text-anchor=\"middle\" font-size=\"14\" font-weight=\"bold\">Confusion matrix (test)</text>\n";
    if (k == 0) return;
    const double left = x0 + 110, top = y0 + 130;
    const double cell = std::min(40.0, (size - 140) / static_cast<double>(k));
    auto name = [&](std::size_t c) {
        std::string n = c < r.class_names.size() ? r.class_names[c] : std::to_string(c);
        if (n.size() > 14) n = n.substr(0, 13) + "~";
        return svg_escape(n);
    };
    s += "<text x=\"" + svg_fixed(left + cell * static_cast<double>(k) / 2) + "\" y=\"" + svg_fixed(y0 + 44) +
        "\" text-anchor=\"middle\" font-size=\"11\">predicted class</text>\n";
    s += "<text x=\"" + svg_fixed(x0 + 12) + "\" y=\"" + svg_fixed(top + cell * static_cast<double>(k) / 2) +
        "\" font-size=\"11\" transform=\"rotate(-90 " + svg_fixed(x0 + 12) + " " + svg_fixed(top + cell * static_cast<double>(k) / 2) +
        ")\" text-anchor=\"middle\">true class</text>\n";
    for (std::size_t i = 0; i < k; ++i) {
        std::size_t row_total = 0;
        for (std::size_t j = 0; j < k; ++j) row_total += cm.count(i, j);
        s += "<text x=\"" + svg_fixed(left - 6) + "\" y=\"" + svg_fixed(top + cell * (static_cast<double>(i) + 0.6)) +
            "\" text-anchor=\"end\" font-size=\"10\">" + name(i) + "</text>\n";
        for (std::size_t j = 0; j < k; ++j) {
            const std::size_t c = cm.count(i, j);
            const double share = row_total ? static_cast<double>(c) / static_cast<double>(row_total) : 0.0;
            const std::string fill = heat_colour(share);
            const double x = left + cell * static_cast<double>(j), y = top + cell * static_cast<double>(i);
            s += "<rect x=\"" + svg_fixed(x) + "\" y=\"" + svg_fixed(y) + "\" width=\"" + svg_fixed(cell) + "\" height=\"" + svg_fixed(cell) +
                "\" fill=\"" + fill + "\" stroke=\"#fff\"/>\n";
            s += "<text x=\"" + svg_fixed(x + cell / 2) + "\" y=\"" + svg_fixed(y + cell / 2 + 4) + "\" text-anchor=\"middle\" font-size=\"" +
                (cell < 30 ? "8" : "10") + "\" fill=\"" + (share > 0.5 ? "white" : "black") + "\">" + std::to_string(c) + "</text>\n";
        }
    }
    for (std::size_t j = 0; j < k; ++j) {
        const double x = left + cell * (static_cast<double>(j) + 0.5), y = top - 6;
        s += "<text x=\"" + svg_fixed(x) + "\" y=\"" + svg_fixed(y) + "\" font-size=\"10\" transform=\"rotate(-45 " + svg_fixed(x) + " " +
            svg_fixed(y) + ")\">" + name(j) + "</text>\n";
    }
}

// Test rows' true values against predictions, each with its band.
inline void svg_band_panel(std::string& s, const report_content& r, double x0, double y0, double w, double h) {
    const double left = x0 + 60, right = x0 + w - 20, top = y0 + 30, bottom = y0 + h - 40;
    s += "<text x=\"" + svg_fixed(x0 + w / 2) + "\" y=\"" + svg_fixed(y0 + 18) +
        "\" text-anchor=\"middle\" font-size=\"14\" font-weight=\"bold\">True against predicted, with bands (test)</text>\n";
    double lo = INFINITY, hi = -INFINITY;
    for (const auto& p : r.bands)
        for (double v : {p.predicted, p.actual, p.low, p.high})
            if (std::isfinite(v)) {
                lo = std::min(lo, v);
                hi = std::max(hi, v);
            }
    if (!(lo <= hi)) {
        lo = 0;
        hi = 1;
    }
    if (hi - lo < 1e-12) hi = lo + 1;
    const double pad = 0.05 * (hi - lo);
    lo -= pad;
    hi += pad;
    auto px = [&](double v) { return left + (right - left) * (std::min(hi, std::max(lo, v)) - lo) / (hi - lo); };
    auto py = [&](double v) { return bottom - (bottom - top) * (std::min(hi, std::max(lo, v)) - lo) / (hi - lo); };
    s += "<rect x=\"" + svg_fixed(left) + "\" y=\"" + svg_fixed(top) + "\" width=\"" + svg_fixed(right - left) + "\" height=\"" +
        svg_fixed(bottom - top) + "\" fill=\"none\" stroke=\"#888\"/>\n";
    for (int t = 0; t <= 4; ++t) {
        const double v = lo + (hi - lo) * t / 4.0;
        s += "<text x=\"" + svg_fixed(left - 6) + "\" y=\"" + svg_fixed(py(v) + 4) + "\" text-anchor=\"end\" font-size=\"10\">" + svg_number(v, 3) +
            "</text>\n";
        s += "<text x=\"" + svg_fixed(px(v)) + "\" y=\"" + svg_fixed(bottom + 14) + "\" text-anchor=\"middle\" font-size=\"10\">" + svg_number(v, 3) +
            "</text>\n";
    }
    s += "<text x=\"" + svg_fixed((left + right) / 2) + "\" y=\"" + svg_fixed(bottom + 30) +
        "\" text-anchor=\"middle\" font-size=\"11\">predicted</text>\n";
    s += "<line x1=\"" + svg_fixed(px(lo)) + "\" y1=\"" + svg_fixed(py(lo)) + "\" x2=\"" + svg_fixed(px(hi)) + "\" y2=\"" + svg_fixed(py(hi)) +
        "\" stroke=\"#bbb\" stroke-dasharray=\"4 3\"/>\n";
    const std::size_t shown = std::min<std::size_t>(r.bands.size(), 2000);  // keeps the file small
    for (std::size_t i = 0; i < shown; ++i) {
        const auto& p = r.bands[i];
        const bool inside = p.actual >= p.low && p.actual <= p.high;
        s += "<line x1=\"" + svg_fixed(px(p.predicted)) + "\" x2=\"" + svg_fixed(px(p.predicted)) + "\" y1=\"" + svg_fixed(py(p.low)) + "\" y2=\"" +
            svg_fixed(py(p.high)) + "\" stroke=\"#9cc1e6\" stroke-width=\"1\"/>\n";
        s += "<circle cx=\"" + svg_fixed(px(p.predicted)) + "\" cy=\"" + svg_fixed(py(p.actual)) + "\" r=\"2\" fill=\"" +
            (inside ? "#1f5fa8" : "#c0392b") + "\"/>\n";
    }
    s += "<text x=\"" + svg_fixed(left + 8) + "\" y=\"" + svg_fixed(top + 16) + "\" font-size=\"11\">band: nominal " +
        svg_number(r.nominal_coverage, 3) + ", test coverage " + svg_number(r.test_coverage, 3) + " (red: outside)</text>\n";
}

// Accuracy per confidence bin before and after temperature scaling.
inline void svg_reliability_panel(std::string& s, const report_content& r, double x0, double y0, double w, double h) {
    const double left = x0 + 60, right = x0 + w - 20, top = y0 + 30, bottom = y0 + h - 40;
    s += "<text x=\"" + svg_fixed(x0 + w / 2) + "\" y=\"" + svg_fixed(y0 + 18) +
        "\" text-anchor=\"middle\" font-size=\"14\" font-weight=\"bold\">Reliability (test)</text>\n";
    auto px = [&](double v) { return left + (right - left) * v; };
    auto py = [&](double v) { return bottom - (bottom - top) * v; };
    s += "<rect x=\"" + svg_fixed(left) + "\" y=\"" + svg_fixed(top) + "\" width=\"" + svg_fixed(right - left) + "\" height=\"" +
        svg_fixed(bottom - top) + "\" fill=\"none\" stroke=\"#888\"/>\n";
    for (int t = 0; t <= 4; ++t) {
        const double v = t / 4.0;
        s += "<text x=\"" + svg_fixed(left - 6) + "\" y=\"" + svg_fixed(py(v) + 4) + "\" text-anchor=\"end\" font-size=\"10\">" + svg_number(v, 3) +
            "</text>\n";
        s += "<text x=\"" + svg_fixed(px(v)) + "\" y=\"" + svg_fixed(bottom + 14) + "\" text-anchor=\"middle\" font-size=\"10\">" + svg_number(v, 3) +
            "</text>\n";
    }
    s += "<text x=\"" + svg_fixed((left + right) / 2) + "\" y=\"" + svg_fixed(bottom + 30) +
        "\" text-anchor=\"middle\" font-size=\"11\">confidence (top probability)</text>\n";
    s += "<line x1=\"" + svg_fixed(px(0)) + "\" y1=\"" + svg_fixed(py(0)) + "\" x2=\"" + svg_fixed(px(1)) + "\" y2=\"" + svg_fixed(py(1)) +
        "\" stroke=\"#bbb\" stroke-dasharray=\"4 3\"/>\n";
    for (const auto& b : r.reliability_calibrated) {
        if (b.rows == 0) continue;
        s += "<rect x=\"" + svg_fixed(px(b.low) + 1) + "\" y=\"" + svg_fixed(py(b.accuracy)) + "\" width=\"" + svg_fixed(px(b.high) - px(b.low) - 2) +
            "\" height=\"" + svg_fixed(py(0) - py(b.accuracy)) + "\" fill=\"#9cc1e6\"/>\n";
    }
    std::string pts;
    for (const auto& b : r.reliability_raw)
        if (b.rows > 0) pts += svg_fixed(px(b.confidence)) + "," + svg_fixed(py(b.accuracy)) + " ";
    if (!pts.empty()) s += "<polyline fill=\"none\" stroke=\"#d9731a\" stroke-width=\"2\" points=\"" + pts + "\"/>\n";
    s += "<text x=\"" + svg_fixed(left + 8) + "\" y=\"" + svg_fixed(top + 16) +
        "\" font-size=\"11\">bars: after temperature scaling; line: before</text>\n";
}

}  // namespace detail

/// The report as an SVG document.
inline std::string training_report_svg(const report_content& r) {
    const double panel_w = 520, panel_h = 360;
    const bool with_confusion = r.confusion != nullptr;
    const bool with_calibration = !r.bands.empty() || !r.reliability_calibrated.empty();
    const double width = panel_w * (1 + (with_confusion ? 1 : 0) + (with_calibration ? 1 : 0));
    const double height = panel_h + 40;
    std::string s;
    s += "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n";
    s += "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"" + detail::svg_fixed(width) + "\" height=\"" + detail::svg_fixed(height) +
        "\" viewBox=\"0 0 " + detail::svg_fixed(width) + " " + detail::svg_fixed(height) + "\" font-family=\"sans-serif\">\n";
    s += "<rect width=\"100%\" height=\"100%\" fill=\"white\"/>\n";
    s += "<text x=\"12\" y=\"22\" font-size=\"15\">" + detail::svg_escape(r.title) + "</text>\n";
    detail::svg_loss_panel(s, r, 0, 40, panel_w, panel_h);
    if (with_confusion) detail::svg_confusion_panel(s, r, panel_w, 40, panel_w);
    const double x = panel_w * (with_confusion ? 2 : 1);
    if (!r.bands.empty())
        detail::svg_band_panel(s, r, x, 40, panel_w, panel_h);
    else if (!r.reliability_calibrated.empty())
        detail::svg_reliability_panel(s, r, x, 40, panel_w, panel_h);
    s += "</svg>\n";
    return s;
}

TENON_NAMESPACE_END
