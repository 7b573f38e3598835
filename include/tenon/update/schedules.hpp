// tenon: learning-rate schedules.
//
// A schedule gives the learning rate for a step (number of updates done so
// far, starting at 0) and an epoch (starting at 0). The stall reduction also
// watches a metric reported once per epoch. Every schedule's mutable state
// round-trips through save_state()/load_state() exactly; the options are the
// host's to keep (they are constructor arguments).
#pragma once

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <limits>
#include <memory>
#include <string>
#include <vector>

#include "tenon/core/bytes.hpp"

TENON_NAMESPACE_BEGIN

namespace detail {
inline constexpr std::uint32_t schedule_state_magic = 0x53'6E'65'74u;  // "teNS": tenon schedule state
}  // namespace detail

class rate_schedule {
public:
    virtual ~rate_schedule() = default;

    virtual const char* kind() const noexcept = 0;
    /// The learning rate for the given step and epoch.
    virtual double rate(std::uint64_t step, std::uint64_t epoch) const = 0;
    /// Reports the watched metric (e.g. validation loss) at the end of an
    /// epoch; only the stall reduction uses it.
    virtual void report_metric(double value) { (void)value; }

    std::vector<std::uint8_t> save_state() const {
        std::vector<std::uint8_t> out;
        byte_writer w(out);
        w.u32(detail::schedule_state_magic);
        w.text(kind());
        write_state(w);
        return out;
    }
    /// Restores save_state() bytes of a schedule of the same kind; raises
    /// model.schedule.option for another kind, model.record.* for bad bytes.
    void load_state(const std::vector<std::uint8_t>& bytes) {
        byte_reader in(bytes, std::string(kind()) + " schedule state");
        if (in.u32() != detail::schedule_state_magic) in.fail("not tenon schedule state (bad magic)");
        const std::string saved = in.text();
        if (saved != kind()) {
            raise(codes::model_schedule_option, std::string(kind()) + " schedule: the state was saved by a '" + saved + "' schedule");
        }
        read_state(in);
        if (!in.at_end()) in.fail(std::to_string(in.remaining()) + " bytes follow the state");
    }

protected:
    virtual void write_state(byte_writer& w) const { (void)w; }
    virtual void read_state(byte_reader& in) { (void)in; }

    static void check(const char* schedule, const char* option, double value, bool ok, const char* range) {
        if (!ok || !std::isfinite(value)) {
            raise(codes::model_schedule_option,
                  std::string(schedule) + " schedule: " + option + " must be " + range + ", got " + std::to_string(value));
        }
    }
};

/// The same rate at every step.
class constant_rate : public rate_schedule {
public:
    explicit constant_rate(double rate) : rate_(rate) { check("constant", "the rate", rate, rate >= 0.0, "non-negative"); }
    const char* kind() const noexcept override { return "constant"; }
    double rate(std::uint64_t, std::uint64_t) const override { return rate_; }

private:
    double rate_;
};

/// initial * factor^floor(epoch / every_epochs) (step decay, common practice).
class step_decay : public rate_schedule {
public:
    step_decay(double initial, double factor, std::uint64_t every_epochs) : initial_(initial), factor_(factor), every_(every_epochs) {
        check("step decay", "the initial rate", initial, initial >= 0.0, "non-negative");
        check("step decay", "the factor", factor, factor > 0.0 && factor <= 1.0, "in (0, 1]");
        check("step decay", "the interval in epochs", static_cast<double>(every_epochs), every_epochs > 0, "positive");
    }
    const char* kind() const noexcept override { return "step_decay"; }
    double rate(std::uint64_t, std::uint64_t epoch) const override { return initial_ * std::pow(factor_, static_cast<double>(epoch / every_)); }

private:
    double initial_, factor_;
    std::uint64_t every_;
};

/// initial * factor^epoch (exponential decay, common practice).
class exponential_decay : public rate_schedule {
public:
    exponential_decay(double initial, double factor) : initial_(initial), factor_(factor) {
        check("exponential decay", "the initial rate", initial, initial >= 0.0, "non-negative");
        check("exponential decay", "the factor", factor, factor > 0.0 && factor <= 1.0, "in (0, 1]");
    }
    const char* kind() const noexcept override { return "exponential_decay"; }
    double rate(std::uint64_t, std::uint64_t epoch) const override { return initial_ * std::pow(factor_, static_cast<double>(epoch)); }

private:
    double initial_, factor_;
};

