// headroom — a key whose weight underflows float32 does not fail a sound float32 backward.
//
// A float32 backward forms P_ij = exp(z_ij − lse_i); a weight below 2^-126
// keeps only a few bits (subnormal) or is flushed, so that key's dK, dV have
// a relative error up to 1 whatever the kernel does. judge_backward adds that
// floor to each element's unit (add_underflow_floor). Here one key's weight is
// e^-102 ≈ 2^-147 (2 significant bits in float32) while its value makes its
// dK normal-sized: before the floor, qualify's loop failed f32_backward_tiled on
// dK with a scaled error in the millions; with it the case is within budget,
// while a dV off by a factor 2 on the normal key still fails.
#include <gtest/gtest.h>

#include <cmath>
#include <string>
#include <vector>

#include "headroom/attach.h"
#include "headroom/budget.h"
#include "headroom/judge_backward.h"
#include "headroom/kernel_abi.h"
#include "headroom/qualify.h"
#include "headroom/record.h"
#include "kernel_list.h"
#include "qualify_support.h"

namespace headroom {
namespace {

// Tq = 1, Tk = 2, Dk = Dv = 1, scale 1: z = (0, −102); V = (2^30, −2^30), dO = 1.
// dS_1 = P_1 (dP_1 − D) ≈ −2^31·e^-102 ≈ −2^-116: normal, though P_1 is not.
Case underflow_case() {
  Case c;
  c.name = "underflow_weight";
  c.level = Level::core;
  c.source_format = Format::float32;
  c.core.shape = CoreShape{1, 1, 1, 1, 2, 1, 1};
  c.core.scale = 1.0f;
  c.core.mask.kind = MaskKind::none;
  c.core_inputs.q = Tensor({1, 1, 1, 1});
  c.core_inputs.q.values = {1.0};
  c.core_inputs.k = Tensor({1, 1, 2, 1});
  c.core_inputs.k.values = {0.0, -102.0};
  c.core_inputs.v = Tensor({1, 1, 2, 1});
  c.core_inputs.v.values = {0x1p30, -0x1p30};
  c.d_o = Tensor({1, 1, 1, 1});
  c.d_o.values = {1.0};
  return c;
}

// f32_backward_tiled with key 0's dV (= P_0·dO ≈ 1) doubled: wrong beyond any rounding.
std::int32_t doubled_dv(const hr_backward_problem* p) {
  const std::int32_t status = hr_kernels::f32_backward_tiled.run_backward(p);
  static_cast<float*>(p->d_v.data)[0] *= 2.0f;
  return status;
}

RunRecord qualify(AttachedKernel& k) {
  return testing::qualify_backward_in_process(k, {{underflow_case(), std::nullopt, {}, {}}});
}

TEST(QualifyGradientUnderflow, AWeightBelowFloat32sNormalRangeIsAllowedItsFewBits) {
  // The premise: key 1's weight is subnormal in float32 (below 2^-126, above 2^-149).
  const double p1 = std::exp(-102.0);
  ASSERT_LT(p1, 0x1p-126);
  ASSERT_GT(static_cast<float>(p1), 0.0f);
  const auto k = attach_in_process(&hr_kernels::f32_backward_tiled);
  const RunRecord r = qualify(*k);
  ASSERT_EQ(r.cases.size(), 1u);
  const CaseRecord& c = r.cases[0];
  ASSERT_TRUE(c.backward);
  EXPECT_TRUE(c.within_budget) << (c.reasons.empty() ? "" : c.reasons[0]);
  EXPECT_LE(c.backward->fed_exact[1].max_scaled_error, 16.0);  // d_k: within a few units of the enlarged unit

  hr_kernel wrong = hr_kernels::f32_backward_tiled;
  wrong.name = "doubled_dv";
  wrong.run_backward = doubled_dv;
  const auto bad = attach_in_process(&wrong);
  const RunRecord w = qualify(*bad);
  ASSERT_EQ(w.cases.size(), 1u);
  EXPECT_FALSE(w.cases[0].within_budget);
  EXPECT_GT(w.cases[0].backward->fed_exact[2].max_scaled_error, w.cases[0].limits.max_gradient_scaled_error);
}

}  // namespace
}  // namespace headroom
