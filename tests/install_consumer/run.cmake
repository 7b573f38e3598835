# Installs tenon into a temporary prefix, then configures, builds and runs a
# separate host project that finds it with find_package(tenon CONFIG ...):
#  - with MPI, zlib and BLAS made unfindable (CMAKE_DISABLE_FIND_PACKAGE_<name>),
#    as on a machine without them: the core package must still be found;
#  - asking for the gzip component: it must bring zlib in and link;
#  - asking for a REQUIRED component whose dependency is absent, or that does
#    not exist: configuring must fail and say why;
#  - asking for an OPTIONAL component whose dependency is absent: found
#    without it.
cmake_minimum_required(VERSION 3.16)

file(REMOVE_RECURSE "${WORK_DIR}")
set(build "${WORK_DIR}/tenon-build")
set(prefix "${WORK_DIR}/prefix")

function(step)
  execute_process(COMMAND ${ARGN} RESULT_VARIABLE rc OUTPUT_VARIABLE out ERROR_VARIABLE err)
  if(NOT rc EQUAL 0)
    message(FATAL_ERROR "step failed (${rc}): ${ARGN}\n${out}\n${err}")
  endif()
  message(STATUS "${out}")
  set(step_output "${out}" PARENT_SCOPE)
endfunction()

# Runs a command that must fail with output matching `pattern`.
function(step_fails pattern)
  execute_process(COMMAND ${ARGN} RESULT_VARIABLE rc OUTPUT_VARIABLE out ERROR_VARIABLE err)
  if(rc EQUAL 0)
    message(FATAL_ERROR "step should have failed but succeeded: ${ARGN}\n${out}\n${err}")
  endif()
  # CMake wraps its messages; compare with runs of white space made one space.
  string(REGEX REPLACE "[ \t\r\n]+" " " flat "${out}${err}")
  if(NOT flat MATCHES "${pattern}")
    message(FATAL_ERROR "step failed without the expected reason '${pattern}': ${ARGN}\n${out}\n${err}")
  endif()
  message(STATUS "failed as expected (${pattern})")
endfunction()

# The tool and its man page get installed with the headers (GNUInstallDirs
# puts them in bin/ and share/man/man1/). When this build has the tool, the
# install comes from this build (its two targets are brought up to date;
# nothing else is compiled again); otherwise from a build of its own with
# the examples on, of those two targets only.
if(HAS_TOOL)
  step(${CMAKE_COMMAND} --build "${BUILD_DIR}" --target tenon_cli tenon_man)
  step(${CMAKE_COMMAND} --install "${BUILD_DIR}" --prefix "${prefix}")
else()
  step(${CMAKE_COMMAND} -S "${SOURCE_DIR}" -B "${build}" -G "${GENERATOR}"
       -DCMAKE_CXX_COMPILER=${CXX_COMPILER} -DCMAKE_INSTALL_PREFIX=${prefix} -DCMAKE_BUILD_TYPE=Release
       -DTENON_BUILD_TESTS=OFF -DTENON_BUILD_BENCHMARKS=OFF -DTENON_BUILD_EXAMPLES=ON)
  step(${CMAKE_COMMAND} --build "${build}" --target tenon_cli tenon_man)
  step(${CMAKE_COMMAND} --install "${build}")
endif()
set(config_dir "${prefix}/share/cmake/tenon")
if(NOT EXISTS "${config_dir}/tenonConfig.cmake")
  message(FATAL_ERROR "tenonConfig.cmake was not installed")
endif()

# The installed tool runs from the prefix, and its man page holds every
# command's help: the NAME line from `tenon --help`, a section per command,
# and lines of `tenon train --help` (hyphens written as roff's \-), the
# plant-file options among them.
step("${prefix}/bin/tenon" --version)
if(NOT step_output MATCHES "^tenon [0-9]+\\.[0-9]+\\.[0-9]+")
  message(FATAL_ERROR "the installed tenon --version printed: ${step_output}")
endif()
step("${prefix}/bin/tenon" train --help)
set(man_page "${prefix}/share/man/man1/tenon.1")
if(NOT EXISTS "${man_page}")
  message(FATAL_ERROR "the man page was not installed at ${man_page}")
endif()
file(READ "${man_page}" page)
foreach(expected ".TH TENON 1" ".SH NAME\ntenon \\- train" ".SH \"TENON TRAIN\"" ".SH \"TENON INFER\""
                 ".SH \"TENON INSPECT\"" ".SH \"TENON RETRAIN\"" ".SH \"TENON DRIFT\"" "\\-\\-target COLUMN"
                 "\\-\\-delimiter D          the field delimiter: , " "\\-\\-decimal\\-comma        read 59,8 as 59.8"
                 "\\-\\-use COL,COL" "\\-\\-categorical COL,COL" "\\-\\-numeric COL,COL")
  string(FIND "${page}" "${expected}" at)
  if(at EQUAL -1)
    message(FATAL_ERROR "the man page lacks '${expected}':\n${page}")
  endif()
endforeach()

