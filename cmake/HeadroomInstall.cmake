# Installs headroom as a CMake package: the `headroom` executable, the stage
# libraries and the bundled kernels (static), the public headers, and
# headroomConfig.cmake so a user's build can `find_package(headroom)` and use
# headroom::harness, headroom::kernel_abi, headroom::headroom and
# headroom_add_qualification(). Included from the top CMakeLists.txt only when
# HEADROOM_INSTALL is ON. tools/check_downstream.sh proves the result works.
include(GNUInstallDirs)
include(CMakePackageConfigHelpers)

set(headroom_cmake_dir "${CMAKE_INSTALL_LIBDIR}/cmake/headroom")

# Consumers name the targets headroom::<stage>, headroom::kernels, headroom::harness.
get_property(headroom_stage_targets GLOBAL PROPERTY HEADROOM_STAGES)
foreach(target IN LISTS headroom_stage_targets)
  string(REPLACE "headroom_" "" short "${target}")
  set_target_properties(${target} PROPERTIES EXPORT_NAME ${short})
endforeach()
set_target_properties(headroom_kernels PROPERTIES EXPORT_NAME kernels)
set_target_properties(headroom_harness PROPERTIES EXPORT_NAME harness)
set_target_properties(headroom_kernel_abi PROPERTIES EXPORT_NAME kernel_abi)
set(headroom_installed_targets ${headroom_stage_targets} headroom_kernels headroom_harness headroom_kernel_abi)
if(TARGET headroom)
  set_target_properties(headroom PROPERTIES EXPORT_NAME headroom)
  list(APPEND headroom_installed_targets headroom)
endif()

install(TARGETS ${headroom_installed_targets} EXPORT headroomTargets
  RUNTIME DESTINATION ${CMAKE_INSTALL_BINDIR}
  ARCHIVE DESTINATION ${CMAKE_INSTALL_LIBDIR})
install(DIRECTORY "${PROJECT_SOURCE_DIR}/harness/include/headroom"
  DESTINATION ${CMAKE_INSTALL_INCLUDEDIR} FILES_MATCHING PATTERN "*.h")
install(EXPORT headroomTargets NAMESPACE headroom:: DESTINATION ${headroom_cmake_dir})

configure_package_config_file("${PROJECT_SOURCE_DIR}/cmake/headroomConfig.cmake.in"
  "${PROJECT_BINARY_DIR}/headroomConfig.cmake" INSTALL_DESTINATION ${headroom_cmake_dir})
write_basic_package_version_file("${PROJECT_BINARY_DIR}/headroomConfigVersion.cmake"
  VERSION ${PROJECT_VERSION} COMPATIBILITY SameMinorVersion)
install(FILES "${PROJECT_BINARY_DIR}/headroomConfig.cmake" "${PROJECT_BINARY_DIR}/headroomConfigVersion.cmake"
  "${PROJECT_SOURCE_DIR}/cmake/FindMPFR.cmake" "${PROJECT_SOURCE_DIR}/cmake/HeadroomQualify.cmake"
  DESTINATION ${headroom_cmake_dir})
