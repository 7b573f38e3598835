// tenon: the one include of a serving program. It loads and checks model
// files, prepares raw rows with the stored plan, predicts with calibrated
// bands or class sets, and measures drift; it includes nothing of training
// (autodiff/, layers/, losses/, update/, train/), so a serving unit compiles
// in a fraction of the time <tenon/tenon.hpp> takes (docs/design/layout.md).
// Reading CSV files (prep/csv.hpp) is left out: it needs exceptions, and a
// serving host reads its rows its own way.
#pragma once

#include "tenon/version.hpp"

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"
#include "tenon/format/model_file.hpp"
#include "tenon/prep/plan.hpp"
#include "tenon/prep/reference.hpp"
#include "tenon/serve/drift.hpp"
#include "tenon/serve/predictor.hpp"
