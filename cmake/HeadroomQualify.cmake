# headroom_add_qualification(<test-name> KERNEL <shared-library target>
#                            [SUITE quick|standard|deep] [BUDGET <file>]
#                            [LENIENT_BUDGET] [ARGS ...])
#
# Registers a CTest test that runs
#   headroom qualify --kernel $<TARGET_FILE:target> --suite <suite> [--budget <file>] --strict-budget [ARGS...]
# --strict-budget (left out with LENIENT_BUDGET) makes a budget section that
# names no kernel of the run an error: a misspelt section would otherwise leave
# the intended limits unused and the test pass under the defaults.
# headroom exits 0 when every case is within budget and 1 otherwise, so the
# test fails on an out-of-budget kernel. SUITE defaults to quick. Works from
# the installed package (headroom::headroom) and inside headroom's own tree.
function(headroom_add_qualification name)
  cmake_parse_arguments(ARG "LENIENT_BUDGET" "KERNEL;SUITE;BUDGET" "ARGS" ${ARGN})
  if(NOT ARG_KERNEL)
    message(FATAL_ERROR "headroom_add_qualification(${name}): KERNEL <shared-library target> is required")
  endif()
  if(NOT TARGET ${ARG_KERNEL})
    message(FATAL_ERROR "headroom_add_qualification(${name}): KERNEL ${ARG_KERNEL} is not a target")
  endif()
  if(NOT ARG_SUITE)
    set(ARG_SUITE quick)
  endif()
  if(NOT ARG_SUITE MATCHES "^(quick|standard|deep)$")
    message(FATAL_ERROR "headroom_add_qualification(${name}): SUITE must be quick, standard or deep, not ${ARG_SUITE}")
  endif()
  if(TARGET headroom::headroom)
    set(cli headroom::headroom)
  elseif(TARGET headroom)
    set(cli headroom)
  else()
    message(FATAL_ERROR "headroom_add_qualification(${name}): no headroom executable (find_package(headroom) first)")
  endif()
  set(budget)
  if(ARG_BUDGET)
    get_filename_component(budget_path "${ARG_BUDGET}" ABSOLUTE BASE_DIR "${CMAKE_CURRENT_SOURCE_DIR}")
    set(budget --budget "${budget_path}")
  endif()
  set(strict --strict-budget)
  if(ARG_LENIENT_BUDGET)
    set(strict)
  endif()
  # The journal goes to the build tree, one per test, so runs never share one.
  add_test(NAME ${name}
    COMMAND $<TARGET_FILE:${cli}> qualify --kernel $<TARGET_FILE:${ARG_KERNEL}> --suite ${ARG_SUITE}
            ${budget} ${strict} --journal "${CMAKE_CURRENT_BINARY_DIR}/${name}.journal" --quiet ${ARG_ARGS})
  set_tests_properties(${name} PROPERTIES LABELS headroom)
endfunction()
