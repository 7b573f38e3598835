# A host built without exceptions, run with --raise: tenon::raise() must call
# the host's failure handler with the code and the one-line message, then
# abort (the process must not exit normally).
execute_process(COMMAND "${HOST}" --raise RESULT_VARIABLE result OUTPUT_VARIABLE out ERROR_VARIABLE err)
if(result EQUAL 0)
  message(FATAL_ERROR "the host exited normally after a failure; expected an abort (stderr: ${err})")
endif()
string(FIND "${err}" "host handler saw [core.argument.invalid] a failure asked for\\nby the test" at)
if(at EQUAL -1)
  message(FATAL_ERROR "the failure handler did not see the code and the one-line message; stderr was:\n${err}")
endif()
message(STATUS "the host's handler saw the failure, then the process ended (${result})")
