// tenon: the one unit that compiles the training entry points (fit_model,
// make_model_file, retrain_model, calibration and search; float and double)
// for a host target linking the CMake component tenon::train, which adds
// this file to the host's sources and defines TENON_TRAIN_COMPILED for the
// host's other units (core/compiled_once.hpp).
#define TENON_TRAIN_IMPLEMENTATION
#include "tenon/train/authoring.hpp"
#include "tenon/train/calibration.hpp"
#include "tenon/train/retraining.hpp"
#include "tenon/train/search.hpp"
#include "tenon/train/workflow.hpp"
