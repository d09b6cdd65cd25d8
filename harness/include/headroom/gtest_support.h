// headroom — GoogleTest support: assert that a kernel is within budget on a case folder.
//
// Header-only, so a user's test needs only headroom::harness and GTest:
//
//   TEST(MyKernel, WithinBudgetOnTheCorpusCase) {
//     EXPECT_TRUE(headroom::WithinBudget("/path/to/libmy_kernel.so", "cases/gaussian-s17-..."));
//   }
//
// The case is judged as `headroom replay --kernel <spec> <case_dir>` judges it:
// isolated run, determinism check, certified reference, the ratio to the
// bundled plain kernel of the same formats, then the budget (a budget file, or
// the built-in defaults); a kernel with a backward entry has its dQ, dK, dV
// judged too, and the message gives each one's max scaled error fed the exact
// O and lse and end to end. A failure message carries every reason, the fault
// details and the one command that replays the case.
#pragma once

#include <gtest/gtest.h>

#include <algorithm>
#include <filesystem>
#include <memory>
#include <sstream>
#include <string>
#include <thread>
#include <vector>

#include "headroom/attach.h"
#include "headroom/budget.h"
#include "headroom/judge.h"
#include "headroom/judge_backward.h"
#include "headroom/case_folder.h"
#include "headroom/input_error.h"
#include "headroom/qualify.h"

namespace headroom {
/// Returns: success when kernel `kernel_spec` (a bundled kernel's name, or a
/// path to a plug-in .so) is within budget on the case stored in `case_dir`,
/// judged against `budget_file` (TOML, docs/budget-format.md) or, when it is
/// empty, the built-in defaults. Otherwise a failure whose message names the
/// case, each reason and fault, and the replay command. A case the kernel does
/// not declare support for, or bad input (a missing kernel, a broken case
/// folder or budget file: InputError), is a failure too, never a pass.
inline ::testing::AssertionResult WithinBudget(const std::string& kernel_spec, const std::filesystem::path& case_dir,
                                               const std::string& budget_file = "") {
  try {
    auto kernel = attach_kernel(kernel_spec);
    auto plain = plain_kernel_for(kernel->declaration());
    auto plain_backward = plain_backward_for(kernel->declaration());
    const Budget budget = budget_file.empty() ? Budget{} : load_budget(budget_file);

    RunnerOptions opt;
    opt.judge.detect.run.isolate = true;  // a crashing kernel fails the test, not the test binary
    opt.judge.detect.determinism_runs = 3;
    opt.judge.detect.reference.threads = std::max(1u, std::thread::hardware_concurrency());
    opt.judge.plain = plain.get();
    opt.judge.plain_backward = plain_backward.get();
    opt.kernel_spec = kernel_spec;
    opt.judging_options = (budget_file.empty() ? std::string() : " --budget " + shell_quote(budget_file)) +
                          " --determinism-runs 3";
    opt.apply_budget = budget_applier(budget.for_kernel(kernel->declaration()));

    const std::vector<PlannedCase> cases{planned(case_dir)};
    const RunRecord record = run_cases(*kernel, cases, opt);
    if (record.cases.empty()) {
      std::ostringstream why;
      why << kernel_spec << " was not run on " << case_dir.string() << ": ";
      why << (record.skipped.empty() ? std::string("no case judged") : record.skipped.front());
      return ::testing::AssertionFailure() << why.str();
    }
    const CaseRecord& c = record.cases.front();
    const bool ok = c.within_budget;  // faults not tolerated by the budget already fail it
    auto result = ok ? ::testing::AssertionSuccess() : ::testing::AssertionFailure();
    result << kernel_spec << " on " << c.name << (ok ? " is within " : " is NOT within ") << "budget ("
           << budget.source << "), max scaled error " << c.figures.max_scaled_error;
    if (c.backward) {  // a backward kernel: each gradient's max scaled error, both ways (docs/backward.md)
      result << "; gradients judged, max scaled error fed the exact O and lse / end to end:";
      for (std::size_t t = 0; t < c.backward->tensors(); ++t) {
        result << (t ? "," : "") << " " << kGradientNames[t] << " " << c.backward->fed_exact[t].max_scaled_error << " / ";
        if (c.backward->end_to_end_judged) {
          result << c.backward->end_to_end[t].max_scaled_error;
        } else {
          result << "not judged";
        }
      }
    } else if (kernel->declaration().backward) {
      result << "; gradients not judged on this case";
    }
    for (const auto& r : c.reasons) result << "\n  reason: " << r;
    for (const auto& f : c.fault_details) result << "\n  fault: " << f;
    result << "\n  replay: " << c.replay;
    return result;
  } catch (const InputError& e) {
    return ::testing::AssertionFailure() << e.what();
  }
}

}  // namespace headroom
