// headroom — d(bias) judged in qualify's case loop: against the certified dS, with the gradients' figures and limits.
//
// A kernel declaring HR_BACKWARD_BIAS_GRAD writes d(bias) = dS under a bias
// mask (kernel_abi.h). These tests run the loop `headroom qualify` runs
// (run_cases with the budget applier and the plain backward, as
// tools/headroom/run_common.cpp sets them up) on bias cases: the sound
// f32_backward_tiled is judged on d(bias) and within budget; the same kernel
// with d(bias) scaled by the softmax scale (the factor s belongs to dQ and dK,
// not to the bias, which is added after the scaling) fails on d_bias alone.
#include <gtest/gtest.h>

#include <cmath>
#include <string>
#include <vector>

#include "headroom/attach.h"
#include "headroom/budget.h"
#include "headroom/generate.h"
#include "headroom/judge_backward.h"
#include "headroom/kernel_abi.h"
#include "headroom/qualify.h"
#include "headroom/record.h"
#include "kernel_list.h"
#include "qualify_support.h"

namespace headroom {
namespace {

// f32_backward_tiled, then d(bias) multiplied by the scale: one defect, in d(bias) only.
std::int32_t bias_times_scale(const hr_backward_problem* p) {
  const std::int32_t status = hr_kernels::f32_backward_tiled.run_backward(p);
  if (status != HR_OK || p->d_bias == nullptr) return status;
  const hr_mask& m = p->forward.mask;
  const std::int64_t n = m.extents[0] * m.extents[1] * m.extents[2] * m.extents[3];
  for (std::int64_t e = 0; e < n; ++e) p->d_bias[e] *= p->forward.scale;
  return status;
}

// Bias cases of two shapes: a bias per query head, and (seed-drawn, masks.cpp)
// one shared by the heads, whose d(bias) sums the heads' dS.
std::vector<PlannedCase> bias_cases() {
  std::vector<PlannedCase> out;
  for (std::uint64_t seed : {1u, 2u, 3u}) {
    CaseRequest req;
    req.family = "gradient_cancellation";
    req.seed = seed;
    req.size = 30;
    req.shape = CoreShape{1, 4, 2, 6, 20, 16, 8};
    req.mask = MaskKind::bias;
    out.push_back({make_case(req), req, {}, {}});
  }
  return out;
}

RunRecord qualify(AttachedKernel& k) { return testing::qualify_backward_in_process(k, bias_cases()); }

TEST(QualifyBiasGradient, SoundKernelIsJudgedOnDBiasAndPasses) {
  const auto k = attach_in_process(&hr_kernels::f32_backward_tiled);
  const RunRecord r = qualify(*k);
  ASSERT_EQ(r.cases.size(), 3u);
  bool shared = false, per_head = false;
  for (const CaseRecord& c : r.cases) {
    SCOPED_TRACE(c.name);
    ASSERT_TRUE(c.backward);
    EXPECT_TRUE(c.backward->bias_judged);
    EXPECT_TRUE(c.within_budget);
    const GradientFigures& g = c.backward->fed_exact[3];
    EXPECT_GT(g.max_scaled_error, 0);  // float32 arithmetic: not exact
    EXPECT_LE(g.max_scaled_error, c.limits.max_gradient_scaled_error);
    EXPECT_GT(g.cosine, 0.999);
    EXPECT_EQ(g.ratio_to_plain, 1.0);  // it is the plain backward
  }
  // Both bias shapes met (the seed draws 1 or Hq heads).
  for (const PlannedCase& p : bias_cases()) (p.c.core.mask.bias.shape[1] == 1 ? shared : per_head) = true;
  EXPECT_TRUE(shared && per_head);
}

TEST(QualifyBiasGradient, ADBiasScaledBySFailsOnDBiasAlone) {
  hr_kernel wrong = hr_kernels::f32_backward_tiled;
  wrong.name = "bias_times_scale";
  wrong.run_backward = bias_times_scale;
  const auto k = attach_in_process(&wrong);
  const RunRecord r = qualify(*k);
  ASSERT_EQ(r.cases.size(), 3u);
  EXPECT_EQ(r.verdict(), "fail");
  for (const CaseRecord& c : r.cases) {
    SCOPED_TRACE(c.name);
    ASSERT_TRUE(c.backward);
    EXPECT_FALSE(c.within_budget);
    // dQ, dK, dV are the sound kernel's: only d(bias) is outside the limit, far outside.
    for (std::size_t t = 0; t < 3; ++t)
      EXPECT_LE(c.backward->fed_exact[t].max_scaled_error, c.limits.max_gradient_scaled_error) << kGradientNames[t];
    EXPECT_GT(c.backward->fed_exact[3].max_scaled_error, 100 * c.limits.max_gradient_scaled_error);
    ASSERT_FALSE(c.reasons.empty());
    bool scaled_error = false;
    for (const std::string& reason : c.reasons) {
      EXPECT_EQ(reason.rfind("d_bias ", 0), 0u) << reason;
      scaled_error |= reason.rfind("d_bias max_gradient_scaled_error", 0) == 0;
    }
    EXPECT_TRUE(scaled_error);
    // Round trip: the record names d_bias, and reading it back keeps it judged.
    EXPECT_TRUE(to_json(c)["backward"]["fed_exact"].contains("d_bias"));
  }
  RunRecord written = r;
  written.command = "qualify";
  const RunRecord back = run_record_from_json(to_json(written), "r.json");
  EXPECT_TRUE(back.cases[0].backward->bias_judged);
  EXPECT_EQ(back.cases[0].backward->fed_exact[3].max_scaled_error, r.cases[0].backward->fed_exact[3].max_scaled_error);
}

}  // namespace
}  // namespace headroom
