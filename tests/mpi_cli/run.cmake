# `mpirun -np 2 tenon train ...` with the real binary: every rank trains on
# its share of the rows, rank 0 alone prints the summary (counting every
# rank's rows) and writes the model and metrics, and the job succeeds. Then
# two failures, each under a timeout (a hang fails the test): one rank
# failing before training (every rank ends with a status and a message), and
# the ranks refusing each other while they train (the job is aborted).
# Arguments: -DMPIEXEC=... -DMPI_FLAGS="a;b" -DTOOL=... -DWORK_DIR=...
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
  TIMEOUT 120
  RESULT_VARIABLE status OUTPUT_VARIABLE out ERROR_VARIABLE err)
if(NOT status EQUAL 0)
  message(FATAL_ERROR "mpirun tenon train failed (${status}):\n${out}\n${err}")
endif()
string(REGEX MATCHALL "model written to" written "${out}")
list(LENGTH written times)
if(NOT times EQUAL 1)
  message(FATAL_ERROR "expected one summary (rank 0's), found ${times}:\n${out}")
endif()
# 200 rows, 70 % for training: 140, of which each rank held 70.
string(FIND "${out}" "140 training rows" counted)
if(counted EQUAL -1)
  message(FATAL_ERROR "expected the summary to count both ranks' 140 training rows:\n${out}")
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

# Rank 1 alone cannot read its data file (two app contexts): every rank ends
# with a status before training, rank 1 with its error, rank 0 with
# train.team.member_failed; nothing is aborted.
execute_process(
  COMMAND ${MPIEXEC} ${MPI_FLAGS} -n 1 ${TOOL} train --data ${WORK_DIR}/press.csv --target force --epochs 2 --hidden 8
          : -n 1 ${TOOL} train --data ${WORK_DIR}/absent.csv --target force --epochs 2 --hidden 8
  TIMEOUT 120
  RESULT_VARIABLE status OUTPUT_VARIABLE out ERROR_VARIABLE err)
if(NOT status EQUAL 2)
  message(FATAL_ERROR "one rank without its data: expected exit status 2, got '${status}':\n${out}\n${err}")
endif()
foreach(text "[prep.file.open]" "[train.team.member_failed] tenon train: team member 1 of 2 failed")
  string(FIND "${out}${err}" "${text}" at)
  if(at EQUAL -1)
    message(FATAL_ERROR "one rank without its data: expected '${text}':\n${out}\n${err}")
  endif()
endforeach()
string(FIND "${out}${err}" "MPI_ABORT" aborted)
if(NOT aborted EQUAL -1)
  message(FATAL_ERROR "one rank without its data: the job was aborted instead of ending normally:\n${out}\n${err}")
endif()
message(STATUS "one rank without its data: every rank ended with status 2 before training")

# The ranks build networks of other sizes: the trainer refuses on every rank
# once training has begun, and the job is aborted (MPI_Abort) with status 2.
execute_process(
  COMMAND ${MPIEXEC} ${MPI_FLAGS} -n 1 ${TOOL} train --data ${WORK_DIR}/press.csv --target force --epochs 2 --hidden 8
          : -n 1 ${TOOL} train --data ${WORK_DIR}/press.csv --target force --epochs 2 --hidden 9
  TIMEOUT 120
  RESULT_VARIABLE status OUTPUT_VARIABLE out ERROR_VARIABLE err)
if(NOT status EQUAL 2)
  message(FATAL_ERROR "ranks with other networks: expected exit status 2, got '${status}':\n${out}\n${err}")
endif()
# Open MPI's own "MPI_ABORT" banner is not checked: when both ranks abort at
# the same moment, Open MPI 4.1 sometimes loses it ("ORTE_ERROR_LOG: Data
# unpack would read past end of buffer in file .../show_help.c", seen once in
# four runs on this project's CI machine); the status and the message are
# tenon's.
foreach(text "tenon train: error: [train.team.mismatch]" "the team's members disagree on the parameters")
  string(FIND "${out}${err}" "${text}" at)
  if(at EQUAL -1)
    message(FATAL_ERROR "ranks with other networks: expected '${text}':\n${out}\n${err}")
  endif()
endforeach()
message(STATUS "ranks with other networks: the job was aborted with status 2")
