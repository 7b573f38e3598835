// The loader and the predictor, compiled once for the tests (see
// test_instances_train.cpp).
#define TENON_SERVE_IMPLEMENTATION
#include <tenon/serve.hpp>
