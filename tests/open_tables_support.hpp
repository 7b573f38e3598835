// Open tables for tests/test_open_tables.cpp, and the yardsticks tenon's
// default model is held to: the tables' readers (CSV and a small JSON reader,
// so no new dependency), an independent preparation (median fill, missing
// indicator, z-score, one-hot), least squares with a small ridge, the majority
// class, and a plain reference perceptron written here from scratch in double
// precision (its own forward and backward pass and Adam; nothing of tenon's
// layers, tape or update rules), so that it checks tenon from outside.
#pragma once

#include <algorithm>
#include <cctype>
#include <cmath>
#include <cstdint>
#include <fstream>
#include <limits>
#include <map>
#include <numeric>
#include <random>
#include <sstream>
#include <stdexcept>
#include <string>
#include <utility>
#include <vector>

#include <Eigen/Dense>

#include <tenon/prep/table.hpp>

namespace open_tables {

constexpr double missing = std::numeric_limits<double>::quiet_NaN();

/// One column: numbers (NaN = missing) or category texts ("" = missing).
struct column_data {
    std::string name;
    bool categorical = false;
    std::vector<double> numbers;
    std::vector<std::string> texts;
};

/// A table ready for the comparison: feature columns, a target without a
/// missing cell (rows without one are left out when the table is read), and
/// for a series the last reading before each row (the persistence forecast).
struct dataset {
    std::string name;
    std::vector<column_data> features;
    column_data target;
    bool classify = false;
    bool chronological = false;  // rows in time order; the split keeps it
    std::vector<double> last_reading;

    std::size_t rows() const { return target.categorical ? target.texts.size() : target.numbers.size(); }
};

// ---------------------------------------------------------------- reading

/// A JSON value of the flat records the tables hold: null, number, text or true/false.
struct json_cell {
    enum kind_t { null, number, text } kind = null;
    double value = 0.0;
    std::string string;
};
using json_record = std::map<std::string, json_cell>;

namespace detail {

struct json_reader {
    const std::string& s;
    std::size_t i = 0;
    std::string where;

