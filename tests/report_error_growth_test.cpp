// headroom — error growth with Tk (error_growth.h): known power laws give their
// exponents back, faulted, block and thinly spread cases are left out, a
// budget's cap fails the run's verdict, and the record and every report carry it.
#include <gtest/gtest.h>

#include <cmath>
#include <string>

#include "headroom/budget.h"
#include "headroom/error_growth.h"
#include "headroom/html_report.h"
#include "headroom/input_error.h"
#include "headroom/markdown_report.h"
#include "headroom/record.h"
#include "headroom/terminal_report.h"

namespace headroom {
namespace {

CaseRecord at(const std::string& family, std::int64_t tk, double error, int k) {
  CaseRecord c;
  c.name = family + "-" + std::to_string(tk) + "-" + std::to_string(k);
  c.family = family;
  c.level = "core";
  c.shape = "1,1,1,4," + std::to_string(tk) + ",64,64";
  c.kv_len = tk;
  c.mask = "none";
  c.format = "float32";
  c.figures.max_scaled_error = error;
  c.replay = "headroom replay x";
  return c;
}

// "walk": 3·√Tk, "drift": Tk/100, three cases per Tk spread by ×0.8, ×1, ×1.25
// (a spread that is the same at every Tk moves neither the median nor the worst slope).
RunRecord power_laws() {
  RunRecord r;
  r.command = "qualify";
  r.kernel = "k";
  r.input_format = r.output_format = "float32";
  for (std::int64_t tk : {64, 256, 1024, 4096, 16384})
    for (int k = 0; k < 3; ++k) {
      const double jitter = k == 0 ? 0.8 : k == 1 ? 1.0 : 1.25;
      r.cases.push_back(at("walk", tk, 3 * std::sqrt(double(tk)) * jitter, k));
      r.cases.push_back(at("drift", tk, double(tk) / 100 * jitter, k));
    }
  return r;
}

TEST(ErrorGrowth, PowerLawsGiveTheirExponents) {
  const auto g = error_growth(power_laws().cases);
  ASSERT_EQ(g.size(), 1u);
  EXPECT_EQ(g[0].format, "float32");
  ASSERT_EQ(g[0].families.size(), 2u);
  const FamilyGrowth& drift = g[0].families[0];
  const FamilyGrowth& walk = g[0].families[1];
  EXPECT_EQ(drift.family, "drift");
  EXPECT_EQ(walk.family, "walk");
  EXPECT_NEAR(walk.median.exponent, 0.5, 1e-9);
  EXPECT_NEAR(walk.worst.exponent, 0.5, 1e-9);
  EXPECT_NEAR(drift.median.exponent, 1.0, 1e-9);
  EXPECT_NEAR(std::pow(10, walk.median.intercept), 3.0, 1e-9);
  EXPECT_NEAR(walk.median.spread, 0.0, 1e-9);
  EXPECT_EQ(walk.lengths, 5u);
  EXPECT_EQ(walk.cases, 15u);
  EXPECT_EQ(walk.min_kv_len, 64);
  EXPECT_EQ(walk.max_kv_len, 16384);
  EXPECT_NEAR(g[0].exponent, 0.75, 1e-9);  // median of 0.5 and 1
  EXPECT_NEAR(g[0].low, 0.5, 1e-9);
  EXPECT_NEAR(g[0].high, 1.0, 1e-9);
}

TEST(ErrorGrowth, NoisyPointsGiveASpread) {
  RunRecord r;
  const double wobble[] = {1.0, 1.6, 0.7, 1.3};
  int i = 0;
  for (std::int64_t tk : {100, 1000, 10000, 100000}) r.cases.push_back(at("walk", tk, std::sqrt(double(tk)) * wobble[i++], 0));
  const auto g = error_growth(r.cases);
  ASSERT_EQ(g.size(), 1u);
  EXPECT_GT(g[0].families[0].median.spread, 0.01);
  EXPECT_NEAR(g[0].families[0].median.exponent, 0.5, 0.15);
}

TEST(ErrorGrowth, FaultedBlockAndThinFamiliesAreLeftOut) {
  RunRecord r = power_laws();
  CaseRecord faulted = at("walk", 16384, 1e9, 9);
  faulted.faults["non_finite"] = 1;
  CaseRecord block = at("walk", 16384, 1e9, 8);
  block.level = "block";
  r.cases.push_back(faulted);
  r.cases.push_back(block);
  r.cases.push_back(at("walk", 16384, 0, 7));  // an exact result has no logarithm
  for (std::int64_t tk : {64, 4096}) r.cases.push_back(at("two_lengths", tk, 1, 0));
  for (std::int64_t tk : {100, 200, 300}) r.cases.push_back(at("narrow", tk, 1, 0));  // span 3 < 4
  const auto g = error_growth(r.cases);
  ASSERT_EQ(g[0].families.size(), 2u);
  EXPECT_NEAR(g[0].families[1].worst.exponent, 0.5, 1e-9);
  EXPECT_EQ(g[0].families[1].cases, 15u);
  EXPECT_TRUE(error_growth({}).empty());
}

TEST(ErrorGrowth, BudgetCapFailsTheRunAndEveryFaceSaysSo) {
  RunRecord r = power_laws();
  EXPECT_EQ(r.verdict(), "pass");
  EXPECT_TRUE(r.growth_failures().empty());
  r.growth_limit = 0.6;
  r.growth_limit_origin = "b.toml line 2";
  EXPECT_EQ(r.verdict(), "fail");
  ASSERT_EQ(r.growth_failures().size(), 1u);
  EXPECT_EQ(r.growth_failures()[0], "error growth exponent 0.75 for float32 is above the limit 0.6 (b.toml line 2)");
  r.growth_limit = 0.8;
  EXPECT_EQ(r.verdict(), "pass");
  r.growth_limit = 0.6;

  const nlohmann::json j = to_json(r);
  EXPECT_EQ(j["verdict"], "fail");
  ASSERT_EQ(j["error_growth"].size(), 1u);
  EXPECT_NEAR(j["error_growth"][0]["exponent"].get<double>(), 0.75, 1e-9);
  const RunRecord back = run_record_from_json(j, "r.json");
  EXPECT_EQ(back.growth_limit, 0.6);
  EXPECT_EQ(back.growth_limit_origin, "b.toml line 2");
  EXPECT_EQ(back.verdict(), "fail");
  nlohmann::json old = j;
  old.erase("growth_limit");
  old.erase("growth_limit_origin");
  old["verdict"] = "pass";  // what it said without the limit: a record's verdict must be its cases' (record.h)
  old.erase("verdict_line");
  EXPECT_EQ(run_record_from_json(old, "r.json").verdict(), "pass") << "a record without a limit has none";

  const std::string md = markdown_report(r), html = html_report(r), term = terminal_summary(r, false);
  for (const std::string* face : {&md, &html, &term}) {
    EXPECT_NE(face->find("float32: growth exponent 0.75 (families 0.50 to 1.00, 2 fitted; worst-case error 0.75)"),
              std::string::npos)
        << *face;
    EXPECT_NE(face->find("is above the limit 0.6"), std::string::npos);
  }
  EXPECT_NE(md.find("Higham & Mary"), std::string::npos);
  EXPECT_NE(md.find("| walk | float32 | 64–16384 | 5 | 15 | 0.50 ± 0.00 | 0.50 ± 0.00 |"), std::string::npos) << md;
  // The HTML plot data carries each fit for the error-vs-Tk plot.
  EXPECT_NE(html.find("\"growth\":[{\"exponent\":"), std::string::npos);
  EXPECT_NE(html.find("\"family\":\"walk\",\"format\":\"float32\",\"from\":64"), std::string::npos);
  EXPECT_NE(html.find("fit-key"), std::string::npos);
}

TEST(ErrorGrowth, ReportsSayWhenNothingWasFitted) {
  RunRecord r;
  r.kernel = "k";
  r.cases.push_back(at("walk", 16, 1, 0));
  EXPECT_NE(markdown_report(r).find("No growth fit"), std::string::npos);
  EXPECT_EQ(terminal_summary(r, false).find("growth exponent"), std::string::npos);
}

TEST(ErrorGrowth, BudgetFileSetsTheCap) {
  const Budget b = parse_budget("[format.float32]\nmax_growth_exponent = 0.75\n", "b.toml");
  const Limit l = b.for_kernel("k", Format::float32).max_growth_exponent;
  EXPECT_EQ(l.kind, Limit::Kind::fixed);
  EXPECT_EQ(l.value, 0.75);
  EXPECT_EQ(l.origin, "b.toml line 2");
  EXPECT_EQ(b.for_kernel("k", Format::binary16).max_growth_exponent.kind, Limit::Kind::none);
  EXPECT_EQ(default_budget(Format::float32).max_growth_exponent.kind, Limit::Kind::none);
  EXPECT_THROW(parse_budget("[format.float32]\nmax_growth_exponent = { lambda = 4 }\n", "b.toml"), InputError);
  EXPECT_THROW(parse_budget("[format.float32]\nmax_growth_exponent = -1\n", "b.toml"), InputError);
}

}  // namespace
}  // namespace headroom
