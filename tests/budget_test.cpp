// Tests of the budget stage: file errors citing the right line, precedence, the √n defaults under γ_n,
// and the verdict's reasons.
#include <gtest/gtest.h>

#include <cmath>
#include <string>

#include "headroom/budget.h"
#include "headroom/input_error.h"

namespace headroom {
namespace {

// Parses `text` expecting an InputError at `line` (and `column` when > 0)
// whose message contains `needle`.
void expect_error(const std::string& text, int line, int column, const std::string& needle) {
  try {
    parse_budget(text, "b.toml");
    ADD_FAILURE() << "accepted:\n" << text;
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), "b.toml");
    const std::string want = "line " + std::to_string(line) + (column > 0 ? ", column " + std::to_string(column) : ",");
    EXPECT_EQ(e.place().rfind(want, 0), 0u) << e.what() << "\nwanted " << want;
    EXPECT_NE(std::string(e.what()).find(needle), std::string::npos) << e.what();
    EXPECT_FALSE(e.fix().empty());
  }
}

TEST(BudgetFile, ErrorsCiteTheLineAndTheFix) {
  expect_error("version = 1\n[kernel.k]\nmax_rmse = 3\n", 3, 1, "unknown key \"max_rmse\"");
  expect_error("[format.float32]\nmax_ulp = 2.5\n", 2, 11, "integer number of ULPs");
  expect_error("[format.float32]\n\nmax_scaled_error = true\n", 3, 20, "found a boolean");
  expect_error("[format.float32]\nmax_ratio_to_plain = { lambda = 2 }\n", 2, 22, "fixed number");
  expect_error("[kernel.k]\nmax_scaled_error = -3\n", 2, 20, "negative");
  expect_error("[kernel.k]\nmax_ulp = -1\n", 2, 11, "negative (-1)");
  expect_error("[kernel.k]\nmax_rel_rmse = nan\n", 2, 16, "nan");
  expect_error("[kernel.k]\ntolerated_faults = [\n  \"crash\",\n  \"leak\",\n]\n", 4, 3, "unknown fault class \"leak\"");
  expect_error("[kernel.k]\ntolerated_faults = \"crash\"\n", 2, 20, "must be an array");
  expect_error("\n[format.float17]\nmax_ulp = 1\n", 2, 0, "unknown format \"float17\"");
  expect_error("[format.f16]\nmax_ulp = 1\n[format.binary16]\nmax_ulp = 2\n", 3, 0, "given twice");
  expect_error("[kernel.k]\nmax_scaled_error = { lambda = 0 }\n", 2, 0, "lambda must be finite and > 0");
  expect_error("[kernel.k]\nmax_scaled_error = { ceiling = false }\n", 2, 0, "has no lambda");
  expect_error("[kernel.k]\nmax_scaled_error = { lambda = 2, lamda = 3 }\n", 2, 0, "unknown key \"lamda\"");
  expect_error("[kernel.k]\nmax_scaled_error = { lambda = 2, working_bits = 100 }\n", 2, 0, "working_bits");
  expect_error("[kernel.k]\nmax_scaled_error = \"auto\"\n", 2, 0, "is not a limit");
  expect_error("max_ulp = 3\n", 1, 1, "at the top level");
  expect_error("version = 2\n", 1, 0, "version must be 1");
  expect_error("[kernel.k\nmax_ulp = 1\n", 1, 0, "not valid TOML");
  expect_error("[kernel.k]\nmax_ulp = 1\nmax_ulp = 2\n", 3, 0, "not valid TOML");  // TOML refuses redefinition
}

TEST(BudgetFile, MissingFileIsAnInputError) {
  EXPECT_THROW(load_budget("/nonexistent/budget.toml"), InputError);
}

