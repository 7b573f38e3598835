// tenon: encoding categories as numbers.
//
// one_hot_layout turns a categorical cell into a block of 0/1 slots, in a
// category order fixed from the training rows (sorted by byte value, not by
// row order); a category never seen in training fails, gives all zeros, or
// takes a final 'other' slot, by policy. class_index maps class labels to
// indices 0..k-1 and back, and travels with the measured plan so predictions
// can be named. The reference-level option: docs/design/prep.md.
#pragma once

#include <algorithm>
#include <cstdint>
#include <string>
#include <string_view>
#include <utility>
#include <vector>

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"
#include "tenon/prep/cell_parsing.hpp"

TENON_NAMESPACE_BEGIN

enum class unseen_policy : std::uint8_t { fail = 0, all_zero = 1, other_slot = 2 };

class one_hot_layout {
public:
    one_hot_layout() = default;

    /// `categories` may hold duplicates and come in any order.
    one_hot_layout(std::vector<std::string> categories, unseen_policy policy = unseen_policy::fail, bool omit_reference_level = false)
        : categories_(std::move(categories)), policy_(policy), omit_reference_level_(omit_reference_level) {
        std::sort(categories_.begin(), categories_.end());
        categories_.erase(std::unique(categories_.begin(), categories_.end()), categories_.end());
    }

    const std::vector<std::string>& categories() const noexcept { return categories_; }
    unseen_policy policy() const noexcept { return policy_; }
    bool omit_reference_level() const noexcept { return omit_reference_level_; }

    /// Number of slots written per cell.
    std::size_t width() const noexcept {
        std::size_t w = categories_.size();
        if (omit_reference_level_ && w > 0) --w;
        if (policy_ == unseen_policy::other_slot) ++w;
        return w;
    }

    /// Index of a category, or -1 when it was not seen in training.
    std::int64_t find(std::string_view text) const noexcept {
        auto it = std::lower_bound(categories_.begin(), categories_.end(), text,
                                   [](const std::string& a, std::string_view b) { return std::string_view(a) < b; });
        if (it == categories_.end() || std::string_view(*it) != text) return -1;
        return it - categories_.begin();
    }

    /// Writes width() slots for category `index` (-1 = unseen). `column` and
    /// `text` only feed the error message of the fail policy.
    template <class T>
    void encode(std::int64_t index, T* out, const std::string& column, std::string_view text) const {
        const std::size_t w = width();
        for (std::size_t k = 0; k < w; ++k) out[k] = T(0);
        if (index < 0) {
            switch (policy_) {
            case unseen_policy::fail:
                raise(codes::prep_category_unseen,
                      "column '" + column + "': the category '" + std::string(text) + "' was not seen in the training rows");
            case unseen_policy::all_zero: return;
            case unseen_policy::other_slot: out[w - 1] = T(1); return;
            }
            return;
        }
        auto slot = static_cast<std::size_t>(index);
        if (omit_reference_level_) {
            if (slot == 0) return;
            --slot;
        }
        out[slot] = T(1);
    }

    /// Names of the slots: "column=category", and "column=<other>".
    std::vector<std::string> slot_names(const std::string& column) const {
        std::vector<std::string> names;
        for (std::size_t k = omit_reference_level_ ? 1 : 0; k < categories_.size(); ++k) names.push_back(column + "=" + categories_[k]);
        if (policy_ == unseen_policy::other_slot) names.push_back(column + "=<other>");
        return names;
    }

private:
    std::vector<std::string> categories_;
    unseen_policy policy_ = unseen_policy::fail;
    bool omit_reference_level_ = false;
};

/// Class labels <-> indices. Names are sorted (by byte value, or by numeric
/// value when every label is a number, so "2" comes before "10").
class class_index {
public:
    class_index() = default;
    explicit class_index(std::vector<std::string> names) : names_(std::move(names)) {
        bool numeric = true;
        double a = 0, b = 0;
        for (const auto& n : names_) numeric = numeric && parse_number(n, a);
        if (numeric)
            std::sort(names_.begin(), names_.end(), [&](const std::string& x, const std::string& y) {
                parse_number(x, a);
                parse_number(y, b);
                return a < b || (a == b && x < y);
            });
        else
            std::sort(names_.begin(), names_.end());
        names_.erase(std::unique(names_.begin(), names_.end()), names_.end());
        build_lookup();
    }

    std::size_t size() const noexcept { return names_.size(); }
    const std::vector<std::string>& names() const noexcept { return names_; }
    const std::string& name(std::size_t index) const noexcept { return names_[index]; }

    /// Index of a class name, or -1 when it is not a known class.
    std::int64_t find(std::string_view name) const noexcept {
        auto it = std::lower_bound(lookup_.begin(), lookup_.end(), name,
                                   [&](std::uint32_t k, std::string_view b) { return std::string_view(names_[k]) < b; });
        if (it == lookup_.end() || std::string_view(names_[*it]) != name) return -1;
        return *it;
    }

private:
    void build_lookup() {
        lookup_.resize(names_.size());
        for (std::uint32_t k = 0; k < lookup_.size(); ++k) lookup_[k] = k;
        std::sort(lookup_.begin(), lookup_.end(), [&](std::uint32_t x, std::uint32_t y) { return names_[x] < names_[y]; });
    }

    std::vector<std::string> names_;
    std::vector<std::uint32_t> lookup_;  // indices of names_ in byte order, for binary search
};

TENON_NAMESPACE_END