    [[noreturn]] void fail(const std::string& what) const { throw std::runtime_error(where + " byte " + std::to_string(i) + ": " + what); }
    void blank() {
        while (i < s.size() && std::isspace(static_cast<unsigned char>(s[i]))) ++i;
    }
    void expect(char c) {
        blank();
        if (i >= s.size() || s[i] != c) fail(std::string("expected '") + c + "'");
        ++i;
    }
    bool next_is(char c) {
        blank();
        return i < s.size() && s[i] == c;
    }
    std::string text() {
        expect('"');
        std::string out;
        while (i < s.size() && s[i] != '"') {
            if (s[i] == '\\') {
                ++i;
                if (i >= s.size()) break;
                const char e = s[i];
                out += e == 'n' ? '\n' : e == 't' ? '\t' : e;  // the tables use no \u escapes
            } else {
                out += s[i];
            }
            ++i;
        }
        if (i >= s.size()) fail("unterminated text");
        ++i;
        return out;
    }
    json_cell cell() {
        blank();
        json_cell c;
        if (next_is('"')) {
            c.kind = json_cell::text;
            c.string = text();
        } else if (s.compare(i, 4, "null") == 0) {
            i += 4;
        } else if (s.compare(i, 4, "true") == 0 || s.compare(i, 5, "false") == 0) {
            c.kind = json_cell::number;
            c.value = s[i] == 't' ? 1.0 : 0.0;
            i += s[i] == 't' ? 4 : 5;
        } else {
            const char* begin = s.c_str() + i;
            char* end = nullptr;
            c.kind = json_cell::number;
            c.value = std::strtod(begin, &end);
            if (end == begin) fail("expected a value");
            i += static_cast<std::size_t>(end - begin);
        }
        return c;
    }
};

}  // namespace detail

/// Reads a JSON array of flat objects (RFC 8259's grammar, restricted to
/// what the tables use: no nested values, no \u escapes).
inline std::vector<json_record> read_json_records(const std::string& path) {
    std::ifstream in(path, std::ios::binary);
    if (!in) throw std::runtime_error(path + ": cannot open (is the Debian package installed?)");
    std::stringstream buffer;
    buffer << in.rdbuf();
    const std::string s = buffer.str();
    detail::json_reader r{s, 0, path};
    std::vector<json_record> records;
    r.expect('[');
    while (!r.next_is(']')) {
        json_record rec;
        r.expect('{');
        while (!r.next_is('}')) {
            std::string key = r.text();
            r.expect(':');
            rec[key] = r.cell();
            if (!r.next_is(',')) break;
            r.expect(',');
        }
        r.expect('}');
        records.push_back(std::move(rec));
        if (!r.next_is(',')) break;
        r.expect(',');
    }
    r.expect(']');
    return records;
}

/// Reads a plain CSV file (no quoting: the tables need none) into a header and text rows.
inline std::vector<std::vector<std::string>> read_plain_csv(const std::string& path) {
    std::ifstream in(path);
    if (!in) throw std::runtime_error(path + ": cannot open (is the Debian package installed?)");
    std::vector<std::vector<std::string>> rows;
    std::string line;
    while (std::getline(in, line)) {
        if (!line.empty() && line.back() == '\r') line.pop_back();
        if (line.empty()) continue;
        std::vector<std::string> fields;
        std::stringstream ls(line);
        std::string f;
        while (std::getline(ls, f, ',')) fields.push_back(f);
        if (!rows.empty() && fields.size() != rows.front().size())
            throw std::runtime_error(path + ": a line has " + std::to_string(fields.size()) + " fields, the header " +
                                     std::to_string(rows.front().size()));
        rows.push_back(std::move(fields));
    }
    return rows;
}

/// Day of the year (1-366) of a Gregorian date.
inline int day_of_year(int year, int month, int day) {
    static const int before[] = {0, 31, 59, 90, 120, 151, 181, 212, 243, 273, 304, 334};
    const bool leap = (year % 4 == 0 && year % 100 != 0) || year % 400 == 0;
    return before[month - 1] + day + (leap && month > 2 ? 1 : 0);
}

/// Days since 1970-01-01 (Hinnant's days_from_civil algorithm, "chrono-Compatible
/// Low-Level Date Algorithms", 2013).
inline long days_from_civil(int y, int m, int d) {
    y -= m <= 2;
    const long era = (y >= 0 ? y : y - 399) / 400;
    const long yoe = y - era * 400;
    const long doy = (153 * (m + (m > 2 ? -3 : 9)) + 2) / 5 + d - 1;
    const long doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    return era * 146097 + doe - 719468;
}

/// The tenon table of a dataset (target last), as a host would build it.
inline tenon::table to_tenon_table(const dataset& d) {
    tenon::table t(d.name);
    std::vector<const column_data*> all;
    for (const auto& c : d.features) all.push_back(&c);
    all.push_back(&d.target);
    for (const column_data* c : all) {
        auto& out = t.add_column(c->name, c->categorical ? tenon::column_kind::categorical : tenon::column_kind::numeric);
        for (std::size_t r = 0; r < d.rows(); ++r) {
            if (c->categorical) {
                if (c->texts[r].empty())
                    out.push_missing();
                else
                    out.push_category(c->texts[r]);
            } else {
                if (std::isnan(c->numbers[r]))
                    out.push_missing();
                else
                    out.push_number(c->numbers[r]);
            }
        }
    }
    return t;
}

/// Writes a dataset as CSV (target last, empty cells for missing) for `tenon train`.
inline void write_csv(const dataset& d, const std::string& path) {
    std::ofstream out(path);
    if (!out) throw std::runtime_error(path + ": cannot write");
    out.precision(17);
    std::vector<const column_data*> all;
    for (const auto& c : d.features) all.push_back(&c);
    all.push_back(&d.target);
    for (std::size_t k = 0; k < all.size(); ++k) out << (k ? "," : "") << all[k]->name;
    out << "\n";
    for (std::size_t r = 0; r < d.rows(); ++r) {
        for (std::size_t k = 0; k < all.size(); ++k) {
            if (k) out << ",";
            if (all[k]->categorical)
                out << all[k]->texts[r];
            else if (!std::isnan(all[k]->numbers[r]))
                out << all[k]->numbers[r];
        }
        out << "\n";
    }
}

// ------------------------------------------------------------ preparation

/// Rows prepared for the yardsticks: features row-major, regression targets
/// z-scored (with the mean and spread to undo it), class codes.
struct prepared {
    std::size_t rows = 0, width = 0;
    std::vector<double> x;
    std::vector<double> y;  // regression, z-scored
    std::vector<std::size_t> label;  // classification
};

/// Statistics measured on training rows only, then applied to any rows:
/// median fill plus a missing indicator for a numeric column with a missing
/// training cell, z-scores (population spread), one-hot over the training
/// categories (an unseen or missing category is all zeros).
struct preparation {
    struct numeric_step {
        double median = 0, mean = 0, spread = 1;
        bool indicator = false;
    };
    std::vector<numeric_step> numeric;  // per feature (categorical ones unused)
    std::vector<std::vector<std::string>> levels;  // per feature (numeric ones empty)
    std::vector<std::string> classes;
    double target_mean = 0, target_spread = 1;

