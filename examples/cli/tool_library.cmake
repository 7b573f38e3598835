# The `tenon` tool's code as a static library: tenon_cli (main.cpp), the cli
# tests, the error registry test, the distributed cli test, the fuzzer of the
# command line and tenon_bench_perf link it instead of compiling it each.
#
# tenon_add_tool_library(NAME [OPTIONS flag...] [DEFINITIONS def...] [LIBRARIES lib...])
# A library must be compiled as whatever links it: the global flags
# (CMAKE_CXX_FLAGS: the sanitizer stages) apply to every variant; OPTIONS add
# the fuzzer's instrumentation, DEFINITIONS and LIBRARIES a BLAS build. The
# tool's code does not depend on TENON_HAS_MPI (only main.cpp does), so one
# library serves the MPI and the plain builds.
set(TENON_TOOL_SOURCES
  cli.cpp options.cpp text.cpp json_output.cpp output_files.cpp data.cpp
  train.cpp infer.cpp inspect.cpp retrain.cpp drift.cpp)
list(TRANSFORM TENON_TOOL_SOURCES PREPEND "${CMAKE_CURRENT_LIST_DIR}/")
set(TENON_TOOL_DIR "${CMAKE_CURRENT_LIST_DIR}")

function(tenon_add_tool_library name)
  cmake_parse_arguments(ARG "" "" "OPTIONS;DEFINITIONS;LIBRARIES" ${ARGN})
  add_library(${name} STATIC ${TENON_TOOL_SOURCES})
  # tool.hpp is "cli/tool.hpp" from examples/ and "tool.hpp" from examples/cli/.
  target_include_directories(${name} PUBLIC "${TENON_TOOL_DIR}/.." "${TENON_TOOL_DIR}")
  # With TENON_WITH_BLAS the tool's products go through the BLAS, as every
  # program linking the library does (the definition is public through tenon::blas).
  target_link_libraries(${name} PUBLIC tenon::tenon $<TARGET_NAME_IF_EXISTS:tenon::blas> ${ARG_LIBRARIES})
  # The loader, the predictor and the training entry points compiled once,
  # in the library's two instance units (core/compiled_once.hpp).
  target_link_libraries(${name} PRIVATE tenon::serve tenon::train)
  target_compile_definitions(${name} PUBLIC ${ARG_DEFINITIONS})
  target_compile_options(${name} PRIVATE ${ARG_OPTIONS})
  if(CMAKE_CXX_COMPILER_ID MATCHES "GNU|Clang")
    target_compile_options(${name} PRIVATE -Wall -Wextra -Wpedantic -Wshadow -Wconversion -Wno-sign-conversion -Werror)
  endif()
endfunction()

if(TENON_BUILD_TESTS OR TENON_BUILD_EXAMPLES OR TENON_BUILD_BENCHMARKS)
  tenon_add_tool_library(tenon_tool)
endif()
