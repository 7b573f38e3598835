// tenon: the former path of <tenon/format/model_file.hpp> and <tenon/train/authoring.hpp>, kept so
// that hosts written against tenon 0.1.0 still build (docs/design/layout.md).
#pragma once

#include "tenon/format/model_file.hpp"
#include "tenon/train/authoring.hpp"
