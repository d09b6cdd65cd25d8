// headroom — tests of the backward's verdict (judge_gradients) and of its figures in the run record.
//
// Every figure is distinct, so a figure dropped, read into another gradient
// tensor or another way (fed exact / end to end), or judged against the
// other way's limit, changes what these tests see.
#include <gtest/gtest.h>

#include <cmath>
#include <string>

#include "headroom/budget.h"
#include "headroom/judge_backward.h"
#include "headroom/record.h"
#include "headroom/scores.h"

namespace headroom {
namespace {

const CoreShape kShape{1, 4, 2, 16, 24, 8, 8};

CaseScore forward_score() {
  CaseScore s;
  s.format = Format::float32;
  s.unit_roundoff = unit_roundoff(Format::float32);
  return s;
}

CaseRecord judged(const BackwardFigures& b) {
  CaseRecord c;
  c.name = "gaussian-s1";
  c.family = "gaussian";
  c.level = "core";
  c.shape = "1,4,2,16,24,8,8";
  c.kv_len = 24;
  c.mask = "none";
  c.format = "float32";
  c.replay = "headroom replay --kernel f32_backward_tiled corpus/gaussian-s1";
  c.backward = b;
  return c;
}

bool names(const std::vector<VerdictReason>& reasons, const std::string& part) {
  for (const VerdictReason& r : reasons)
    if (r.text.find(part) != std::string::npos) return true;
  return false;
}

TEST(JudgeGradients, EachTensorAgainstItsWaysLimitNamedInTheReason) {
  const KernelBudget budget = default_budget(Format::float32);
  const CaseScore fwd = forward_score();
  CaseRecord within = judged(BackwardFigures{});
  EXPECT_TRUE(judge_gradients(within, fwd, budget, kShape).empty());
  const double exact = within.limits.max_gradient_scaled_error;
  const double e2e = within.limits.max_gradient_scaled_error_end_to_end;
  EXPECT_EQ(exact, budget.gradient_scaled_error_limit(gradient_accumulation_length(kShape), fwd, 2));
  EXPECT_EQ(e2e, budget.gradient_scaled_error_limit(gradient_accumulation_length(kShape) +
                                                        accumulation_length(kShape), fwd, 3));
  ASSERT_LT(exact, e2e);  // end to end adds the forward's chain
  const double between = (exact + e2e) / 2;

  // Between the two limits: a fault fed exact, none end to end.
  BackwardFigures b;
  b.end_to_end[0].max_scaled_error = between;
  b.fed_exact[1].max_scaled_error = between;
  CaseRecord one = judged(b);
  const std::vector<VerdictReason> r = judge_gradients(one, fwd, budget, kShape);
  ASSERT_EQ(r.size(), 1u);
  EXPECT_EQ(r[0].what, "max_gradient_scaled_error");
  EXPECT_EQ(r[0].value, between);
  EXPECT_EQ(r[0].limit, exact);
  EXPECT_TRUE(names(r, "d_k max_gradient_scaled_error")) << r[0].text;
  EXPECT_TRUE(names(r, "(fed the exact O and lse)")) << r[0].text;

  // Past the end-to-end limit, on d_v only; then not judged that way: no reason.
  b = BackwardFigures{};
  b.end_to_end[2].max_scaled_error = 2 * e2e;
  CaseRecord past = judged(b);
  const std::vector<VerdictReason> p = judge_gradients(past, fwd, budget, kShape);
  ASSERT_EQ(p.size(), 1u);
  EXPECT_TRUE(names(p, "d_v max_gradient_scaled_error")) << p[0].text;
  EXPECT_TRUE(names(p, "(end to end)")) << p[0].text;
  EXPECT_EQ(p[0].limit, e2e);
  b.end_to_end_judged = false;
  CaseRecord unjudged = judged(b);
  EXPECT_TRUE(judge_gradients(unjudged, fwd, budget, kShape).empty());

  // NaN is never within; the ratio to the plain backward has its own limit.
  b = BackwardFigures{};
  b.fed_exact[0].max_scaled_error = std::nan("");
  b.fed_exact[2].ratio_to_plain = 2 * within.limits.max_gradient_ratio_to_plain;
  CaseRecord nan_and_ratio = judged(b);
  const std::vector<VerdictReason> n = judge_gradients(nan_and_ratio, fwd, budget, kShape);
  ASSERT_EQ(n.size(), 2u);
  EXPECT_TRUE(names(n, "d_q max_gradient_scaled_error")) << n[0].text;
  EXPECT_TRUE(names(n, "d_v max_gradient_ratio_to_plain")) << n[1].text;

  // A case whose gradients were not judged gets no reason and no gradient limits.
  CaseRecord forward_only;
  EXPECT_TRUE(judge_gradients(forward_only, fwd, budget, kShape).empty());
  EXPECT_TRUE(std::isnan(forward_only.limits.max_gradient_scaled_error));
}

TEST(BackwardRecord, EveryGradientFigureKeepsItsTensorAndWayThroughJson) {
  BackwardFigures b;
  b.upstream = "heavy_tailed";
  b.spread = 0.75;
  double v = 1;
  for (auto* way : {&b.fed_exact, &b.end_to_end})
    for (GradientFigures& g : *way) {
      g.max_ulp = v++;
      g.max_scaled_error = v++;
      g.rmse = v++;
      g.relative_rmse = v++;
      g.cosine = 1 / (v++);
      g.ratio_to_plain = v++;
    }
  RunRecord r;
  r.command = "qualify";
  r.kernel = "f32_backward_tiled";
  r.input_format = r.output_format = "float32";
  r.cases = {judged(b)};
  const nlohmann::json j = to_json(r);
  // The names on the page: fed_exact.d_k is the second tensor of the first way.
  const nlohmann::json& w = j["cases"][0]["backward"];
  EXPECT_EQ(w["fed_exact"]["d_k"]["max_scaled_error"], b.fed_exact[1].max_scaled_error);
  EXPECT_EQ(w["end_to_end"]["d_q"]["rmse"], b.end_to_end[0].rmse);
  EXPECT_EQ(w["end_to_end"]["d_v"]["ratio_to_plain"], b.end_to_end[2].ratio_to_plain);
  EXPECT_EQ(w["fed_exact"]["d_v"]["max_ulp"], b.fed_exact[2].max_ulp);
  EXPECT_EQ(w["upstream"], "heavy_tailed");
  const RunRecord back = run_record_from_json(j, "r.json");
  ASSERT_TRUE(back.cases[0].backward.has_value());
  const BackwardFigures& got = *back.cases[0].backward;
  for (std::size_t t = 0; t < 3; ++t)
    for (const auto& [mine, theirs] : {std::pair{&b.fed_exact[t], &got.fed_exact[t]}, {&b.end_to_end[t], &got.end_to_end[t]}}) {
      SCOPED_TRACE(kGradientNames[t]);
      EXPECT_EQ(theirs->max_ulp, mine->max_ulp);
      EXPECT_EQ(theirs->max_scaled_error, mine->max_scaled_error);
      EXPECT_EQ(theirs->rmse, mine->rmse);
      EXPECT_EQ(theirs->relative_rmse, mine->relative_rmse);
      EXPECT_EQ(theirs->cosine, mine->cosine);
      EXPECT_EQ(theirs->ratio_to_plain, mine->ratio_to_plain);
    }
  EXPECT_TRUE(got.end_to_end_judged);
  EXPECT_EQ(got.upstream, "heavy_tailed");
  EXPECT_EQ(got.spread, 0.75);
  // Not judged end to end: null on the page, and read back as not judged.
  r.cases[0].backward->end_to_end_judged = false;
  const nlohmann::json fed_only = to_json(r);
  EXPECT_TRUE(fed_only["cases"][0]["backward"]["end_to_end"].is_null());
  EXPECT_FALSE(run_record_from_json(fed_only, "r.json").cases[0].backward->end_to_end_judged);
  // A case without gradients has no "backward" and reads back without one.
  r.cases[0].backward.reset();
  EXPECT_FALSE(to_json(r)["cases"][0].contains("backward"));
  EXPECT_FALSE(run_record_from_json(to_json(r), "r.json").cases[0].backward.has_value());
}

}  // namespace
}  // namespace headroom
