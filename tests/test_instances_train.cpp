// The compiled-once modes for the tests (core/compiled_once.hpp): this unit
// compiles the training entry points once per build, and every test
// executable's own units see TENON_SERVE_COMPILED and TENON_TRAIN_COMPILED
// (test_instances_serve.cpp compiles the loader and the predictor; two units
// so that the two cores of a build share them). The macros come before the
// first include, since the first include of core/compiled_once.hpp reads them.
#define TENON_SERVE_COMPILED
#define TENON_TRAIN_IMPLEMENTATION
#include <tenon/train/authoring.hpp>
#include <tenon/train/calibration.hpp>
#include <tenon/train/retraining.hpp>
#include <tenon/train/search.hpp>
#include <tenon/train/workflow.hpp>
