# Serving apart from training, checked at the compiler:
#  1. the include list of <tenon/serve.hpp> holds nothing from autodiff/,
#     layers/, losses/, update/ or train/ (and, as a control that the check
#     can fail, the include for everything does hold train/);
#  2. compile times, measured in this run with the build's flags. Enforced:
#     a unit including <tenon/tenon.hpp> takes at most 5 s, and a serving
#     unit (load a model, predict one row) in the compiled-once mode
#     (TENON_SERVE_COMPILED, serve.hpp) at most 3x a unit using xtensor
#     alone; these three are compiled in turn, five rounds, and each one's
#     least time counts (the others carry the machine's noise, which comes
#     in stretches of seconds, so each round sees the same stretch); a miss
#     is measured again over five more rounds before it fails the test.
#     Reported, compiled once: the same serving unit header-only, split into
#     the front end (-fsyntax-only) and the rest (optimizing and generating
#     the loader, predictor and kernels it calls).
# Inputs: CXX, FLAGS (one string, as on a command line), SOURCE_DIR, WORK_DIR.
separate_arguments(FLAGS UNIX_COMMAND "${FLAGS}")
set(units "${SOURCE_DIR}/tests/compile_budget")
set(includes "-I${SOURCE_DIR}/include")
file(MAKE_DIRECTORY "${WORK_DIR}")

function(include_list unit out)
  execute_process(COMMAND ${CXX} ${FLAGS} ${includes} -M "${units}/${unit}"
    RESULT_VARIABLE rc OUTPUT_VARIABLE deps ERROR_VARIABLE err)
  if(NOT rc EQUAL 0)
    message(FATAL_ERROR "listing the includes of ${unit} failed:\n${err}")
  endif()
  set(${out} "${deps}" PARENT_SCOPE)
endfunction()

include_list(serve_unit.cpp serve_deps)
if(NOT serve_deps MATCHES "tenon/serve/predictor\\.hpp")
  message(FATAL_ERROR "the serving unit's include list does not name tenon/serve/predictor.hpp:\n${serve_deps}")
endif()
string(REGEX MATCHALL "[^ \\\\\n]*tenon/(autodiff|layers|losses|update|train)/[^ \\\\\n]*" forbidden "${serve_deps}")
if(forbidden)
  list(REMOVE_DUPLICATES forbidden)
  string(REPLACE ";" "\n  " forbidden "${forbidden}")
  message(FATAL_ERROR "<tenon/serve.hpp> includes training headers:\n  ${forbidden}")
endif()
include_list(everything_unit.cpp all_deps)
if(NOT all_deps MATCHES "tenon/train/trainer\\.hpp")
  message(FATAL_ERROR "control failed: the include for everything does not list tenon/train/trainer.hpp, so the check above proves nothing")
endif()
message(STATUS "include list: <tenon/serve.hpp> holds nothing of autodiff/, layers/, losses/, update/, train/")

# Milliseconds of one compilation of unit (the arguments after out are
# added to the command line).
function(compile_ms unit out)
  execute_process(COMMAND date +%s%N OUTPUT_VARIABLE t0 OUTPUT_STRIP_TRAILING_WHITESPACE)
  execute_process(COMMAND ${CXX} ${FLAGS} ${ARGN} ${includes} -c "${units}/${unit}" -o "${WORK_DIR}/${unit}.o"
    RESULT_VARIABLE rc ERROR_VARIABLE err)
  execute_process(COMMAND date +%s%N OUTPUT_VARIABLE t1 OUTPUT_STRIP_TRAILING_WHITESPACE)
  if(NOT rc EQUAL 0)
    message(FATAL_ERROR "compiling ${unit} failed:\n${err}")
  endif()
  math(EXPR ms "(${t1} - ${t0}) / 1000000")
  set(${out} ${ms} PARENT_SCOPE)
endfunction()

# Rounds first..last of the three enforced units, keeping each one's least time.
macro(measure_rounds first last)
  foreach(round RANGE ${first} ${last})
    compile_ms(xtensor_unit.cpp xt)
    compile_ms(serve_unit.cpp compiled -DTENON_SERVE_COMPILED)
    compile_ms(everything_unit.cpp all)
    foreach(name xt compiled all)
      if(round EQUAL 1 OR ${name} LESS ${name}_ms)
        set(${name}_ms ${${name}})
      endif()
    endforeach()
  endforeach()
  math(EXPR compiled_x100 "${compiled_ms} * 100 / ${xt_ms}")
endmacro()
set(rounds 5)
measure_rounds(1 ${rounds})
# A slow stretch of the machine can outlast five rounds (seen once locally:
# everything 5859 ms, against 4.0-4.2 s in the runs around it). A miss is
# confirmed by five more rounds; the least times of all ten count.
if(compiled_x100 GREATER 300 OR all_ms GREATER 5000)
  message(STATUS "after ${rounds} rounds: serving unit compiled-once ${compiled_x100}/100 of xtensor alone, everything ${all_ms} ms; "
                 "a budget is missed, five more rounds")
  measure_rounds(6 10)
  set(rounds 10)
endif()
compile_ms(serve_unit.cpp serve_ms)
compile_ms(serve_unit.cpp serve_front_ms -fsyntax-only)
math(EXPR ratio_x100 "${serve_ms} * 100 / ${xt_ms}")
math(EXPR serve_back_ms "${serve_ms} - ${serve_front_ms}")
message(STATUS "compile times (least of ${rounds} rounds): xtensor alone ${xt_ms} ms; serving unit compiled-once ${compiled_ms} ms "
               "(${compiled_x100}/100 of xtensor alone; budget 300/100); everything ${all_ms} ms (budget 5000 ms)")
message(STATUS "compiled once, reported: serving unit header-only ${serve_ms} ms (${ratio_x100}/100 of xtensor alone): "
               "front end (parsing and instantiating, -fsyntax-only) ${serve_front_ms} ms, "
               "optimizing and generating the code it calls ${serve_back_ms} ms")
if(compiled_x100 GREATER 300)
  message(FATAL_ERROR "a serving unit in the compiled-once mode takes ${compiled_ms} ms to compile, ${compiled_x100}/100 of the ${xt_ms} ms "
                      "of a unit using xtensor alone, more than the budget of 300/100")
endif()
if(all_ms GREATER 5000)
  message(FATAL_ERROR "the include for everything takes ${all_ms} ms to compile, more than the budget of 5000 ms")
endif()
