// The one unit of a serving host that compiles the loader and the predictor
// (<tenon/serve.hpp>, compiled-once mode); the host's other units define
// TENON_SERVE_COMPILED.
#define TENON_SERVE_IMPLEMENTATION
#include <tenon/serve.hpp>