    preparation(const dataset& d, const std::vector<std::size_t>& train) {
        numeric.resize(d.features.size());
        levels.resize(d.features.size());
        for (std::size_t k = 0; k < d.features.size(); ++k) {
            const column_data& c = d.features[k];
            if (c.categorical) {
                for (std::size_t r : train)
                    if (!c.texts[r].empty()) levels[k].push_back(c.texts[r]);
                std::sort(levels[k].begin(), levels[k].end());
                levels[k].erase(std::unique(levels[k].begin(), levels[k].end()), levels[k].end());
                continue;
            }
            std::vector<double> present;
            for (std::size_t r : train)
                if (!std::isnan(c.numbers[r])) present.push_back(c.numbers[r]);
            std::sort(present.begin(), present.end());
            const std::size_t n = present.size();
            numeric_step& s = numeric[k];
            s.median = n % 2 ? present[n / 2] : 0.5 * (present[n / 2 - 1] + present[n / 2]);
            s.indicator = n < train.size();
            double sum = 0, sum2 = 0;
            for (std::size_t r : train) {
                const double v = std::isnan(c.numbers[r]) ? s.median : c.numbers[r];
                sum += v;
                sum2 += v * v;
            }
            const double m = static_cast<double>(train.size());
            s.mean = sum / m;
            const double var = std::max(0.0, sum2 / m - s.mean * s.mean);
            s.spread = var > 0 ? std::sqrt(var) : 1.0;
        }
        if (d.classify) {
            for (std::size_t r : train) classes.push_back(d.target.texts[r]);
            std::sort(classes.begin(), classes.end());
            classes.erase(std::unique(classes.begin(), classes.end()), classes.end());
        } else {
            double sum = 0, sum2 = 0;
            for (std::size_t r : train) {
                sum += d.target.numbers[r];
                sum2 += d.target.numbers[r] * d.target.numbers[r];
            }
            const double m = static_cast<double>(train.size());
            target_mean = sum / m;
            target_spread = std::sqrt(std::max(1e-300, sum2 / m - target_mean * target_mean));
        }
    }

    std::size_t width() const {
        std::size_t w = 0;
        for (std::size_t k = 0; k < numeric.size(); ++k) w += levels[k].empty() ? 1 + numeric[k].indicator : levels[k].size();
        return w;
    }