TEST(BudgetFile, ExampleFileParsesAndResolvesKeyByKey) {
  const std::string path = std::string(HEADROOM_SOURCE_DIR) + "/budgets/example.toml";
  const Budget b = load_budget(path);
  EXPECT_EQ(b.source, path);
  // [kernel.f32_tiled_64] over [format.float32] over the float32 default.
  const KernelBudget k = b.for_kernel("f32_tiled_64", Format::float32);
  EXPECT_EQ(k.max_scaled_error.kind, Limit::Kind::fixed);
  EXPECT_EQ(k.max_scaled_error.value, 48.0);
  EXPECT_NE(k.max_scaled_error.origin.find("example.toml line 21"), std::string::npos) << k.max_scaled_error.origin;
  EXPECT_EQ(k.max_ulp.kind, Limit::Kind::fixed);  // from [format.float32]
  EXPECT_EQ(k.max_ulp.value, 64.0);
  EXPECT_EQ(k.max_rel_rmse.lambda, 2.0);
  EXPECT_TRUE(k.tolerates(FaultClass::nondeterministic));
  EXPECT_FALSE(k.tolerates(FaultClass::mask_leak));
  EXPECT_EQ(k.max_ratio_to_plain.value, 4.0);  // untouched: the default
  EXPECT_EQ(k.max_ratio_to_plain.origin, "default for float32");
  // Another float32 kernel gets the format section only.
  const KernelBudget other = b.for_kernel("f32_textbook", Format::float32);
  EXPECT_EQ(other.max_scaled_error.kind, Limit::Kind::probabilistic);
  EXPECT_EQ(other.max_scaled_error.lambda, 4.0);
  EXPECT_EQ(other.max_ulp.value, 64.0);
  EXPECT_TRUE(other.tolerated_faults.empty());
  EXPECT_EQ(b.for_kernel("f16_f16acc", Format::binary16).max_scaled_error.lambda, 6.0);
  EXPECT_EQ(b.for_kernel("i8_tokenwise", Format::int8).max_ratio_to_plain.kind, Limit::Kind::none);
  EXPECT_EQ(b.for_kernel("i8_tokenwise", Format::int8).max_scaled_error.working_bits, 9);
}

// --- defaults: √n growth under the γ_n ceiling -------------------------------

TEST(Defaults, AccumulationLengthFollowsTheShape) {
  EXPECT_EQ(accumulation_length(CoreShape{1, 8, 8, 100, 100, 64, 64}), 2 * 100 + 64 + 5);
  // Vaswani et al. 2017 base shape: d_model 512, 8 heads, d_k = d_v = 64.
  EXPECT_EQ(accumulation_length(BlockShape{1, 10, 20, 512, 8, 8, 64, 64}), 2 * 20 + 64 + 5 + 512 + 8 * 64);
}

TEST(Defaults, GrowLikeSqrtNAndStayUnderGammaN) {
  for (Format f : {Format::float64, Format::float32, Format::binary16, Format::bfloat16}) {
    const KernelBudget b = default_budget(f);
    const double u = unit_roundoff(f);
    for (std::int64_t n = 2; n <= (std::int64_t{1} << 20); n *= 2) {
      const double lim = b.scaled_error_limit(n, f);
      const double ceiling = gamma_n(n, u) / u;
      EXPECT_LE(lim, ceiling * (1 + 1e-12)) << format_name(f) << " n=" << n;
      EXPECT_GT(lim, 0) << format_name(f) << " n=" << n;
      if (n < 16) {
        EXPECT_DOUBLE_EQ(lim, ceiling) << "the ceiling is in charge for n < λ² = 16";
      }
      // Where γ̃ ≈ λ√n·u (λ√n·u small), quadrupling n doubles the limit.
      if (n >= 64 && 4.0 * std::sqrt(4.0 * static_cast<double>(n)) * u < 1e-3) {
        const double ratio = b.scaled_error_limit(4 * n, f) / lim;
        EXPECT_NEAR(ratio, 2.0, 2e-3) << format_name(f) << " n=" << n;
        EXPECT_NEAR(lim, 4.0 * std::sqrt(static_cast<double>(n)), 1e-3 * lim) << format_name(f) << " n=" << n;
      }
    }
  }
  // binary16 past n·u ≥ 1 (n ≥ 2048): no finite γ_n, the probabilistic bound alone.
  EXPECT_TRUE(std::isinf(gamma_n(2048, 0x1p-11)));
  EXPECT_TRUE(std::isfinite(default_budget(Format::binary16).scaled_error_limit(4096, Format::binary16)));
}

TEST(Defaults, Int8GrowsFromTheEightBitWorkingPrecision) {
  const KernelBudget b = default_budget(Format::int8);
  const std::int64_t n = 1024;
  // In float32 output units: γ̃_n(4) at u = 2^-9, over 2^-24.
  EXPECT_DOUBLE_EQ(b.scaled_error_limit(n, Format::float32), gamma_tilde_n(4, n, 0x1p-9) / 0x1p-24);
  // First order λ√n·u_w / u_F = 4·32·2^15; γ̃ adds (λ√n·u_w)²/2 ≈ 3% at this n.
  EXPECT_GT(b.scaled_error_limit(n, Format::float32), 4 * 32 * 0x1p15);
  EXPECT_LT(b.scaled_error_limit(n, Format::float32), 1.2 * 4 * 32 * 0x1p15);
}