set(host_source "${SOURCE_DIR}/tests/install_consumer/host")
set(host_common -G "${GENERATOR}" -DCMAKE_CXX_COMPILER=${CXX_COMPILER}
                -DCMAKE_PREFIX_PATH=${prefix} -DCMAKE_BUILD_TYPE=Release)
set(no_optional_dependencies -DCMAKE_DISABLE_FIND_PACKAGE_MPI=ON
                             -DCMAKE_DISABLE_FIND_PACKAGE_ZLIB=ON
                             -DCMAKE_DISABLE_FIND_PACKAGE_BLAS=ON)

# 1. The core package on a machine state without MPI, zlib or BLAS.
set(host_build "${WORK_DIR}/host-build")
step(${CMAKE_COMMAND} -S "${host_source}" -B "${host_build}" ${host_common} ${no_optional_dependencies})
step(${CMAKE_COMMAND} --build "${host_build}")
step("${host_build}/tenon_host")

# 2. A host that asks for the gzip component (MPI and BLAS still absent).
#    Only when this build of tenon has it (zlib was found when installing).
if(EXISTS "${config_dir}/tenon_gzipTargets.cmake")
  set(gzip_build "${WORK_DIR}/host-gzip-build")
  step(${CMAKE_COMMAND} -S "${host_source}" -B "${gzip_build}" ${host_common}
       -DTENON_HOST_COMPONENTS=gzip
       -DCMAKE_DISABLE_FIND_PACKAGE_MPI=ON -DCMAKE_DISABLE_FIND_PACKAGE_BLAS=ON)
  step(${CMAKE_COMMAND} --build "${gzip_build}")
  step("${gzip_build}/tenon_host")
  if(NOT step_output MATCHES "tenon host with gzip: ok")
    message(FATAL_ERROR "the gzip host did not exercise zlib:\n${step_output}")
  endif()

  # 3. The gzip component REQUIRED where zlib is absent: not found, and why.
  step_fails("needs ZLIB, which was not found"
       ${CMAKE_COMMAND} -S "${host_source}" -B "${WORK_DIR}/host-gzip-absent" ${host_common}
       -DTENON_HOST_COMPONENTS=gzip ${no_optional_dependencies})
endif()

# 4. The mpi component OPTIONAL where MPI is absent: the package is found,
#    the component is not, and its target is not defined.
set(optional_build "${WORK_DIR}/host-optional-build")
step(${CMAKE_COMMAND} -S "${host_source}" -B "${optional_build}" ${host_common}
     -DTENON_HOST_OPTIONAL_COMPONENTS=mpi ${no_optional_dependencies})
if(NOT step_output MATCHES "tenon optional component mpi: target not defined")
  message(FATAL_ERROR "an optional component without its dependency defined its target:\n${step_output}")
endif()

# 5. The mpi component REQUIRED where MPI is present (when this build has it).
if(EXISTS "${config_dir}/tenon_mpiTargets.cmake")
  step(${CMAKE_COMMAND} -S "${host_source}" -B "${WORK_DIR}/host-mpi-build" ${host_common}
       -DTENON_HOST_COMPONENTS=mpi -DCMAKE_DISABLE_FIND_PACKAGE_ZLIB=ON)
endif()

# 7. The serve and train components, together: the host compiles the loader,
#    the predictor and the training entry points in the two sources they add,
#    from the installed headers, each source in the other's mode.
#    (tenon_serve_compiled_host covers serve alone, from the source tree.)
#    Without optimization (the last CMAKE_BUILD_TYPE given wins): the two
#    units take about 80 s of compilation at -O3 and prove nothing more.
set(train_build "${WORK_DIR}/host-train-build")
step(${CMAKE_COMMAND} -S "${host_source}" -B "${train_build}" ${host_common}
     -DTENON_HOST_COMPONENTS=serve,train ${no_optional_dependencies} -DCMAKE_BUILD_TYPE=)
step(${CMAKE_COMMAND} --build "${train_build}")
step("${train_build}/tenon_host")
if(NOT step_output MATCHES "tenon host with serve: ok" OR NOT step_output MATCHES "tenon host with train: ok")
  message(FATAL_ERROR "the train and serve host did not train and load through the compiled-once units:\n${step_output}")
endif()

# 6. A component that does not exist, REQUIRED: not found, and why.
step_fails("'gpu' is not a tenon component"
     ${CMAKE_COMMAND} -S "${host_source}" -B "${WORK_DIR}/host-unknown-component" ${host_common}
     -DTENON_HOST_COMPONENTS=gpu)

# The same host with tenon added as a subdirectory instead of installed.
set(sub_build "${WORK_DIR}/host-subdir-build")
step(${CMAKE_COMMAND} -S "${host_source}" -B "${sub_build}" -G "${GENERATOR}"
     -DCMAKE_CXX_COMPILER=${CXX_COMPILER} -DTENON_SOURCE_DIR=${SOURCE_DIR} -DCMAKE_BUILD_TYPE=Release)
step(${CMAKE_COMMAND} --build "${sub_build}")
step("${sub_build}/tenon_host")
