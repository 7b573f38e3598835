# Writes the man page tenon.1 from the tool's own help, so the page cannot
# drift from `tenon --help`: run at build time by the tenon_man target
# (examples/CMakeLists.txt) as
#   cmake -DTOOL=<path to tenon> -DOUTPUT=<tenon.1> -P tenon_man_page.cmake
# The commands are read from the "Commands" list of `tenon --help`; each gets
# a section holding `tenon COMMAND --help`. The text is set verbatim (.nf), so
# the page reads like the help, with roff's special characters escaped.
cmake_minimum_required(VERSION 3.16)

function(run_help out_var)
  execute_process(COMMAND "${TOOL}" ${ARGN} RESULT_VARIABLE rc OUTPUT_VARIABLE text ERROR_VARIABLE err)
  if(NOT rc EQUAL 0)
    message(FATAL_ERROR "tenon ${ARGN} failed (${rc}): ${err}")
  endif()
  set(${out_var} "${text}" PARENT_SCOPE)
endfunction()

# roff: a backslash is written \e, a line starting with . or ' is protected
# with \&, and a hyphen is \- (a minus sign, so options can be searched and
# copied).
function(roff_verbatim out_var text)
  string(REPLACE "\\" "\\e" text "${text}")
  string(REPLACE "-" "\\-" text "${text}")
  string(REGEX REPLACE "(^|\n)([.'])" "\\1\\\\&\\2" text "${text}")
  set(${out_var} ".nf\n${text}\n.fi\n" PARENT_SCOPE)
endfunction()

run_help(general --help)
run_help(version --version)
string(STRIP "${version}" version)

# The first line reads "tenon X.Y.Z: what the tool does".
string(REGEX MATCH "^[^\n]*" first_line "${general}")
string(REGEX REPLACE "^[^:]*: *" "" purpose "${first_line}")
string(REPLACE "-" "\\-" purpose "${purpose}")

# Commands: the lines "  name  summary" after the line "Commands".
string(REGEX MATCH "\nCommands\n(  [^\n]*\n)+" command_block "${general}")
string(REGEX MATCHALL "\n  [a-z][a-z_-]*  " command_lines "${command_block}")
set(commands "")
foreach(line IN LISTS command_lines)
  string(STRIP "${line}" name)
  list(APPEND commands "${name}")
endforeach()
if(NOT commands)
  message(FATAL_ERROR "no commands found in the output of '${TOOL} --help'")
endif()

set(page ".\\\" Generated from the output of tenon --help by cmake/tenon_man_page.cmake.\n")
string(APPEND page ".TH TENON 1 \"\" \"${version}\" \"User Commands\"\n")
string(APPEND page ".SH NAME\ntenon \\- ${purpose}\n")
string(APPEND page ".SH SYNOPSIS\n.B tenon\n.I COMMAND\n[\\fIoptions\\fR]\n.br\n.B tenon\n\\-\\-help | \\-\\-version\n")
# Everything after the first line (REGEX REPLACE with ^ would match again
# at every line, since CMake restarts the anchor after each replacement).
string(FIND "${general}" "\n" first_newline)
math(EXPR body_start "${first_newline} + 1")
string(SUBSTRING "${general}" ${body_start} -1 general_body)
roff_verbatim(body "${general_body}")
string(APPEND page ".SH DESCRIPTION\n${body}")
foreach(name IN LISTS commands)
  run_help(command_help ${name} --help)
  roff_verbatim(body "${command_help}")
  string(TOUPPER "${name}" upper)
  string(APPEND page ".SH \"TENON ${upper}\"\n${body}")
endforeach()

file(WRITE "${OUTPUT}.tmp" "${page}")
file(RENAME "${OUTPUT}.tmp" "${OUTPUT}")
