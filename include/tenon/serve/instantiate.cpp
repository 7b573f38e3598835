// tenon: the one unit that compiles the loader and the predictor (float and
// double) for a host target linking the CMake component tenon::serve, which
// adds this file to the host's sources and defines TENON_SERVE_COMPILED for
// the host's other units (the compiled-once mode of <tenon/serve.hpp>).
#define TENON_SERVE_IMPLEMENTATION
#include "tenon/serve.hpp"
