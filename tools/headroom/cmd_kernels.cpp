// headroom kernels — list the bundled kernels and flawed specimens with their declarations.
//
//   headroom kernels          one kernel a line: name, "flawed expect=<fault>" for a
//                             specimen, the declaration summary, then the method
//                             (or, for a specimen, its deliberate defect)
//   headroom kernels --names  names alone, one a line (for scripts and shell completion)
#include <algorithm>
#include <cstdio>
#include <memory>
#include <string>

#include "command.h"
#include "headroom/bundled_registry.h"
#include "headroom/kernel.h"

namespace headroom::cli {
namespace {

int kernels_main(bool names_only) {
  const auto& all = bundled_kernels();
  if (names_only) {
    for (const BundledKernel& k : all) std::printf("%s\n", k.declaration.name.c_str());
    return 0;
  }
  std::size_t width = 0;
  for (const BundledKernel& k : all) width = std::max(width, k.declaration.name.size());
  for (const BundledKernel& k : all) {
    const std::string mark = k.flawed ? "flawed expect=" + k.expected_fault + " " : "";
    const std::string tail = k.flawed ? "defect: " + k.defect : k.declaration.description;
    std::printf("%-*s  %s%s  -- %s\n", static_cast<int>(width), k.declaration.name.c_str(), mark.c_str(),
                declaration_summary(k.declaration).c_str(), tail.c_str());
  }
  return 0;
}

const CommandRegistration reg{"kernels", 50, [](CLI::App& app) {
  auto* cmd = app.add_subcommand("kernels", "List the bundled kernels and flawed specimens with their declarations");
  auto names = std::make_shared<bool>(false);
  cmd->add_flag("--names", *names, "print the names alone, one a line");
  cmd->callback([names] { exit_with(kernels_main(*names)); });
}};

}  // namespace
}  // namespace headroom::cli
