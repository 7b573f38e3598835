// tenon: the former path of <tenon/format/atomic_file.hpp>, kept so
// that hosts written against tenon 0.1.0 still build (docs/design/layout.md).
#pragma once

#include "tenon/format/atomic_file.hpp"
