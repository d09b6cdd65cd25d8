// headroom tests — qualify's case loop for a backward kernel, in-process.
#pragma once

#include <memory>
#include <vector>

#include "headroom/attach.h"
#include "headroom/budget.h"
#include "headroom/judge_backward.h"
#include "headroom/qualify.h"
#include "headroom/record.h"

namespace headroom::testing {

/// Returns: the record of run_cases over `cases`, set up as `qualify` sets up
/// kernel `k` (the plain same-precision backward for the ratio, the float32
/// default budget), the kernel called in-process.
inline RunRecord qualify_backward_in_process(AttachedKernel& k, const std::vector<PlannedCase>& cases) {
  RunnerOptions opt;
  opt.judge.detect.run.isolate = false;
  const std::unique_ptr<AttachedKernel> plain = plain_backward_for(k.declaration());
  opt.judge.plain_backward = plain.get();
  opt.apply_budget = budget_applier(default_budget(Format::float32));
  return run_cases(k, cases, opt);
}

}  // namespace headroom::testing