/// Cosine annealing with warm restarts (Loshchilov & Hutter 2017, "SGDR:
/// Stochastic Gradient Descent with Warm Restarts", eq. 5):
///   rate = minimum + (maximum - minimum) (1 + cos(pi t_cur / t_i)) / 2,
/// counted in steps: the first period lasts first_period steps, each next one
/// period_multiplier times as long (T_mult), and the rate jumps back to the
/// maximum at every restart.
class cosine_restarts : public rate_schedule {
public:
    cosine_restarts(double maximum, double minimum, std::uint64_t first_period, std::uint64_t period_multiplier = 1)
        : maximum_(maximum), minimum_(minimum), first_(first_period), multiplier_(period_multiplier) {
        check("cosine restarts", "the minimum rate", minimum, minimum >= 0.0, "non-negative");
        check("cosine restarts", "the maximum rate", maximum, maximum >= minimum, "at least the minimum rate");
        check("cosine restarts", "the first period", static_cast<double>(first_period), first_period > 0, "positive");
        check("cosine restarts", "the period multiplier", static_cast<double>(period_multiplier), period_multiplier > 0, "positive");
    }
    const char* kind() const noexcept override { return "cosine_restarts"; }
    double rate(std::uint64_t step, std::uint64_t) const override {
        std::uint64_t period = first_;
        std::uint64_t position = step;
        if (multiplier_ == 1) {
            position = step % period;
        } else {
            while (position >= period) {
                position -= period;
                if (period > std::numeric_limits<std::uint64_t>::max() / multiplier_) break;
                period *= multiplier_;
            }
        }
        const double pi = 3.14159265358979323846;
        const double fraction = static_cast<double>(position) / static_cast<double>(period);
        return minimum_ + (maximum_ - minimum_) * 0.5 * (1.0 + std::cos(pi * fraction));
    }

private:
    double maximum_, minimum_;
    std::uint64_t first_, multiplier_;
};

/// Linear warm-up: for the first `warmup_steps` steps the rate of `after`
/// is multiplied by (step + 1) / warmup_steps, then passed unchanged
/// (gradual warm-up, Goyal et al. 2017, "Accurate, Large Minibatch SGD:
/// Training ImageNet in 1 Hour", section 2.2).
class linear_warmup : public rate_schedule {
public:
    linear_warmup(std::unique_ptr<rate_schedule> after, std::uint64_t warmup_steps) : after_(std::move(after)), warmup_(warmup_steps) {
        if (!after_) raise(codes::model_schedule_option, "linear warm-up schedule: the schedule to warm up is empty");
        check("linear warm-up", "the number of warm-up steps", static_cast<double>(warmup_steps), warmup_steps > 0, "positive");
    }
    const char* kind() const noexcept override { return "linear_warmup"; }
    double rate(std::uint64_t step, std::uint64_t epoch) const override {
        const double r = after_->rate(step, epoch);
        if (step >= warmup_) return r;
        return r * static_cast<double>(step + 1) / static_cast<double>(warmup_);
    }
    void report_metric(double value) override { after_->report_metric(value); }
    rate_schedule& after() noexcept { return *after_; }

protected:
    void write_state(byte_writer& w) const override {
        const std::vector<std::uint8_t> inner = after_->save_state();
        w.u32(static_cast<std::uint32_t>(inner.size()));
        for (std::uint8_t b : inner) w.u8(b);
    }
    void read_state(byte_reader& in) override {
        const std::size_t n = in.count(1, "bytes of inner schedule state");
        std::vector<std::uint8_t> inner(n);
        for (std::size_t i = 0; i < n; ++i) inner[i] = in.u8();
        after_->load_state(inner);
    }

private:
    std::unique_ptr<rate_schedule> after_;
    std::uint64_t warmup_;
};

