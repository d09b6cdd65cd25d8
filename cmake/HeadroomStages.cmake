# One static library per pipeline stage: harness/<stage>/*.cpp becomes
# headroom_<stage>, linking only the stages upstream of it, so the one-way data
# flow of DESIGN.md is enforced by the linker. headroom::harness bundles them all.
function(headroom_add_stage stage)
  cmake_parse_arguments(ARG "" "" "UPSTREAM;LIBS;PCH" ${ARGN})
  file(GLOB sources CONFIGURE_DEPENDS "${CMAKE_CURRENT_SOURCE_DIR}/${stage}/*.cpp")
  set(deps)
  foreach(up IN LISTS ARG_UPSTREAM)
    list(APPEND deps headroom_${up})
  endforeach()
  if(NOT sources)  # a stage not written yet still links
    add_library(headroom_${stage} INTERFACE)
    target_include_directories(headroom_${stage} INTERFACE $<BUILD_INTERFACE:${PROJECT_SOURCE_DIR}/harness/include>)
    target_link_libraries(headroom_${stage} INTERFACE ${deps} ${ARG_LIBS})
    return()
  endif()
  add_library(headroom_${stage} STATIC ${sources})
  target_include_directories(headroom_${stage}
    PUBLIC  $<BUILD_INTERFACE:${PROJECT_SOURCE_DIR}/harness/include> $<INSTALL_INTERFACE:include>
    PRIVATE ${CMAKE_CURRENT_SOURCE_DIR})
  target_link_libraries(headroom_${stage} PUBLIC ${deps} ${ARG_LIBS})
  # Heavy third-party headers most files of the stage include, parsed once per
  # stage rather than once per file: the build is CI's largest cost on 2 cores.
  if(ARG_PCH)
    target_precompile_headers(headroom_${stage} PRIVATE ${ARG_PCH})
  endif()
  set_property(GLOBAL APPEND PROPERTY HEADROOM_STAGES headroom_${stage})
endfunction()

# The test framework's headers, precompiled once for every test executable
# (GoogleTest alone is ~2 s of each test file's compile; ~100 test files, built
# twice in CI). Its own tiny executable so that the flags (-fPIE, definitions)
# match those of the tests that reuse it; a test's extra definitions are allowed
# because the precompiled headers do not use them.
function(headroom_test_pch_anchor)
  if(TARGET headroom_test_pch)
    return()
  endif()
  add_executable(headroom_test_pch "${PROJECT_SOURCE_DIR}/tests/test_pch_anchor.cpp")
  target_link_libraries(headroom_test_pch PRIVATE GTest::gtest rapidcheck rapidcheck_gtest)
  target_compile_definitions(headroom_test_pch PRIVATE
    HEADROOM_SOURCE_DIR="${PROJECT_SOURCE_DIR}" HEADROOM_BINARY_DIR="${PROJECT_BINARY_DIR}")
  target_precompile_headers(headroom_test_pch PRIVATE
    <gtest/gtest.h> <rapidcheck.h> <rapidcheck/gtest.h>
    <algorithm> <cmath> <cstdint> <filesystem> <fstream> <functional> <map> <memory>
    <optional> <sstream> <string> <string_view> <vector>)
  headroom_test_compile_options(headroom_test_pch)
endfunction()

# Test files are compiled at -O1 in the Release build and at -O0 in the
# sanitized one: most of their compile time is optimising GoogleTest's
# generated code (under ASan + UBSan, report_test takes 38.7 s at -O1 and
# 12.8 s at -O0), while the work they drive runs in the libraries, built at
# the project's own level.
function(headroom_test_compile_options target)
  if(HEADROOM_SANITIZE)
    target_compile_options(${target} PRIVATE -O0)
  elseif(CMAKE_BUILD_TYPE STREQUAL "Release")
    target_compile_options(${target} PRIVATE -O1)
  endif()
endfunction()

# Adds one GoogleTest file as its own executable and registers its tests with CTest.
function(headroom_add_test source)
  cmake_parse_arguments(ARG "" "" "LIBS" ${ARGN})
  get_filename_component(name "${source}" NAME_WE)
  headroom_test_pch_anchor()
  add_executable(${name} "${source}")
  target_link_libraries(${name} PRIVATE ${ARG_LIBS} GTest::gtest GTest::gtest_main rapidcheck rapidcheck_gtest)
  target_compile_definitions(${name} PRIVATE
    HEADROOM_SOURCE_DIR="${PROJECT_SOURCE_DIR}" HEADROOM_BINARY_DIR="${PROJECT_BINARY_DIR}")
  target_precompile_headers(${name} REUSE_FROM headroom_test_pch)
  headroom_test_compile_options(${name})
  gtest_discover_tests(${name} TEST_PREFIX "${name}." DISCOVERY_TIMEOUT 60 PROPERTIES TIMEOUT 600)
endfunction()
