# Finds MPFR and the GMP it stands on; defines the imported target MPFR::MPFR.
find_path(MPFR_INCLUDE_DIR mpfr.h)
find_library(MPFR_LIBRARY mpfr)
find_path(GMP_INCLUDE_DIR gmp.h)
find_library(GMP_LIBRARY gmp)
include(FindPackageHandleStandardArgs)
find_package_handle_standard_args(MPFR REQUIRED_VARS MPFR_LIBRARY MPFR_INCLUDE_DIR GMP_LIBRARY GMP_INCLUDE_DIR)
if(MPFR_FOUND AND NOT TARGET MPFR::MPFR)
  add_library(MPFR::GMP UNKNOWN IMPORTED)
  set_target_properties(MPFR::GMP PROPERTIES IMPORTED_LOCATION "${GMP_LIBRARY}"
                        INTERFACE_INCLUDE_DIRECTORIES "${GMP_INCLUDE_DIR}")
  add_library(MPFR::MPFR UNKNOWN IMPORTED)
  set_target_properties(MPFR::MPFR PROPERTIES IMPORTED_LOCATION "${MPFR_LIBRARY}"
                        INTERFACE_INCLUDE_DIRECTORIES "${MPFR_INCLUDE_DIR}"
                        INTERFACE_LINK_LIBRARIES MPFR::GMP)
endif()
mark_as_advanced(MPFR_INCLUDE_DIR MPFR_LIBRARY GMP_INCLUDE_DIR GMP_LIBRARY)
