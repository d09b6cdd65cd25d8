// Self-qualification: every sound bundled kernel passes its documented budget on
// the quick suite, and every flawed specimen is caught by its intended fault
// class (not only by an unrelated one). Both run the headroom command line
// itself, so they judge exactly as `qualify` and `replay` do: isolation, the
// plain-kernel comparison, determinism runs and the budget file (strict).
#include <gtest/gtest.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <string>

#include "cli_support.h"
#include "headroom/bundled_registry.h"
#include "headroom/record.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;

using testing::kTool;
const std::string kBudget = std::string(HEADROOM_SOURCE_DIR) + "/budgets/bundled.toml";

// Runs `headroom <args> --json <tmp>` and returns the record it wrote, with its exit code in *code.
RunRecord run_cli(const std::string& args, const std::string& tag, int* code) {
  const fs::path out = fs::temp_directory_path() / ("headroom_selfcheck_" + tag + "_" + std::to_string(::getpid()) + ".json");
  const std::string line = kTool + " " + args + " --budget " + kBudget + " --strict-budget --time-limit 5 --threads 2 " +
                           "--quiet --json " + out.string() + " --journal " + out.string() + ".journal >/dev/null";
  const int status = std::system(line.c_str());
  *code = WIFEXITED(status) ? WEXITSTATUS(status) : -1;
  RunRecord r = read_run_record(out);
  fs::remove(out);
  return r;
}

class SoundKernel : public ::testing::TestWithParam<std::string> {};

TEST_P(SoundKernel, PassesItsBudgetOnTheQuickSuite) {
  int code = -1;
  const RunRecord r = run_cli("qualify --kernel " + GetParam() + " --suite quick", GetParam(), &code);
  EXPECT_EQ(code, 0);
  double worst = 0;
  std::string worst_case;
  for (const auto& c : r.cases) {
    EXPECT_TRUE(c.within_budget) << c.name << ": " << (c.reasons.empty() ? "" : c.reasons.front())
                                 << "\n  replay: " << c.replay;
    EXPECT_TRUE(c.faults.empty()) << c.name << " has a fault: " << (c.fault_details.empty() ? "" : c.fault_details.front());
    if (c.figures.max_scaled_error > worst) {
      worst = c.figures.max_scaled_error;
      worst_case = c.name;
    }
  }
  // Always print the worst figure seen, pass or fail.
  std::printf("%s: %zu cases, %zu skipped, worst scaled error %.3g (%s)\n", GetParam().c_str(), r.cases.size(),
              r.skipped.size(), worst, worst_case.c_str());
  EXPECT_GT(r.cases.size(), 0u);
}

std::vector<std::string> sound_names() {
  std::vector<std::string> names;
  for (const auto& b : bundled_kernels())
    if (!b.flawed) names.push_back(b.declaration.name);
  return names;
}

INSTANTIATE_TEST_SUITE_P(Bundled, SoundKernel, ::testing::ValuesIn(sound_names()),
                         [](const auto& info) { return info.param; });

// Each specimen replays its corpus folder (corpora/<name>/, made by `hunt`).
class FlawedSpecimen : public ::testing::TestWithParam<std::string> {};

TEST_P(FlawedSpecimen, CorpusCatchesItWithItsIntendedClass) {
  const BundledKernel* b = find_bundled(GetParam());
  ASSERT_NE(b, nullptr);
  const fs::path dir = fs::path(HEADROOM_SOURCE_DIR) / "corpora" / b->declaration.name;
  ASSERT_TRUE(fs::is_directory(dir)) << "no corpus for " << b->declaration.name << " in " << dir;
  int code = -1;
  const RunRecord r = run_cli("replay --determinism-runs 3 --kernel " + GetParam() + " " + dir.string(), GetParam(), &code);
  EXPECT_EQ(code, 1);
  ASSERT_FALSE(r.cases.empty());
  int caught = 0;
  for (const auto& c : r.cases) {
    if (b->expected_fault == "error") {
      // No fault class covers this defect: the error itself must fail the case, with no fault.
      if (!c.within_budget && c.faults.empty()) ++caught;
    } else if (c.faults.count(b->expected_fault)) {
      ++caught;
    }
  }
  EXPECT_GT(caught, 0) << b->declaration.name << " was not caught as " << b->expected_fault << " by its corpus";
  EXPECT_EQ(r.verdict(), "fail");
  std::printf("%s: %d of %zu corpus cases caught as %s\n", GetParam().c_str(), caught, r.cases.size(),
              b->expected_fault.c_str());
}

std::vector<std::string> flawed_names() {
  std::vector<std::string> names;
  for (const auto& b : bundled_kernels())
    if (b.flawed) names.push_back(b.declaration.name);
  return names;
}

INSTANTIATE_TEST_SUITE_P(Bundled, FlawedSpecimen, ::testing::ValuesIn(flawed_names()),
                         [](const auto& info) { return info.param; });

}  // namespace
}  // namespace headroom
