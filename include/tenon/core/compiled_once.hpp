// tenon: the spelling of the compiled-once modes. A host that defines
// TENON_SERVE_COMPILED (or TENON_TRAIN_COMPILED) in every unit and compiles
// one more unit with TENON_SERVE_IMPLEMENTATION (TENON_TRAIN_IMPLEMENTATION)
// compiles the loader and the predictor (the training entry points) once, for
// float and double. The instance lines at the end of the headers that define
// them are explicit instantiation declarations in the first units and
// definitions in the last (C++17 [temp.explicit]: a declaration suppresses
// implicit instantiation of what it names, except inline functions).
#pragma once

#if defined(TENON_SERVE_IMPLEMENTATION)
#define TENON_DETAIL_SERVE_INSTANCE template
#elif defined(TENON_SERVE_COMPILED)
#define TENON_DETAIL_SERVE_INSTANCE extern template
#endif

#if defined(TENON_TRAIN_IMPLEMENTATION)
#define TENON_DETAIL_TRAIN_INSTANCE template
#elif defined(TENON_TRAIN_COMPILED)
#define TENON_DETAIL_TRAIN_INSTANCE extern template
#endif
