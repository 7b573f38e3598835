// tenon: enumerators to text and back, from one table per enum.
//
// Each enum's one table is its `to_string(E)` switch: -Wswitch (in -Wall)
// fails the build when an enumerator has no case, and every parse comes
// from the same switch by trying every value of the underlying byte, so a
// new enumerator is named and parsed as soon as it has its case (no loop
// that stops at some "last" enumerator). Older `X_name()` spellings stay as
// aliases of to_string().
#pragma once

#include <cstring>
#include <string>
#include <string_view>
#include <type_traits>

#include "tenon/version.hpp"

TENON_NAMESPACE_BEGIN

/// The enumerator whose to_string() is `text`; false when none is.
template <class E>
bool enum_from_text(std::string_view text, E& out) noexcept {
    static_assert(std::is_enum_v<E> && sizeof(E) == 1, "enum_from_text: tenon's named enums are one byte wide");
    for (unsigned v = 0; v < 256; ++v) {
        const auto e = static_cast<E>(v);
        const char* t = to_string(e);
        if (std::strcmp(t, "unknown") != 0 && text == t) {
            out = e;
            return true;
        }
    }
    return false;
}

/// Every enumerator's text in value order, joined by ", " (for messages).
template <class E>
std::string enum_choices() {
    std::string out;
    for (unsigned v = 0; v < 256; ++v) {
        const char* t = to_string(static_cast<E>(v));
        if (std::strcmp(t, "unknown") == 0) continue;
        if (!out.empty()) out += ", ";
        out += t;
    }
    return out;
}

TENON_NAMESPACE_END
