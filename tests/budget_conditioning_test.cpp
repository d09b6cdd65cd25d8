// Tests of the score-conditioning term of budgets (budget.h score_bits; scores.h row_score_magnitude).
#include <gtest/gtest.h>

#include <cmath>

#include "headroom/budget.h"
#include "headroom/scores.h"

namespace headroom {
namespace {

CaseScore two_rows(double z0, double z1, double e0, double e1) {
  CaseScore s;
  s.format = Format::float32;
  s.unit_roundoff = unit_roundoff(Format::float32);
  s.elements = 2;
  s.row_max_scaled = {e0, e1};
  s.row_score_magnitude = {z0, z1};
  s.score_terms = 9;
  s.max_scaled_error = std::max(e0, e1);
  s.rms_expected = 1;
  s.rms_magnitude = 1;
  return s;
}

TEST(ScoreConditioning, MagnitudeIsTheLargestAbsoluteScoreSumOverVisibleKeys) {
  Case c;
  c.core.shape = {1, 1, 1, 2, 2, 2, 1};
  c.core.scale = 0.5f;
  c.core.mask.kind = MaskKind::causal_top_left;
  c.core_inputs.q = Tensor({1, 1, 2, 2});
  c.core_inputs.q.values = {1, 2, -1, 0};
  c.core_inputs.k = Tensor({1, 1, 2, 2});
  c.core_inputs.k.values = {3, -4, 10, 10};
  c.core_inputs.v = Tensor({1, 1, 2, 1});
  CaseScore s;
  condition_on_scores(s, c);
  ASSERT_EQ(s.row_score_magnitude.size(), 2u);
  // Row 0 sees key 0 only: 0.5·(|1·3| + |2·(−4)|) = 5.5, although the score itself is −2.5.
  EXPECT_EQ(s.row_score_magnitude[0], 5.5);
  // Row 1 sees both keys: max(0.5·3, 0.5·10) = 5.
  EXPECT_EQ(s.row_score_magnitude[1], 5.0);
  EXPECT_EQ(s.score_terms, 3);
}

TEST(ScoreConditioning, EachRowIsJudgedAgainstItsOwnLimit) {
  const KernelBudget b = default_budget(Format::float32);
  const std::int64_t n = 30;
  const double base = b.scaled_error_limit(n, Format::float32);
  // A row of huge scores may lose far more than λ√n units, a row of small scores may not.
  const CaseScore loud_ok = two_rows(0, 1e4, base / 2, base * 100);
  EXPECT_TRUE(judge(&loud_ok, CaseFaults{}, b, n).pass);
  const CaseScore quiet_bad = two_rows(0, 1e4, base * 2, base * 100);
  const Verdict v = judge(&quiet_bad, CaseFaults{}, b, n);
  ASSERT_FALSE(v.pass);
  EXPECT_NE(v.reasons.front().text.find("row 0"), std::string::npos) << v.reasons.front().text;
}

TEST(ScoreConditioning, APassGrantedByScoreConditioningSaysWhy) {
  // Scaled error 1.342e4 passes a row whose scores reach 1e4: the verdict says
  // which limit bound it and why the limit was that large.
  const CaseScore s = two_rows(0, 1e4, 0, 1.342e4);
  const Verdict v = judge(&s, CaseFaults{}, default_budget(Format::float32), 30);
  ASSERT_TRUE(v.pass);
  std::string why;
  for (const auto& n : v.notes)
    if (n.rfind("limit max_scaled_error", 0) == 0) why = n;
  ASSERT_FALSE(why.empty()) << "no note on the binding limit";
  EXPECT_NE(why.find("at row 1"), std::string::npos) << why;
  EXPECT_NE(why.find("for score conditioning: scores in this row reach |z| = 1e+04"), std::string::npos) << why;
  EXPECT_NE(why.find("worst there 1.342e+04, margin "), std::string::npos) << why;
  // A quiet row far from its limit needs no such note.
  const CaseScore quiet = two_rows(0, 0, 1, 1);
  for (const auto& n : judge(&quiet, CaseFaults{}, default_budget(Format::float32), 30).notes)
    EXPECT_NE(n.rfind("limit max_scaled_error", 0), 0u) << n;
}

TEST(ScoreConditioning, TermIsTwiceTheScoreErrorBoundInOutputUnits) {
  KernelBudget b = default_budget(Format::binary16);
  CaseScore s = two_rows(0, 0, 0, 0);
  s.format = Format::binary16;
  s.unit_roundoff = unit_roundoff(Format::binary16);
  // Scores in float32 cost binary16 outputs 2·γ̃_9(4, 2^-24)/2^-11 per unit of Z.
  const double us = std::ldexp(1.0, -24);
  EXPECT_DOUBLE_EQ(b.score_conditioning(s, 4.0),
                   2 * std::min(gamma_tilde_n(4.0, 9, us), gamma_n(9, us)) / std::ldexp(1.0, -11));
  b.score_bits = 11;  // a kernel forming scores in binary16 pays 2^13 times more
  EXPECT_GT(b.score_conditioning(s, 4.0), 1000 * 2 * gamma_tilde_n(4.0, 9, us) / std::ldexp(1.0, -11));
}

// The 8-bit float defaults are fixed (2^21 E4M3), yet each row adds the
// worst-case cost of forming its scores from codes in float32: 2·γ_{m+2}(2^-24)·Z_r
// in scaled units (m = score_terms = Dk + 1, two more roundings for the scales).
// A fixed limit set in a budget file stays as given.
TEST(ScoreConditioning, EightBitDefaultsAddTheWorstCaseTermAFileLimitDoesNot) {
  const KernelBudget b = default_budget(Format::e4m3);
  CaseScore s = two_rows(0, 800, 0, 0);  // score_terms 9
  const double term = 2 * gamma_n(11, 0x1p-24) / 0x1p-24 * 800;
  EXPECT_DOUBLE_EQ(b.row_scaled_error_limit(10, s, 0), 0x1p21);
  EXPECT_DOUBLE_EQ(b.row_scaled_error_limit(10, s, 1), 0x1p21 + term);
  // A row over 2^21 by less than the term passes, and the note names the term.
  s.row_max_scaled = {1, 0x1p21 + term / 2};
  s.max_scaled_error = s.row_max_scaled[1];
  const Verdict v = judge(&s, CaseFaults{}, b, 10);
  EXPECT_TRUE(v.pass);
  bool said = false;
  for (const auto& n : v.notes) said |= n.find("for score conditioning: scores in this row reach |z| = 800") != std::string::npos;
  EXPECT_TRUE(said);
  s.row_max_scaled = {1, 0x1p21 + 2 * term};
  s.max_scaled_error = s.row_max_scaled[1];
  const Verdict over = judge(&s, CaseFaults{}, b, 10);
  ASSERT_FALSE(over.pass);
  const std::string& text = over.reasons.front().text;
  EXPECT_NE(text.find("plus worst-case score conditioning at Z = 800"), std::string::npos) << text;
  EXPECT_EQ(text.find("score conditioning"), text.rfind("score conditioning")) << "named once: " << text;
  const Budget file = parse_budget("version = 1\n[kernel.k]\nmax_scaled_error = 2097152\n", "b.toml");
  EXPECT_DOUBLE_EQ(file.for_kernel("k", Format::e4m3).row_scaled_error_limit(10, s, 1), 0x1p21);
}

TEST(ScoreConditioning, BudgetFileSetsScoreBits) {
  const Budget b = parse_budget("version = 1\n[kernel.k]\nscore_bits = 11\n", "b.toml");
  EXPECT_EQ(b.for_kernel("k", Format::binary16).score_bits, 11);
  EXPECT_EQ(b.for_kernel("other", Format::binary16).score_bits, 24);
  EXPECT_THROW(parse_budget("version = 1\n[kernel.k]\nscore_bits = 1\n", "b.toml"), std::exception);
}

}  // namespace
}  // namespace headroom
