// headroom — bundled kernels by name, and resolving the kernel a user names (bundled_registry.h, attach.h).
#include <set>
#include <string>

#include "bundled.h"
#include "headroom/attach.h"
#include "headroom/bundled_registry.h"
#include "headroom/input_error.h"

namespace headroom {
namespace {

constexpr const char* kTableFile = "kernels/bundled.cpp";

std::vector<BundledKernel> read_table() {
  std::size_t n = 0;
  const hr_bundled_kernel* rows = headroom_bundled_kernels(&n);
  std::vector<BundledKernel> out;
  std::set<std::string> names;
  for (std::size_t i = 0; i < n; ++i) {
    BundledKernel k;
    k.kernel = rows[i].kernel;
    k.declaration = declaration_of(rows[i].kernel, std::string(kTableFile) + " row " + std::to_string(i));
    k.flawed = rows[i].flawed != 0;
    if (rows[i].expected_fault != nullptr) k.expected_fault = rows[i].expected_fault;
    if (rows[i].defect != nullptr) k.defect = rows[i].defect;
    if (k.flawed && (k.expected_fault.empty() || k.defect.empty())) {
      throw InputError(kTableFile, "row " + std::to_string(i), "specimen \"" + k.declaration.name +
                       "\" lacks its expected fault or its defect", "fill both fields of its hr_bundled_kernel row");
    }
    if (!names.insert(k.declaration.name).second) {
      throw InputError(kTableFile, "row " + std::to_string(i), "kernel name \"" + k.declaration.name + "\" used twice",
                       "give every bundled kernel a unique name");
    }
    out.push_back(std::move(k));
  }
  return out;
}

bool ends_with(const std::string& s, std::string_view tail) {
  return s.size() >= tail.size() && s.compare(s.size() - tail.size(), tail.size(), tail) == 0;
}

}  // namespace

const std::vector<BundledKernel>& bundled_kernels() {
  static const std::vector<BundledKernel> table = read_table();
  return table;
}

const BundledKernel* find_bundled(std::string_view name) {
  for (const BundledKernel& k : bundled_kernels()) {
    if (k.declaration.name == name) return &k;
  }
  return nullptr;
}

std::unique_ptr<AttachedKernel> attach_kernel(const std::string& spec) {
  if (spec.find('/') != std::string::npos || ends_with(spec, ".so")) return attach_library(spec);
  if (const BundledKernel* k = find_bundled(spec)) return attach_in_process(k->kernel);
  throw InputError(spec, "kernel name", "no bundled kernel is named \"" + spec + "\"",
                   "run `headroom kernels --names` to list the bundled kernels, or give the path of a plug-in "
                   "library (a name containing '/' or ending in .so)");
}

}  // namespace headroom
