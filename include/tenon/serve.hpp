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

// The compiled-once mode: declarations of the instantiations every serving
// unit would otherwise compile again (C++17 [temp.explicit]: an explicit
// instantiation declaration suppresses implicit instantiation of what it
// names, except inline functions), and their definitions in the one unit
// that asks for them. So the predictor's entry points are defined out of
// its class (not inline): a body in the class would still be instantiated
// and optimized in every unit, for inlining.
#if defined(TENON_SERVE_IMPLEMENTATION)
#define TENON_DETAIL_SERVE_INSTANCE template
#elif defined(TENON_SERVE_COMPILED)
#define TENON_DETAIL_SERVE_INSTANCE extern template
#endif
#if defined(TENON_DETAIL_SERVE_INSTANCE)
TENON_NAMESPACE_BEGIN
TENON_DETAIL_SERVE_INSTANCE class predictor<float>;
TENON_DETAIL_SERVE_INSTANCE class predictor<double>;
TENON_DETAIL_SERVE_INSTANCE load_status try_load_model_file<float>(const std::string&, model_file<float>&, const model_limits&);
TENON_DETAIL_SERVE_INSTANCE load_status try_load_model_file<double>(const std::string&, model_file<double>&, const model_limits&);
TENON_DETAIL_SERVE_INSTANCE model_file<float> load_model_file<float>(const std::string&, const model_limits&);
TENON_DETAIL_SERVE_INSTANCE model_file<double> load_model_file<double>(const std::string&, const model_limits&);
TENON_DETAIL_SERVE_INSTANCE model_file<float> model_file_from_bytes<float>(const std::uint8_t*, std::size_t, const model_limits&, const std::string&);
TENON_DETAIL_SERVE_INSTANCE model_file<double> model_file_from_bytes<double>(const std::uint8_t*, std::size_t, const model_limits&,
                                                                             const std::string&);
TENON_NAMESPACE_END
#undef TENON_DETAIL_SERVE_INSTANCE
#endif
