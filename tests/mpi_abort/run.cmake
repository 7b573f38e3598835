# A rank that fails alone ends the whole job instead of leaving the other
# ranks waiting (distributed/communicator.hpp: end_mpi_job, mpi_session).
# Each mode of the probe runs on 2 ranks under a timeout: a hang fails the
# test. Arguments: -DMPIEXEC=... -DMPI_FLAGS="a;b" -DPROBE=...
function(run_probe mode expected_status expected_text)
  execute_process(
    COMMAND ${MPIEXEC} -n 2 ${MPI_FLAGS} ${PROBE} ${mode}
    TIMEOUT 60
    RESULT_VARIABLE status OUTPUT_VARIABLE out ERROR_VARIABLE err)
  if(NOT status MATCHES "^[0-9]+$")
    message(FATAL_ERROR "mode ${mode}: the job did not end (${status}):\n${out}\n${err}")
  endif()
  if(NOT status EQUAL ${expected_status})
    message(FATAL_ERROR "mode ${mode}: expected exit status ${expected_status}, got ${status}:\n${out}\n${err}")
  endif()
  string(FIND "${out}${err}" "${expected_text}" at)
  if(at EQUAL -1)
    message(FATAL_ERROR "mode ${mode}: expected '${expected_text}' in the output:\n${out}\n${err}")
  endif()
  if(NOT mode STREQUAL "none")
    string(FIND "${out}${err}" "passed the collective call" passed)
    if(NOT passed EQUAL -1)
      message(FATAL_ERROR "mode ${mode}: a rank passed the collective call rank 1 never made:\n${out}\n${err}")
    endif()
  endif()
  message(STATUS "mode ${mode}: exit status ${status} as expected")
endfunction()

run_probe(none 0 "rank 1 passed the collective call (sum 2)")
run_probe(end-job 3 "rank 1: probe: rank 1 fails alone before the collective call")
run_probe(session 1 "rank 1: an exception left the scope of the MPI session")