TEST(Defaults, GammaTildeIsTheHighamMaryExpression) {
  // γ̃_n(λ) = exp(λ√n·u + n·u²/(1 − u)) − 1, first order λ√n·u.
  EXPECT_DOUBLE_EQ(gamma_tilde_n(1, 100, 0x1p-24), std::expm1(10 * 0x1p-24 + 100 * 0x1p-48 / (1 - 0x1p-24)));
  // Second order: (λ√n·u)²/2 ≈ 2.8e-10.
  EXPECT_NEAR(gamma_tilde_n(4, 10000, 0x1p-24), 4 * 100 * 0x1p-24, 1e-9);
  EXPECT_DOUBLE_EQ(gamma_n(10, 0x1p-24), 10 * 0x1p-24 / (1 - 10 * 0x1p-24));
}

TEST(Defaults, RelRmseLimitScalesWithCancellation) {
  const KernelBudget b = default_budget(Format::float32);
  CaseScore s;
  s.unit_roundoff = 0x1p-24;
  s.rms_expected = 1, s.rms_magnitude = 1;
  const double plain = b.rel_rmse_limit(400, s);
  EXPECT_NEAR(plain, gamma_tilde_n(1, 400, 0x1p-24), 1e-20);
  s.rms_expected = 0.01;  // outputs 100× smaller than the rows' magnitudes
  EXPECT_NEAR(b.rel_rmse_limit(400, s), 100 * plain, 1e-12 * plain);
}

// --- the verdict ---------------------------------------------------------------

CaseScore modest_score() {
  CaseScore s;
  s.format = Format::float32;
  s.unit_roundoff = 0x1p-24;
  s.elements = 10;
  s.rms_expected = s.rms_magnitude = 1;
  s.max_scaled_error = 3;
  s.relative_rmse = 1e-7;
  return s;
}

TEST(Verdict, WithinBudgetPasses) {
  const CaseScore s = modest_score();
  const Verdict v = judge(&s, CaseFaults{}, default_budget(Format::float32), 269);
  EXPECT_TRUE(v.pass);
  EXPECT_TRUE(v.reasons.empty());
  // The default ratio limit could not be checked without a plain run: noted.
  ASSERT_EQ(v.notes.size(), 1u);
  EXPECT_NE(v.notes[0].find("max_ratio_to_plain not checked"), std::string::npos);
}

TEST(Verdict, ScaledErrorReasonSaysByHowMuchAndWhere) {
  CaseScore s = modest_score();
  const std::int64_t n = 269;
  const double limit = default_budget(Format::float32).scaled_error_limit(n, Format::float32);
  s.max_scaled_error = 2 * limit;
  s.worst_scaled.index = {0, 1, 2, 3};
  s.worst_scaled.expected = 0.375, s.worst_scaled.obtained = 0.5;
  const Verdict v = judge(&s, CaseFaults{}, default_budget(Format::float32), n);
  EXPECT_FALSE(v.pass);
  ASSERT_EQ(v.reasons.size(), 1u);
  EXPECT_EQ(v.reasons[0].what, "max_scaled_error");
  EXPECT_DOUBLE_EQ(v.reasons[0].limit, limit);
  EXPECT_NE(v.reasons[0].text.find("(2x the limit)"), std::string::npos) << v.reasons[0].text;
  EXPECT_NE(v.reasons[0].text.find("default for float32"), std::string::npos) << v.reasons[0].text;
  EXPECT_NE(v.reasons[0].text.find("[0,1,2,3] expected 0x1.8p-2"), std::string::npos) << v.reasons[0].text;
}

TEST(Verdict, FaultsFailUnlessTolerated) {
  const CaseScore s = modest_score();
  CaseFaults f;
  f.faults.push_back(Fault{FaultClass::mask_leak, "masked key j=6 changes row", {0, 0, 0, 6}, 20, 0.7});
  KernelBudget b = default_budget(Format::float32);
  Verdict v = judge(&s, f, b, 100);
  EXPECT_FALSE(v.pass);
  ASSERT_EQ(v.reasons.size(), 1u);
  EXPECT_EQ(v.reasons[0].what, "mask_leak");
  b.tolerated_faults = {FaultClass::mask_leak};
  v = judge(&s, f, b, 100);
  EXPECT_TRUE(v.pass);
  EXPECT_NE(v.notes[0].find("tolerated fault mask_leak"), std::string::npos);
}

TEST(Verdict, NonFiniteCountedByTheScoreFailsEvenWithoutADetector) {
  CaseScore s = modest_score();
  s.non_finite = 2;
  s.first_non_finite = {0, 0, 1, 0};
  const Verdict v = judge(&s, CaseFaults{}, default_budget(Format::float32), 100);
  EXPECT_FALSE(v.pass);
  ASSERT_EQ(v.reasons.size(), 1u);
  EXPECT_EQ(v.reasons[0].what, "non_finite");
  EXPECT_NE(v.reasons[0].text.find("[0,0,1,0]"), std::string::npos) << v.reasons[0].text;
}