    prepared apply(const dataset& d, const std::vector<std::size_t>& rows) const {
        prepared p;
        p.rows = rows.size();
        p.width = width();
        p.x.reserve(p.rows * p.width);
        for (std::size_t r : rows) {
            for (std::size_t k = 0; k < d.features.size(); ++k) {
                const column_data& c = d.features[k];
                if (c.categorical) {
                    for (const auto& level : levels[k]) p.x.push_back(c.texts[r] == level ? 1.0 : 0.0);
                    continue;
                }
                const numeric_step& s = numeric[k];
                const bool gap = std::isnan(c.numbers[r]);
                p.x.push_back(((gap ? s.median : c.numbers[r]) - s.mean) / s.spread);
                if (s.indicator) p.x.push_back(gap ? 1.0 : 0.0);
            }
            if (d.classify) {
                const auto at = std::lower_bound(classes.begin(), classes.end(), d.target.texts[r]);
                p.label.push_back(static_cast<std::size_t>(at - classes.begin()));  // unseen class: never right
            } else {
                p.y.push_back((d.target.numbers[r] - target_mean) / target_spread);
            }
        }
        return p;
    }
};

// -------------------------------------------------------------- yardsticks

inline double rmse(const std::vector<double>& truth, const std::vector<double>& predicted) {
    double ss = 0;
    for (std::size_t i = 0; i < truth.size(); ++i) ss += (truth[i] - predicted[i]) * (truth[i] - predicted[i]);
    return std::sqrt(ss / static_cast<double>(truth.size()));
}

/// Least squares with an intercept on the prepared features, with a small
/// ridge (1e-6 per training row, intercept unpenalized) so that a constant
/// or collinear column (one-hot levels, an all-zero indicator) cannot make
/// the normal equations singular (Hoerl & Kennard 1970, Technometrics 12(1)).
/// Returns the predictions for `test` in the target's units.
inline std::vector<double> least_squares_predictions(const prepared& train, const prepared& test, double mean, double spread) {
    const auto n = static_cast<Eigen::Index>(train.rows), w = static_cast<Eigen::Index>(train.width);
    Eigen::MatrixXd a(n, w + 1);
    Eigen::VectorXd b(n);
    for (Eigen::Index i = 0; i < n; ++i) {
        a(i, 0) = 1.0;
        for (Eigen::Index j = 0; j < w; ++j) a(i, j + 1) = train.x[static_cast<std::size_t>(i * w + j)];
        b(i) = train.y[static_cast<std::size_t>(i)];
    }
    Eigen::MatrixXd normal = a.transpose() * a;
    for (Eigen::Index j = 1; j <= w; ++j) normal(j, j) += 1e-6 * static_cast<double>(n);
    const Eigen::VectorXd coef = normal.ldlt().solve(a.transpose() * b);
    std::vector<double> out(test.rows);
    for (std::size_t i = 0; i < test.rows; ++i) {
        double v = coef(0);
        for (std::size_t j = 0; j < test.width; ++j) v += coef(static_cast<Eigen::Index>(j + 1)) * test.x[i * test.width + j];
        out[i] = v * spread + mean;
    }
    return out;
}

/// Multinomial logistic regression on the prepared features (the plain
/// classification baseline issue 19 names): the mean cross-entropy plus a
/// small ridge (1e-4 / 2 |W|^2) that keeps separable classes finite, which
/// makes the objective strictly convex; minimized by Newton's method with a
/// backtracking (Armijo) line search (Nocedal & Wright 2006, Algorithms 3.1
/// and 3.2), whose Hessian blocks for classes a, b are
/// X^T diag(p_a (delta_ab - p_b)) X / n + ridge.
struct logistic_fit {
    Eigen::MatrixXd weights;  // (width + 1) x classes, bias in row 0
    double gradient_norm = 0.0;
    std::size_t iterations = 0;

