// The compiled-once modes for the tests (core/compiled_once.hpp): this unit
// compiles the loader, the predictor and the training entry points once per
// build, and every test executable's own units see TENON_SERVE_COMPILED and
// TENON_TRAIN_COMPILED. Both macros come before the first include, since the
// first include of core/compiled_once.hpp reads them.
#define TENON_SERVE_IMPLEMENTATION
#define TENON_TRAIN_IMPLEMENTATION
#include <tenon/serve.hpp>
#include <tenon/train/authoring.hpp>
#include <tenon/train/calibration.hpp>
#include <tenon/train/retraining.hpp>
#include <tenon/train/search.hpp>
#include <tenon/train/workflow.hpp>