/// The options of the stall reduction. The defaults are our own; each says
/// why it has its value.
struct stall_reduction_options {
    /// 1e-3: Adam's suggested step size (Kingma & Ba 2015, "Adam: A Method
    /// for Stochastic Optimization", Algorithm 1).
    double initial_rate = 1e-3;
    /// After a stall the rate is multiplied by this, in (0, 1). 0.5 (halving):
    /// a cut then leaves the rate at most a factor 2 below the largest rate
    /// that still made progress, and a decade takes log(10) / log(2) = 3.3
    /// cuts, about 20 reports with tolerated_reports = 5; a smaller multiplier
    /// falls faster but can land up to 1 / multiplier below a useful rate.
    double rate_multiplier = 0.5;
    /// Reports without improvement tolerated; the next one cuts the rate. 5:
    /// the strip of 5 epochs over which Prechelt judges progress before
    /// stopping (Prechelt 1998, "Early Stopping - But When?", in Neural
    /// Networks: Tricks of the Trade; the strip length is from memory).
    std::uint64_t tolerated_reports = 5;
    /// A report improves on the best when it beats it by more than
    /// relative_margin * |best|. 1e-3: for a per-row loss whose spread is
    /// about its mean (squared errors of normal residuals have variance 2
    /// and mean 1, a chi-square with one degree of freedom), the mean over n
    /// validation rows has relative standard error sqrt(2 / n), which is
    /// 1e-3 only at n = 2 million rows; a smaller gain is within the
    /// validation set's own sampling error for any smaller set.
    double relative_margin = 1e-3;
    /// Reports ignored after a cut before stalls count again. 0: the stall
    /// count already restarts at every cut, so the new rate gets
    /// tolerated_reports + 1 reports before the next cut; ignoring more would
    /// only delay a cut that is due.
    std::uint64_t settle_reports = 0;
    /// The rate never falls below floor_fraction * initial_rate, in [0, 1].
    /// 1/1024 (ten halvings): Adam moves a weight by at most about the rate
    /// per step (Kingma & Ba 2015, section 2.1), so from the default initial
    /// rate the floor is about 1e-6, some 8 float units in the last place at
    /// 1 (2^-23 = 1.2e-7, IEEE 754 binary32); lower rates mostly stop
    /// learning instead of refining it.
    double floor_fraction = 1.0 / 1024.0;
    /// Watch for increases (e.g. accuracy) instead of decreases (loss).
    bool maximize = false;
};

/// Multiplies the rate by `rate_multiplier` when the watched metric has not
/// improved for more than `tolerated_reports` reports (common practice).
class stall_reduction : public rate_schedule {
public:
    explicit stall_reduction(const stall_reduction_options& o = {}) : o_(o), rate_(o.initial_rate) {
        check("stall reduction", "the initial rate", o.initial_rate, o.initial_rate >= 0.0, "non-negative");
        check("stall reduction", "the rate multiplier", o.rate_multiplier, o.rate_multiplier > 0.0 && o.rate_multiplier < 1.0, "in (0, 1)");
        check("stall reduction", "the relative margin", o.relative_margin, o.relative_margin >= 0.0, "non-negative");
        check("stall reduction", "the floor fraction", o.floor_fraction, o.floor_fraction >= 0.0 && o.floor_fraction <= 1.0, "in [0, 1]");
    }
    const char* kind() const noexcept override { return "stall_reduction"; }
    double rate(std::uint64_t, std::uint64_t) const override { return rate_; }

    void report_metric(double value) override {
        if (!std::isfinite(value)) {
            raise(codes::model_schedule_option, "stall reduction schedule: the reported metric must be finite, got " + std::to_string(value));
        }
        const double margin = o_.relative_margin * std::abs(best_);
        const bool improved = !has_best_ || (o_.maximize ? value > best_ + margin : value < best_ - margin);
        if (improved) {
            best_ = value;
            has_best_ = true;
            stalled_ = 0;
        } else {
            ++stalled_;
        }
        if (settle_left_ > 0) {
            --settle_left_;
            stalled_ = 0;
            return;
        }
        if (stalled_ > o_.tolerated_reports) {
            rate_ = std::max(o_.floor_fraction * o_.initial_rate, rate_ * o_.rate_multiplier);
            stalled_ = 0;
            settle_left_ = o_.settle_reports;
        }
    }

    double best() const noexcept { return best_; }
    std::uint64_t reports_without_improvement() const noexcept { return stalled_; }

protected:
    void write_state(byte_writer& w) const override {
        w.f64(rate_);
        w.f64(best_);
        w.u8(has_best_ ? 1 : 0);
        w.u64(stalled_);
        w.u64(settle_left_);
    }
    void read_state(byte_reader& in) override {
        const double rate = in.f64(), best = in.f64();
        const std::uint8_t has_best = in.u8();
        const std::uint64_t stalled = in.u64(), settle = in.u64();
        if (has_best > 1) in.fail("flag " + std::to_string(has_best) + " is not 0 or 1");
        if (!(rate >= 0.0) || !std::isfinite(rate)) in.fail("the saved rate " + std::to_string(rate) + " is not a valid rate");
        rate_ = rate;
        best_ = best;
        has_best_ = has_best == 1;
        stalled_ = stalled;
        settle_left_ = settle;
    }

private:
    stall_reduction_options o_;
    double rate_;
    double best_ = 0.0;
    bool has_best_ = false;
    std::uint64_t stalled_ = 0;
    std::uint64_t settle_left_ = 0;
};

TENON_NAMESPACE_END
