// headroom tests — `headroom kernels` lists every bundled kernel, one a line (tools/headroom/cmd_kernels.cpp).
#include <sys/wait.h>

#include <cstdio>
#include <sstream>
#include <string>
#include <vector>

#include <gtest/gtest.h>

#include "headroom/bundled_registry.h"

namespace headroom {
namespace {

struct Output {
  int status = -1;
  std::vector<std::string> lines;
};

Output run(const std::string& args) {
  Output out;
  // Appended piece by piece: GCC 12 at -O1 warns falsely (-Warray-bounds) on the chained operator+.
  std::string command = HEADROOM_CLI;
  command.append(" ").append(args).append(" 2>/dev/null");
  FILE* p = popen(command.c_str(), "r");
  if (p == nullptr) return out;
  std::string text;
  char buf[4096];
  for (std::size_t n; (n = std::fread(buf, 1, sizeof buf, p)) > 0;) text.append(buf, n);
  const int st = pclose(p);
  out.status = WIFEXITED(st) ? WEXITSTATUS(st) : -1;
  std::istringstream in(text);
  for (std::string line; std::getline(in, line);) out.lines.push_back(line);
  return out;
}

TEST(CliKernels, NamesAloneOneALine) {
  const Output o = run("kernels --names");
  ASSERT_EQ(o.status, 0);
  const auto& all = bundled_kernels();
  ASSERT_EQ(o.lines.size(), all.size());
  for (std::size_t i = 0; i < all.size(); ++i) EXPECT_EQ(o.lines[i], all[i].declaration.name);
}

TEST(CliKernels, EveryKernelWithItsDeclarationSpecimensMarked) {
  const Output o = run("kernels");
  ASSERT_EQ(o.status, 0);
  const auto& all = bundled_kernels();
  ASSERT_EQ(o.lines.size(), all.size());
  for (std::size_t i = 0; i < all.size(); ++i) {
    const std::string& line = o.lines[i];
    const BundledKernel& k = all[i];
    EXPECT_EQ(line.rfind(k.declaration.name + " ", 0), 0u) << line;
    EXPECT_NE(line.find(declaration_summary(k.declaration)), std::string::npos) << line;
    const bool marked = line.find(" flawed expect=" + k.expected_fault + " ") != std::string::npos;
    EXPECT_EQ(marked, k.flawed) << line;
    if (k.flawed) {
      EXPECT_NE(line.find("defect: " + k.defect), std::string::npos) << line;
    }
  }
}

}  // namespace
}  // namespace headroom
