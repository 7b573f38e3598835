# `mpirun -np 2 tenon train ...` with the real binary: every rank trains,
# rank 0 alone prints the summary and writes the model and metrics, and the
# job succeeds. Arguments: -DMPIEXEC=... -DMPI_FLAGS="a;b" -DTOOL=... -DWORK_DIR=...
file(REMOVE_RECURSE "${WORK_DIR}")
file(MAKE_DIRECTORY "${WORK_DIR}")
# An invented hydraulic press: force from pressure and stroke (integers).
set(csv "pressure,stroke,force\n")
foreach(i RANGE 0 199)
  math(EXPR pressure "50 + (${i} * 37) % 150")
  math(EXPR stroke "10 + (${i} * 13) % 70")
  math(EXPR force "(${pressure} * 8) / 10 + (${stroke} * ${stroke}) / 50")
  string(APPEND csv "${pressure},${stroke},${force}\n")
endforeach()
file(WRITE "${WORK_DIR}/press.csv" "${csv}")
execute_process(
  COMMAND ${MPIEXEC} -n 2 ${MPI_FLAGS} ${TOOL} train --data ${WORK_DIR}/press.csv --target force
          --epochs 3 --batch 8 --hidden 8 --model ${WORK_DIR}/press.tnm --metrics ${WORK_DIR}/press.json
  RESULT_VARIABLE status OUTPUT_VARIABLE out ERROR_VARIABLE err)
if(NOT status EQUAL 0)
  message(FATAL_ERROR "mpirun tenon train failed (${status}):\n${out}\n${err}")
endif()
string(REGEX MATCHALL "model written to" written "${out}")
list(LENGTH written times)
if(NOT times EQUAL 1)
  message(FATAL_ERROR "expected one summary (rank 0's), found ${times}:\n${out}")
endif()
foreach(f press.tnm press.json)
  if(NOT EXISTS "${WORK_DIR}/${f}")
    message(FATAL_ERROR "rank 0 did not write ${f}")
  endif()
endforeach()
file(GLOB left "${WORK_DIR}/*")
list(LENGTH left count)
if(NOT count EQUAL 3)
  message(FATAL_ERROR "expected press.csv, press.tnm and press.json only, found: ${left}")
endif()
message(STATUS "mpirun -n 2 tenon train: one summary, model and metrics written by rank 0")
