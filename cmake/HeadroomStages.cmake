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

# Adds one GoogleTest file as its own executable and registers its tests with CTest.
function(headroom_add_test source)
  cmake_parse_arguments(ARG "" "" "LIBS" ${ARGN})
  get_filename_component(name "${source}" NAME_WE)
  add_executable(${name} "${source}")
  target_link_libraries(${name} PRIVATE ${ARG_LIBS} GTest::gtest GTest::gtest_main rapidcheck rapidcheck_gtest)
  target_compile_definitions(${name} PRIVATE
    HEADROOM_SOURCE_DIR="${PROJECT_SOURCE_DIR}" HEADROOM_BINARY_DIR="${PROJECT_BINARY_DIR}")
  gtest_discover_tests(${name} TEST_PREFIX "${name}." DISCOVERY_TIMEOUT 60 PROPERTIES TIMEOUT 600)
endfunction()