    std::vector<std::size_t> labels_for(const prepared& p) const {
        std::vector<std::size_t> out(p.rows);
        for (std::size_t i = 0; i < p.rows; ++i) {
            Eigen::VectorXd z = weights.row(0).transpose();
            for (std::size_t j = 0; j < p.width; ++j) z += p.x[i * p.width + j] * weights.row(static_cast<Eigen::Index>(j + 1)).transpose();
            Eigen::Index best = 0;
            z.maxCoeff(&best);
            out[i] = static_cast<std::size_t>(best);
        }
        return out;
    }
};

inline logistic_fit fit_logistic(const prepared& train, std::size_t classes) {
    const auto n = static_cast<Eigen::Index>(train.rows), w = static_cast<Eigen::Index>(train.width) + 1;
    const auto k = static_cast<Eigen::Index>(classes);
    Eigen::MatrixXd x(n, w), onehot = Eigen::MatrixXd::Zero(n, k);
    for (Eigen::Index i = 0; i < n; ++i) {
        x(i, 0) = 1.0;
        for (Eigen::Index j = 1; j < w; ++j) x(i, j) = train.x[static_cast<std::size_t>(i * (w - 1) + j - 1)];
        onehot(i, static_cast<Eigen::Index>(train.label[static_cast<std::size_t>(i)])) = 1.0;
    }
    const double ridge = 1e-4, rows = static_cast<double>(n);
    const auto probabilities = [&](const Eigen::MatrixXd& weights) {
        Eigen::MatrixXd z = x * weights;
        for (Eigen::Index i = 0; i < n; ++i) {
            z.row(i) = (z.row(i).array() - z.row(i).maxCoeff()).exp().matrix();
            z.row(i) /= z.row(i).sum();
        }
        return z;
    };
    const auto objective = [&](const Eigen::MatrixXd& weights) {
        const Eigen::MatrixXd p = probabilities(weights);
        double loss = 0;
        for (Eigen::Index i = 0; i < n; ++i) loss -= std::log(std::max(1e-300, (p.row(i).array() * onehot.row(i).array()).sum()));
        return loss / rows + 0.5 * ridge * weights.squaredNorm();
    };
    logistic_fit fit;
    fit.weights = Eigen::MatrixXd::Zero(w, k);
    for (fit.iterations = 0; fit.iterations < 100; ++fit.iterations) {
        const Eigen::MatrixXd p = probabilities(fit.weights);
        const Eigen::MatrixXd gradient = x.transpose() * (p - onehot) / rows + ridge * fit.weights;
        fit.gradient_norm = gradient.norm();
        if (fit.gradient_norm < 1e-9) break;
        Eigen::MatrixXd hessian = ridge * Eigen::MatrixXd::Identity(w * k, w * k);
        for (Eigen::Index a = 0; a < k; ++a)
            for (Eigen::Index b = 0; b < k; ++b) {
                const Eigen::VectorXd d = p.col(a).array() * ((a == b ? 1.0 : 0.0) - p.col(b).array());
                hessian.block(a * w, b * w, w, w) += x.transpose() * d.asDiagonal() * x / rows;
            }
        const Eigen::VectorXd g = Eigen::Map<const Eigen::VectorXd>(gradient.data(), w * k);  // column-major: class blocks
        const Eigen::VectorXd direction = hessian.ldlt().solve(g);
        const Eigen::MatrixXd step = Eigen::Map<const Eigen::MatrixXd>(direction.data(), w, k);
        const double before = objective(fit.weights), slope = g.dot(direction);
        double t = 1.0;
        while (t > 1e-10 && objective(fit.weights - t * step) > before - 1e-4 * t * slope) t *= 0.5;
        fit.weights -= t * step;
    }
    return fit;
}

/// The plain reference perceptron of issue 19: z-scored inputs, hidden
/// layers of rectified linear units, Adam (Kingma & Ba 2015, Algorithm 1,
/// with the paper's defaults: step 1e-3, beta1 0.9, beta2 0.999, epsilon
/// 1e-8), mini-batches of 32 rows reshuffled every epoch, squared error on
/// the z-scored target or softmax cross-entropy, early stopping after 30
/// epochs without a lower validation loss, keeping the best epoch's weights.
/// Weights start He-uniform (He et al. 2015), biases at zero.
struct reference_settings {
    std::vector<std::size_t> hidden{64, 32};
    double step = 1e-3;
    std::size_t batch = 32;
    std::size_t patience = 30;
    std::size_t max_epochs = 1000;
};

class reference_perceptron {
public:
    reference_perceptron(std::size_t inputs, std::size_t outputs, bool classify, std::uint64_t seed, reference_settings s = reference_settings())
        : s_(s), classify_(classify), engine_(seed) {
        sizes_.push_back(inputs);
        sizes_.insert(sizes_.end(), s.hidden.begin(), s.hidden.end());
        sizes_.push_back(outputs);
        for (std::size_t l = 0; l + 1 < sizes_.size(); ++l) {
            layer L;
            L.in = sizes_[l];
            L.out = sizes_[l + 1];
            L.w.resize(L.in * L.out);
            L.b.assign(L.out, 0.0);
            const double limit = std::sqrt(6.0 / static_cast<double>(L.in));
            for (double& v : L.w) v = (2.0 * uniform() - 1.0) * limit;
            L.gw.assign(L.w.size(), 0.0);
            L.gb.assign(L.out, 0.0);
            L.mw = L.vw = L.gw;
            L.mb = L.vb = L.gb;
            layers_.push_back(std::move(L));
        }
    }