TEST(Verdict, UlpFailsOnlyOnACertainExcess) {
  CaseScore s = modest_score();
  KernelBudget b = default_budget(Format::float32);
  b.max_ulp.kind = Limit::Kind::fixed;
  b.max_ulp.value = 4;
  s.max_ulp = 5, s.max_ulp_certain = 4;  // 5 ± 1: may be 4
  Verdict v = judge(&s, CaseFaults{}, b, 100);
  EXPECT_TRUE(v.pass);
  EXPECT_NE(v.notes[0].find("uncertainty"), std::string::npos);
  s.max_ulp_certain = 5;
  v = judge(&s, CaseFaults{}, b, 100);
  EXPECT_FALSE(v.pass);
  EXPECT_EQ(v.reasons.at(0).what, "max_ulp");
  EXPECT_EQ(v.reasons.at(0).value, 5);
}

TEST(Verdict, RatioToPlainAndRelRmse) {
  CaseScore s = modest_score();
  const KernelBudget b = default_budget(Format::float32);
  PlainRatio r{5.0, 1.0};
  Verdict v = judge(&s, CaseFaults{}, b, 100, &r);
  ASSERT_EQ(v.reasons.size(), 1u);
  EXPECT_EQ(v.reasons[0].what, "max_ratio_to_plain");
  EXPECT_DOUBLE_EQ(v.reasons[0].value, 5.0);
  r = {1.0, 1.0};
  s.relative_rmse = 1e-3;
  v = judge(&s, CaseFaults{}, b, 100, &r);
  ASSERT_EQ(v.reasons.size(), 1u);
  EXPECT_EQ(v.reasons[0].what, "max_rel_rmse");
}

TEST(BudgetFile, KernelSectionNamingNoKernelOfTheRunIsFoundWithTheNearestName) {
  const Budget b = parse_budget(
      "version = 1\n[kernel.f16_f16acc]\nmax_ratio_to_plain = 64\n\n[kernel.f16_f32ac]\nmax_scaled_error = 0.5\n"
      "[kernel.zzz]\nmax_ulp = 3\n",
      "b.toml");
  // f16_f16acc is another bundled kernel: a shared file may address it.
  const auto u = b.unmatched_kernel_sections({"f16_f32acc"}, {"f16_f16acc", "f32_textbook"});
  ASSERT_EQ(u.size(), 2u);
  EXPECT_EQ(u[0].name, "f16_f32ac");
  EXPECT_EQ(u[0].line, 5);
  EXPECT_EQ(u[0].suggestion, "f16_f32acc");
  EXPECT_EQ(u[0].text(), "b.toml line 5: [kernel.f16_f32ac] names no kernel of this run, so it is not applied "
                         "(did you mean [kernel.f16_f32acc]?)");
  EXPECT_EQ(u[1].name, "zzz");
  EXPECT_EQ(u[1].suggestion, "");
  // The misspelt section really is not applied: the run gets the defaults.
  EXPECT_EQ(b.for_kernel("f16_f32acc", Format::binary16).max_scaled_error.kind, Limit::Kind::probabilistic);
  EXPECT_TRUE(b.unmatched_kernel_sections({"f16_f32ac", "zzz"}, {"f16_f16acc"}).empty());
}

TEST(Verdict, UnsupportedIsNotScoredBadOutputFails) {
  CaseFaults declined;
  declined.unsupported_runs = 1;
  Verdict v = judge(nullptr, declined, default_budget(Format::float32), 100);
  EXPECT_TRUE(v.pass);
  EXPECT_FALSE(v.scored);
  CaseFaults bad;
  bad.bad_output_runs = 1;
  v = judge(nullptr, bad, default_budget(Format::float32), 100);
  EXPECT_FALSE(v.pass);
  EXPECT_EQ(v.reasons.at(0).what, "bad_output");
  bad.bad_output_detail = "o.npy: shape [1,2,5,3], expected [1,2,3,5]";
  v = judge(nullptr, bad, default_budget(Format::float32), 100);
  EXPECT_EQ(v.reasons.at(0).text, "bad_output: o.npy: shape [1,2,5,3], expected [1,2,3,5]");
  CaseFaults crashed;
  crashed.faults.push_back(Fault{FaultClass::crash, "SIGSEGV", {}, 1, -1});
  EXPECT_FALSE(judge(nullptr, crashed, default_budget(Format::float32), 100).pass);
}

}  // namespace
}  // namespace headroom
