// headroom — the bundled kernels and flawed specimens, by name.
//
// A view of kernels/bundled.h's table with each declaration already read and
// checked (kernel.h). Specimens carry one deliberate defect and the fault
// class that must catch it.
#pragma once

#include <string>
#include <string_view>
#include <vector>

#include "headroom/kernel.h"

struct hr_kernel;

namespace headroom {

struct BundledKernel {
  const hr_kernel* kernel = nullptr;
  KernelDeclaration declaration;
  bool flawed = false;
  std::string expected_fault;  ///< specimens: a run status / fault class name, or "error"; else empty
  std::string defect;          ///< specimens: the deliberate defect, one line; else empty
};

/// Returns: every bundled kernel and specimen, in table order. Built once.
/// Throws InputError when a table row holds a bad declaration or a name is
/// used twice (a bug in kernels/, reported like any plug-in's).
const std::vector<BundledKernel>& bundled_kernels();

/// Returns: the bundled kernel named `name`, or nullptr.
const BundledKernel* find_bundled(std::string_view name);

}  // namespace headroom
