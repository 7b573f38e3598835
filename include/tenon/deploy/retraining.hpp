// tenon: the former path of <tenon/train/retraining.hpp>, kept so
// that hosts written against tenon 0.1.0 still build (docs/design/layout.md).
#pragma once

#include "tenon/train/retraining.hpp"
