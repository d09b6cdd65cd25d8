// Self-qualification: every sound bundled kernel passes its documented budget on
// the quick suite, and every flawed specimen is caught by its intended fault
// class (not only by an unrelated one), through the same loop `qualify` runs.
#include <gtest/gtest.h>

#include <algorithm>
#include <cstdio>
#include <filesystem>
#include <string>

#include "headroom/bundled_registry.h"
#include "headroom/case_folder.h"
#include "headroom/generate.h"
#include "headroom/qualify.h"
#include "headroom/suite.h"

namespace headroom {
namespace {

std::vector<PlannedCase> quick_suite() {
  std::vector<PlannedCase> cases;
  for (const auto& r : suite_requests("quick")) cases.push_back({make_case(r), r, {}});
  return cases;
}

// The documented budgets of the bundled kernels: budgets/bundled.toml.
Budget bundled_budget() { return load_budget(std::string(HEADROOM_SOURCE_DIR) + "/budgets/bundled.toml"); }

RunnerOptions options_for(const KernelDeclaration& d, const Budget& budget) {
  RunnerOptions opt;
  opt.judge.detect.run.isolate = true;
  opt.judge.detect.run.time_limit_s = 5;
  opt.judge.detect.determinism_runs = 3;
  opt.judge.detect.reference.threads = 2;
  opt.apply_budget = budget_applier(budget.for_kernel(d));
  return opt;
}

class SoundKernel : public ::testing::TestWithParam<std::string> {};

TEST_P(SoundKernel, PassesItsBudgetOnTheQuickSuite) {
  static const auto cases = quick_suite();
  const BundledKernel* b = find_bundled(GetParam());
  ASSERT_NE(b, nullptr);
  auto k = attach_in_process(b->kernel);
  const RunRecord r = run_cases(*k, cases, options_for(b->declaration, bundled_budget()));
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
  const std::filesystem::path dir = std::filesystem::path(HEADROOM_SOURCE_DIR) / "corpora" / b->declaration.name;
  ASSERT_TRUE(std::filesystem::is_directory(dir)) << "no corpus for " << b->declaration.name << " in " << dir;
  std::vector<PlannedCase> cases;
  for (const auto& e : std::filesystem::directory_iterator(dir))
    if (std::filesystem::exists(e.path() / "manifest.json")) cases.push_back({read_case(e.path()), std::nullopt, e.path()});
  ASSERT_FALSE(cases.empty());
  auto k = attach_in_process(b->kernel);
  const RunRecord r = run_cases(*k, cases, options_for(b->declaration, bundled_budget()));
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