    /// Trains on `train` with early stopping on `validation`; returns the epochs run.
    std::size_t train_until_stop(const prepared& train, const prepared& validation) {
        std::vector<std::size_t> order(train.rows);
        std::iota(order.begin(), order.end(), std::size_t(0));
        double best = std::numeric_limits<double>::infinity();
        std::vector<layer> kept = layers_;
        std::size_t since_best = 0, epoch = 0;
        while (epoch < s_.max_epochs && since_best < s_.patience) {
            ++epoch;
            for (std::size_t i = order.size(); i > 1; --i) std::swap(order[i - 1], order[below(i)]);  // Fisher-Yates
            for (std::size_t start = 0; start < order.size(); start += s_.batch) {
                const std::size_t end = std::min(order.size(), start + s_.batch);
                step(train, order, start, end);
            }
            const double loss = mean_loss(validation);
            if (loss < best) {
                best = loss;
                kept = layers_;
                since_best = 0;
            } else {
                ++since_best;
            }
        }
        layers_ = kept;
        return epoch;
    }

    /// Outputs for one prepared row: the z-scored value, or class probabilities.
    const std::vector<double>& outputs(const double* row) {
        forward(row);
        return act_.back();
    }

    double mean_loss(const prepared& p) {
        double total = 0;
        for (std::size_t i = 0; i < p.rows; ++i) {
            const auto& o = outputs(&p.x[i * p.width]);
            total += classify_ ? -std::log(std::max(o[p.label[i]], 1e-300)) : (o[0] - p.y[i]) * (o[0] - p.y[i]);
        }
        return total / static_cast<double>(p.rows);
    }

    /// Self-check of the backward pass: the largest difference between its
    /// gradient of the mean loss over all rows of `p` and central differences
    /// (step 1e-6), relative to max(1, |gradient|).
    double gradient_discrepancy(const prepared& p) {
        std::vector<std::size_t> all(p.rows);
        std::iota(all.begin(), all.end(), std::size_t(0));
        accumulate_gradient(p, all, 0, p.rows);
        double worst = 0;
        const double h = 1e-6;
        auto probe = [&](std::vector<double>& x, const std::vector<double>& g) {
            for (std::size_t i = 0; i < x.size(); ++i) {
                const double kept = x[i];
                x[i] = kept + h;
                const double up = mean_loss(p);
                x[i] = kept - h;
                const double down = mean_loss(p);
                x[i] = kept;
                const double numeric = (up - down) / (2 * h);
                worst = std::max(worst, std::abs(numeric - g[i]) / std::max(1.0, std::abs(g[i])));
            }
        };
        for (auto& L : layers_) {
            probe(L.w, L.gw);
            probe(L.b, L.gb);
        }
        return worst;
    }

private:
    struct layer {
        std::size_t in = 0, out = 0;
        std::vector<double> w, b, gw, gb, mw, vw, mb, vb;  // w is out x in
    };

    double uniform() { return static_cast<double>(engine_() >> 11) * 0x1.0p-53; }
    std::size_t below(std::size_t n) { return static_cast<std::size_t>(uniform() * static_cast<double>(n)); }

