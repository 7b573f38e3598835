# Turns every ```cpp block of README.md into code of one test program, so
# the README's examples are compiled and run and cannot rot
# (tests/CMakeLists.txt, target tenon_readme_blocks).
#
#   cmake -DREADME=README.md -DOUTPUT=readme_blocks.cpp -P extract_blocks.cmake
#
# The rules are generic, nothing is written per block:
#  - a block that has an #include line starts a new example; a block without
#    one continues the example before it (the README's later blocks go on
#    from the variables of earlier ones);
#  - #include lines go to the top of the file; every other line of an
#    example becomes the body of a function readme_example_N(), run by main
#    (tests/readme/readme_main.hpp) in a scratch directory;
#  - every "NAME.csv" the blocks mention is written there first, an invented
#    press log with missing targets and cells (tests/readme/press_data.hpp).
# Each example's README line is kept (#line), so a compiler error or a
# failure names the README line.
cmake_minimum_required(VERSION 3.16)

file(READ "${README}" text)
# CMake lists split at ';' and treat '[' ']' specially: park them.
string(REPLACE ";" "@SEMICOLON@" text "${text}")
string(REPLACE "[" "@OPEN_BRACKET@" text "${text}")
string(REPLACE "]" "@CLOSE_BRACKET@" text "${text}")
string(REPLACE "\\" "@BACKSLASH@" text "${text}")
string(REPLACE "\n" ";" lines "${text}")

set(includes "")
set(bodies "")
set(examples 0)
set(in_block FALSE)
set(line_number 0)
set(csv_files "")
foreach(line IN LISTS lines)
  math(EXPR line_number "${line_number} + 1")
  if(NOT in_block)
    if(line MATCHES "^```cpp[ \t]*$")
      set(in_block TRUE)
      set(block_start ${line_number})
      set(block_includes "")
      set(block_body "")
    endif()
    continue()
  endif()
  if(line MATCHES "^```[ \t]*$")
    set(in_block FALSE)
    if(block_includes OR examples EQUAL 0)
      math(EXPR examples "${examples} + 1")
      string(APPEND bodies "${close_previous}static void readme_example_${examples}() {\n")
      set(close_previous "}\n\n")
    endif()
    math(EXPR first_body_line "${block_start} + 1")
    string(APPEND bodies "#line ${first_body_line} \"README.md\"\n${block_body}")
    string(APPEND includes "${block_includes}")
    continue()
  endif()
  if(line MATCHES "^[ \t]*#include")
    string(APPEND block_includes "${line}\n")
    set(line "")  # kept as an empty line, so #line numbers stay right
  endif()
  string(APPEND block_body "${line}\n")
  string(REGEX MATCHALL "\"[A-Za-z0-9_.-]+\\.csv\"" found "${line}")
  foreach(name IN LISTS found)
    string(REPLACE "\"" "" name "${name}")
    if(NOT name IN_LIST csv_files)
      list(APPEND csv_files "${name}")
    endif()
  endforeach()
endforeach()
if(examples EQUAL 0)
  message(FATAL_ERROR "${README} has no ```cpp block")
endif()
string(APPEND bodies "${close_previous}")

set(out "// Generated from README.md by tests/readme/extract_blocks.cmake; do not edit.\n")
string(APPEND out "#include \"readme_main.hpp\"\n${includes}\n${bodies}\n")
string(APPEND out "static const readme_test::example readme_examples[] = {\n")
foreach(k RANGE 1 ${examples})
  string(APPEND out "    {${k}, &readme_example_${k}},\n")
endforeach()
string(APPEND out "}@SEMICOLON@\nstatic const char* const readme_csv_files[] = {")
foreach(name IN LISTS csv_files)
  string(APPEND out "\"${name}\", ")
endforeach()
string(APPEND out "nullptr}@SEMICOLON@\n\n")
string(APPEND out "int main() { return readme_test::run(readme_examples, readme_csv_files)@SEMICOLON@ }\n")

string(REPLACE "@SEMICOLON@" ";" out "${out}")
string(REPLACE "@OPEN_BRACKET@" "[" out "${out}")
string(REPLACE "@CLOSE_BRACKET@" "]" out "${out}")
string(REPLACE "@BACKSLASH@" "\\" out "${out}")
if(EXISTS "${OUTPUT}")
  file(READ "${OUTPUT}" previous)
  if(previous STREQUAL out)
    return()  # unchanged: no rebuild
  endif()
endif()
file(WRITE "${OUTPUT}" "${out}")
