# Wraps a text file (INPUT) in a C++ raw string literal (OUTPUT) to be #included as an expression: the
# workbench page is built into the server, so it serves nothing from outside the program.
file(READ "${INPUT}" content)
string(FIND "${content}" ")galena_embed\"" clash)
if(NOT clash EQUAL -1)
  message(FATAL_ERROR "${INPUT} contains the raw-string delimiter )galena_embed\"")
endif()
file(WRITE "${OUTPUT}" "// Generated from ${INPUT} by cmake/embed_text.cmake; do not edit.\nR\"galena_embed(${content})galena_embed\"\n")
