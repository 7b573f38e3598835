// tenon: the one include of a serving program. It loads and checks model
// files, prepares raw rows with the stored plan, predicts with calibrated
// bands or class sets, and measures drift; it includes nothing of training
// (autodiff/, layers/, losses/, update/, train/; docs/design/layout.md).
// A host compiles the loader and the predictor once by linking the CMake
// component tenon::serve (serve/instantiate.cpp), or by hand:
// TENON_SERVE_COMPILED in every unit, and one unit that also defines
// TENON_SERVE_IMPLEMENTATION (explicit instantiations for float and double).
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
