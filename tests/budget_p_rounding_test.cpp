// Tests of what rounding P to 8 bits costs (scores.h: p_rounded_attention,
// condition_on_p_rounding) and of the budget allowance for its underflow
// (budget.h p_floor; docs/budget-format.md, "P rounding").
#include <gtest/gtest.h>

#include <cmath>

#include "headroom/budget.h"
#include "headroom/fp8.h"
#include "headroom/reference.h"
#include "headroom/scores.h"

namespace headroom {
namespace {

// One head, three keys of one channel, two query rows. Key 0 scores 0 and holds
// value 0; keys 1 and 2 score −13.5·q and hold value 1. Row 0 (q = 1): the two
// small weights are p ≈ 1.4e-6, so p·448 ≈ 6.2e-4 is below half E4M3's smallest
// subnormal (2^-10 ≈ 9.8e-4, OFP8 rev 1.0) and flushes: even a kernel that
// scales P as declared returns 0 for an exact output of ≈ 2.7e-6. Row 1
// (q = 0.682): p ≈ 1e-4, p·448 ≈ 0.045 is a normal E4M3 value, while p itself
// (a kernel forgetting its p_scale) flushes.
Case underflow_case() {
  Case c;
  c.core.shape = {1, 1, 1, 2, 3, 1, 1};
  c.core.scale = 1.0f;
  c.core_inputs.q = Tensor({1, 1, 2, 1});
  c.core_inputs.q.values = {1.0, 0.682};
  c.core_inputs.k = Tensor({1, 1, 3, 1});
  c.core_inputs.k.values = {0.0, -13.5, -13.5};
  c.core_inputs.v = Tensor({1, 1, 3, 1});
  c.core_inputs.v.values = {0.0, 1.0, 1.0};
  return c;
}

Verdict verdict_of(const Tensor& out, const Case& c, const CoreReference& ref, bool with_floor) {
  CaseScore s = score_core(out, nullptr, ref, Format::float32);
  if (with_floor) condition_on_p_rounding(s, c, Format::e4m3, 448.0f);
  return judge(&s, CaseFaults{}, default_budget(Format::e4m3), 10);
}

TEST(PRounding, ModelRoundsEachNormalisedWeightAsDeclared) {
  const Case c = underflow_case();
  const CoreReference ref = reference_core(c.core, c.core_inputs);
  const Tensor m = p_rounded_attention(c.core, c.core_inputs, Format::e4m3, 448.0f, true);
  EXPECT_EQ(m.at(0, 0, 0, 0), 0.0);  // both small weights flushed
  const double exact = ref.out.at(0, 0, 1, 0);
  EXPECT_NE(m.at(0, 0, 1, 0), exact);
  EXPECT_LE(std::fabs(m.at(0, 0, 1, 0) - exact), 0x1p-4 * exact);  // one E4M3 rounding of normal weights
  // Without the scale the row-1 weights flush too.
  EXPECT_EQ(p_rounded_attention(c.core, c.core_inputs, Format::e4m3, 1.0f, true).at(0, 0, 1, 0), 0.0);
}

TEST(PRounding, FloorIsTheUnderflowBoundInScaledUnits) {
  const Case c = underflow_case();
  const CoreReference ref = reference_core(c.core, c.core_inputs);
  CaseScore s = score_core(ref.out, nullptr, ref, Format::float32);
  condition_on_p_rounding(s, c, Format::e4m3, 448.0f);
  ASSERT_EQ(s.row_p_floor.size(), 2u);
  // Row 0: keys 1 and 2 weigh p ≈ 1.4e-6 each, below 2^-6/448 ≈ 3.5e-5 (subnormal
  // once scaled) and below 2^-10/448 ≈ 2.2e-6 (they flush): a_j = p_j, so the
  // floor is (Σ a_j|v_j| + Σ a_j·Σ p|v|) / (2^-24·Σ p|v|) = (1 + o*)·2^24 with
  // Σ p|v| = p_1 + p_2 = o*: at most the whole output (and its normaliser share).
  const double o0 = ref.out.at(0, 0, 0, 0);
  EXPECT_NEAR(s.row_p_floor[0], (1 + o0) * 0x1p24, 1e-9 * s.row_p_floor[0]);
  // Row 1: p ≈ 1e-4, normal once multiplied by 448: no allowance beyond the
  // relative 2·u_P. (The former allowance charged 2^-10/448 to every key:
  // (2 + 3·o*)·2^-10/448/(2^-24·o*) ≈ 3.7e5 here, and ≈ 2.7e7 on row 0.)
  EXPECT_EQ(s.row_p_floor[1], 0.0);
  // Not filled: no allowance.
  const CaseScore bare = score_core(ref.out, nullptr, ref, Format::float32);
  EXPECT_EQ(KernelBudget::p_floor(bare, 0), 0.0);
}

TEST(PRounding, UnderflowOfADeclaredScaleIsWithinBudgetAForgottenScaleIsNot) {
  const Case c = underflow_case();
  const CoreReference ref = reference_core(c.core, c.core_inputs);
  const Tensor sound = p_rounded_attention(c.core, c.core_inputs, Format::e4m3, 448.0f, true);
  const Tensor unscaled = p_rounded_attention(c.core, c.core_inputs, Format::e4m3, 1.0f, true);
  // Row 0 loses its whole output (scaled error 2^24): over 2^21 without the
  // floor, within it with the floor.
  EXPECT_FALSE(verdict_of(sound, c, ref, false).pass);
  const Verdict v = verdict_of(sound, c, ref, true);
  EXPECT_TRUE(v.pass);
  bool said = false;
  for (const auto& n : v.notes) said |= n.find("for P rounded to 8 bits below its normal range") != std::string::npos;
  EXPECT_TRUE(said) << "the note does not say the P-rounding floor set the limit";
  // Row 1 flushes only without the scale: the floor (set for p_scale 448) does not cover it.
  const Verdict u = verdict_of(unscaled, c, ref, true);
  ASSERT_FALSE(u.pass);
  // The binding limit is row 1's (2^21, no floor), not row 0's (2^21 + about 1.7e7).
  EXPECT_EQ(u.reasons.front().limit, 0x1p21) << u.reasons.front().text;
}

}  // namespace
}  // namespace headroom