    void forward(const double* row) {
        act_.resize(sizes_.size());
        act_[0].assign(row, row + sizes_[0]);
        for (std::size_t l = 0; l < layers_.size(); ++l) {
            const layer& L = layers_[l];
            auto& out = act_[l + 1];
            out.assign(L.out, 0.0);
            for (std::size_t o = 0; o < L.out; ++o) {
                double v = L.b[o];
                const double* w = &L.w[o * L.in];
                for (std::size_t i = 0; i < L.in; ++i) v += w[i] * act_[l][i];
                out[o] = (l + 1 < layers_.size()) ? std::max(0.0, v) : v;
            }
        }
        if (classify_) {  // softmax, shifted by the largest output
            auto& o = act_.back();
            const double top = *std::max_element(o.begin(), o.end());
            double sum = 0;
            for (double& v : o) sum += (v = std::exp(v - top));
            for (double& v : o) v /= sum;
        }
    }

    void step(const prepared& p, const std::vector<std::size_t>& order, std::size_t start, std::size_t end) {
        accumulate_gradient(p, order, start, end);
        ++t_;
        const double c1 = 1.0 - std::pow(0.9, static_cast<double>(t_)), c2 = 1.0 - std::pow(0.999, static_cast<double>(t_));
        auto adam = [&](std::vector<double>& x, const std::vector<double>& g, std::vector<double>& m, std::vector<double>& v) {
            for (std::size_t i = 0; i < x.size(); ++i) {
                m[i] = 0.9 * m[i] + 0.1 * g[i];
                v[i] = 0.999 * v[i] + 0.001 * g[i] * g[i];
                x[i] -= s_.step * (m[i] / c1) / (std::sqrt(v[i] / c2) + 1e-8);
            }
        };
        for (auto& L : layers_) {
            adam(L.w, L.gw, L.mw, L.vw);
            adam(L.b, L.gb, L.mb, L.vb);
        }
    }

    // Gradient of the mean loss over rows order[start, end) into gw and gb.
    void accumulate_gradient(const prepared& p, const std::vector<std::size_t>& order, std::size_t start, std::size_t end) {
        for (auto& L : layers_) {
            std::fill(L.gw.begin(), L.gw.end(), 0.0);
            std::fill(L.gb.begin(), L.gb.end(), 0.0);
        }
        const double scale = 1.0 / static_cast<double>(end - start);
        std::vector<double> delta, below_delta;
        for (std::size_t k = start; k < end; ++k) {
            const std::size_t r = order[k];
            forward(&p.x[r * p.width]);
            // d(loss)/d(output before softmax): p - onehot (cross-entropy), 2 (o - y) (squared error)
            delta = act_.back();
            if (classify_)
                delta[p.label[r]] -= 1.0;
            else
                delta[0] = 2.0 * (delta[0] - p.y[r]);
            for (std::size_t l = layers_.size(); l-- > 0;) {
                layer& L = layers_[l];
                const auto& in = act_[l];
                below_delta.assign(L.in, 0.0);
                for (std::size_t o = 0; o < L.out; ++o) {
                    const double g = delta[o] * scale;
                    L.gb[o] += g;
                    double* gw = &L.gw[o * L.in];
                    const double* w = &L.w[o * L.in];
                    for (std::size_t i = 0; i < L.in; ++i) {
                        gw[i] += g * in[i];
                        below_delta[i] += delta[o] * w[i];
                    }
                }
                if (l > 0)
                    for (std::size_t i = 0; i < L.in; ++i) below_delta[i] = in[i] > 0.0 ? below_delta[i] : 0.0;
                delta.swap(below_delta);
            }
        }
    }

    reference_settings s_;
    bool classify_;
    std::mt19937_64 engine_;  // raw 64-bit output, specified by the C++ standard; no library distribution
    std::vector<std::size_t> sizes_;
    std::vector<layer> layers_;
    std::vector<std::vector<double>> act_;
    std::uint64_t t_ = 0;
};

}  // namespace open_tables
