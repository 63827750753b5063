# estgen-config.cmake -- the CMake package of estgen.
#
#   cmake -Destgen_DIR="$(estgen --cmake-dir)" ...
#   find_package(estgen CONFIG REQUIRED)
#   estgen_add_filter(<target> MODEL <model.py> FILTER ekf|ukf|pf
#                     [PRECISION float|double] [OPTIONS <more estgen generate arguments>...])
#
# estgen_add_filter generates the filter in the build tree at build time
# (${CMAKE_CURRENT_BINARY_DIR}/estgen/<target>_<filter>/), adds its .c to <target>, that
# folder to <target>'s include path and the math library (m) to its link. The generate step depends on the model file and, through
# the dependency file `estgen generate --depfile` writes, on every local Python file the model
# imports: it reruns when one of them changes and never otherwise. PRECISION defaults to float,
# the build `estgen generate` ships. Configuring runs the estgen command once per filter to learn
# the generated file names (the model's name); a change of the model file re-runs that too.
#
# ESTGEN_EXECUTABLE: the estgen command (default: found beside this package's Python, then on
# PATH). It may be a list, e.g. -DESTGEN_EXECUTABLE="/opt/py/bin/python3;-m;estgen".
# Needs CMake 3.20 or newer (DEPFILE for every generator).

if(CMAKE_VERSION VERSION_LESS 3.20)
  set(estgen_FOUND FALSE)
  set(estgen_NOT_FOUND_MESSAGE "estgen needs CMake 3.20 or newer (this is ${CMAKE_VERSION})")
  return()
endif()

include_guard(GLOBAL)

get_filename_component(_estgen_pkg_dir "${CMAKE_CURRENT_LIST_DIR}" DIRECTORY)
if(NOT ESTGEN_EXECUTABLE)
  # a virtual environment: <venv>/lib/pythonX.Y/site-packages/estgen/cmake -> <venv>/bin
  find_program(ESTGEN_EXECUTABLE NAMES estgen
               HINTS "${_estgen_pkg_dir}/../../../../bin" "${_estgen_pkg_dir}/../../../Scripts"
               DOC "the estgen command")
endif()
if(NOT ESTGEN_EXECUTABLE)
  set(estgen_FOUND FALSE)
  set(estgen_NOT_FOUND_MESSAGE
      "the estgen command was not found; install it (pip install estgen) or set -DESTGEN_EXECUTABLE=")
  return()
endif()

function(estgen_add_filter target)
  cmake_parse_arguments(PARSE_ARGV 1 _eg "" "MODEL;FILTER;PRECISION" "OPTIONS")
  if(_eg_UNPARSED_ARGUMENTS)
    message(FATAL_ERROR "estgen_add_filter(${target}): unknown arguments: ${_eg_UNPARSED_ARGUMENTS}")
  endif()
  if(NOT TARGET ${target})
    message(FATAL_ERROR "estgen_add_filter(${target}): no target named ${target}; call add_executable or add_library first")
  endif()
  if(NOT _eg_MODEL)
    message(FATAL_ERROR "estgen_add_filter(${target}): MODEL <model.py> is required")
  endif()
  if(NOT _eg_FILTER MATCHES "^(ekf|ukf|pf)$")
    message(FATAL_ERROR "estgen_add_filter(${target}): FILTER must be ekf, ukf or pf (got '${_eg_FILTER}')")
  endif()
  if(NOT _eg_PRECISION)
    set(_eg_PRECISION float)
  endif()
  if(NOT _eg_PRECISION MATCHES "^(float|double)$")
    message(FATAL_ERROR "estgen_add_filter(${target}): PRECISION must be float or double (got '${_eg_PRECISION}')")
  endif()
  get_filename_component(_model "${_eg_MODEL}" ABSOLUTE BASE_DIR "${CMAKE_CURRENT_SOURCE_DIR}")
  if(NOT EXISTS "${_model}")
    message(FATAL_ERROR "estgen_add_filter(${target}): model file not found: ${_eg_MODEL}")
  endif()
  set(_out "${CMAKE_CURRENT_BINARY_DIR}/estgen/${target}_${_eg_FILTER}")
  set(_gen_args "${_model}" --filter ${_eg_FILTER} --precision ${_eg_PRECISION} ${_eg_OPTIONS} -o "${_out}")

  # The output names follow the model's name: ask estgen (loads the model, generates nothing).
  execute_process(COMMAND ${ESTGEN_EXECUTABLE} generate ${_gen_args} --outputs
                  OUTPUT_VARIABLE _outputs ERROR_VARIABLE _err RESULT_VARIABLE _rc
                  OUTPUT_STRIP_TRAILING_WHITESPACE)
  if(NOT _rc EQUAL 0)
    message(FATAL_ERROR "estgen_add_filter(${target}): ${_err}")
  endif()
  string(REPLACE "\n" ";" _outputs "${_outputs}")
  set_property(DIRECTORY APPEND PROPERTY CMAKE_CONFIGURE_DEPENDS "${_model}")

  set(_depfile "${_out}/generate.d")
  add_custom_command(
    OUTPUT ${_outputs}
    COMMAND ${ESTGEN_EXECUTABLE} generate ${_gen_args} --depfile "${_depfile}" --quiet
    DEPENDS "${_model}"
    DEPFILE "${_depfile}"
    COMMENT "estgen: ${_eg_FILTER} (${_eg_PRECISION}) from ${_eg_MODEL}"
    VERBATIM)
  target_sources(${target} PRIVATE ${_outputs})
  target_include_directories(${target} PUBLIC "${_out}")
  # the generated C calls <math.h> (sqrtf, ...): link the math library where it is separate.
  # set_property, not target_link_libraries: it leaves the caller free to use either signature.
  if(NOT MSVC)
    set_property(TARGET ${target} APPEND PROPERTY LINK_LIBRARIES m)
    set_property(TARGET ${target} APPEND PROPERTY INTERFACE_LINK_LIBRARIES m)
  endif()
endfunction()

set(estgen_FOUND TRUE)
