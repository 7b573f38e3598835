# Installs tenon into a temporary prefix, then configures, builds and runs a
# separate host project that finds it with find_package(tenon CONFIG REQUIRED).
cmake_minimum_required(VERSION 3.16)

file(REMOVE_RECURSE "${WORK_DIR}")
set(build "${WORK_DIR}/tenon-build")
set(prefix "${WORK_DIR}/prefix")
set(host_build "${WORK_DIR}/host-build")

function(step)
  execute_process(COMMAND ${ARGN} RESULT_VARIABLE rc OUTPUT_VARIABLE out ERROR_VARIABLE err)
  if(NOT rc EQUAL 0)
    message(FATAL_ERROR "step failed (${rc}): ${ARGN}\n${out}\n${err}")
  endif()
  message(STATUS "${out}")
endfunction()

step(${CMAKE_COMMAND} -S "${SOURCE_DIR}" -B "${build}" -G "${GENERATOR}"
     -DCMAKE_CXX_COMPILER=${CXX_COMPILER} -DCMAKE_INSTALL_PREFIX=${prefix}
     -DTENON_BUILD_TESTS=OFF -DTENON_BUILD_BENCHMARKS=OFF -DTENON_BUILD_EXAMPLES=OFF)
step(${CMAKE_COMMAND} --install "${build}")
if(NOT EXISTS "${prefix}/share/cmake/tenon/tenonConfig.cmake")
  message(FATAL_ERROR "tenonConfig.cmake was not installed")
endif()
step(${CMAKE_COMMAND} -S "${SOURCE_DIR}/tests/install_consumer/host" -B "${host_build}" -G "${GENERATOR}"
     -DCMAKE_CXX_COMPILER=${CXX_COMPILER} -DCMAKE_PREFIX_PATH=${prefix} -DCMAKE_BUILD_TYPE=Release)
step(${CMAKE_COMMAND} --build "${host_build}")
step("${host_build}/tenon_host")

# The same host with tenon added as a subdirectory instead of installed.
set(sub_build "${WORK_DIR}/host-subdir-build")
step(${CMAKE_COMMAND} -S "${SOURCE_DIR}/tests/install_consumer/host" -B "${sub_build}" -G "${GENERATOR}"
     -DCMAKE_CXX_COMPILER=${CXX_COMPILER} -DTENON_SOURCE_DIR=${SOURCE_DIR} -DCMAKE_BUILD_TYPE=Release)
step(${CMAKE_COMMAND} --build "${sub_build}")
step("${sub_build}/tenon_host")
