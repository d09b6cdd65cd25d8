// Tests of the score stage: ranks and ULP distances, element errors, case statistics, ratios, the split,
// and the a-priori dot-product bound the scaled error's unit rests on.
#include <gtest/gtest.h>
#include <mpfr.h>
#include <rapidcheck/gtest.h>

#include <bit>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <limits>
#include <random>

#include "headroom/binary16.h"
#include "headroom/scores.h"

namespace headroom {
namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();
constexpr double kInf = std::numeric_limits<double>::infinity();

// Signed rank of an IEEE pattern: the magnitude bits, negated when the sign is set.
std::int64_t pattern_rank(std::uint64_t bits, int width) {
  const std::uint64_t sign = std::uint64_t{1} << (width - 1);
  const auto mag = static_cast<std::int64_t>(bits & (sign - 1));
  return (bits & sign) ? -mag : mag;
}

// --- ranks and ULP distances: hand-counted values ---------------------------

TEST(FormatRank, Binary16HandCounted) {
  // IEEE 754-2019 binary16: 1.0 = 0x3C00, 65504 = 0x7BFF, +inf = 0x7C00.
  EXPECT_EQ(format_rank(1.0, Format::binary16), 0x3C00);
  EXPECT_EQ(format_rank(65504.0, Format::binary16), 0x7BFF);
  EXPECT_EQ(format_rank(kInf, Format::binary16), 0x7C00);
  EXPECT_EQ(format_rank(-1.0, Format::binary16), -0x3C00);
  EXPECT_EQ(format_rank(0x1p-24, Format::binary16), 1);   // smallest subnormal
  EXPECT_EQ(format_rank(0x1p-14, Format::binary16), 0x400);  // smallest normal
}

TEST(UlpDistance, Binary16AroundOneAndPowersOfTwo) {
  // Above 1 the step is 2^-10, below it 2^-11: both neighbours are 1 ULP away.
  EXPECT_EQ(ulp_distance(1.0, 1.0 + 0x1p-10, Format::binary16), 1);
  EXPECT_EQ(ulp_distance(1.0, 1.0 - 0x1p-11, Format::binary16), 1);
  EXPECT_EQ(ulp_distance(1.0 - 0x1p-11, 1.0 + 0x1p-10, Format::binary16), 2);
  EXPECT_EQ(ulp_distance(1.0, 2.0, Format::binary16), 1024);  // one binade = 2^10 steps
  EXPECT_EQ(ulp_distance(65504.0, kInf, Format::binary16), 1);
  // Values not in the format are rounded first: 1 + 2^-12 rounds to 1.
  EXPECT_EQ(ulp_distance(1.0 + 0x1p-12, 1.0, Format::binary16), 0);
}

TEST(UlpDistance, AcrossZero) {
  EXPECT_EQ(ulp_distance(0.0, -0.0, Format::binary16), 0);
  EXPECT_EQ(ulp_distance(0x1p-24, -0x1p-24, Format::binary16), 2);  // −s, 0, +s
  EXPECT_EQ(ulp_distance(0x1p-149, -0x1p-149, Format::float32), 2);
  EXPECT_EQ(ulp_distance(0x1p-133, -0x1p-133, Format::bfloat16), 2);  // bfloat16 subnormal 2^-133
  EXPECT_EQ(ulp_distance(0x1p-1074, -0.0, Format::float64), 1);
  EXPECT_EQ(ulp_distance(1.0, -1.0, Format::float32), 2 * 0x3F800000LL);
}

TEST(UlpDistance, BFloat16AndFloat32PowersOfTwo) {
  // bfloat16 has p = 8: 1.0 = 0x3F80, steps 2^-7 above 1, 2^-8 below.
  EXPECT_EQ(format_rank(1.0, Format::bfloat16), 0x3F80);
  EXPECT_EQ(ulp_distance(1.0, 1.0 + 0x1p-7, Format::bfloat16), 1);
  EXPECT_EQ(ulp_distance(1.0, 1.0 - 0x1p-8, Format::bfloat16), 1);
  EXPECT_EQ(ulp_distance(1.0, 2.0, Format::bfloat16), 128);
  for (int k = -120; k <= 120; k += 17) {
    const double p = std::ldexp(1.0, k);
    EXPECT_EQ(ulp_distance(p, p + std::ldexp(1.0, k - 23), Format::float32), 1) << k;
    EXPECT_EQ(ulp_distance(p, p - std::ldexp(1.0, k - 24), Format::float32), 1) << k;
    EXPECT_EQ(ulp_distance(p, 2 * p, Format::float32), 1 << 23) << k;
  }
  // int8 kernels write float32 (format.h).
  EXPECT_EQ(ulp_distance(1.0, 1.0 + 0x1p-23, Format::int8), 1);
}

// Exhaustive against the formats stage's binary16/bfloat16 patterns
// (IEEE 754-2019 §3.4: the encoding orders finite values like integers).
TEST(FormatRank, EqualsTheBitPatternForEveryBinary16AndBFloat16) {
  for (std::uint32_t bits = 0; bits < 0x10000; ++bits) {
    const auto b = static_cast<std::uint16_t>(bits);
    const double h = binary16_to_float(b);
    if (!std::isnan(h)) {
      ASSERT_EQ(format_rank(h, Format::binary16), pattern_rank(bits, 16)) << bits;
    }
    const double bf = bfloat16_to_float(b);
    if (!std::isnan(bf)) {
      ASSERT_EQ(format_rank(bf, Format::bfloat16), pattern_rank(bits, 16)) << bits;
    }
  }
}

RC_GTEST_PROP(FormatRank, EqualsTheBitPatternForFloat32AndFloat64, (std::uint32_t b32, std::uint64_t b64)) {
  const float f = std::bit_cast<float>(b32);
  const double d = std::bit_cast<double>(b64);
  RC_PRE(!std::isnan(f) && !std::isnan(d));
  RC_ASSERT(format_rank(f, Format::float32) == pattern_rank(b32, 32));
  RC_ASSERT(format_rank(d, Format::float64) == pattern_rank(b64, 64));
}

RC_GTEST_PROP(FormatRank, IsMonotoneInEveryFormat, (double a, double b)) {
  RC_PRE(std::isfinite(a) && std::isfinite(b) && a <= b);
  for (Format f : {Format::float64, Format::float32, Format::binary16, Format::bfloat16}) {
    RC_ASSERT(format_rank(a, f) <= format_rank(b, f));
  }
}

// --- element errors ----------------------------------------------------------

TEST(ElementError, ScaledErrorUnitIsUTimesMagnitude) {
  // o = o* + u·M exactly: one unit. float32 u = 2^-24, M = 2.
  const ElementError e = element_error(0.5 + 0x1p-23, 0.5, 0.0, 2.0, Format::float32);
  EXPECT_EQ(e.scaled, 1.0);
  EXPECT_EQ(e.abs, 0x1p-23);
  EXPECT_EQ(e.rel, 0x1p-22);
  // float32 values in [0.5, 1) are spaced 2^-24: 0.5 + 2^-23 is 2 steps above 0.5.
  EXPECT_EQ(e.ulp, 2);
}

TEST(ElementError, MagnitudeZeroIsGuardedBySubnormalSteps) {
  // M = 0 means o* = 0 exactly; the unit is then float32's smallest subnormal.
  EXPECT_EQ(element_error(0.0, 0.0, 0.0, 0.0, Format::float32).scaled, 0.0);
  EXPECT_EQ(element_error(0x1p-149, 0.0, 0.0, 0.0, Format::float32).scaled, 1.0);
  EXPECT_EQ(element_error(0x1p-24, 0.0, 0.0, 0.0, Format::binary16).scaled, 1.0);
  EXPECT_TRUE(std::isinf(element_error(0x1p-24, 0.0, 0.0, 0.0, Format::binary16).rel));
}

TEST(ElementError, CorrectRoundingScoresAtMostOne) {
  std::mt19937_64 gen(7);
  std::uniform_real_distribution<double> val(-4.0, 4.0);
  for (int k = 0; k < 2000; ++k) {
    const double exact = val(gen);
    for (Format f : {Format::float32, Format::binary16, Format::bfloat16}) {
      const double o = round_to_format(exact, f);
      EXPECT_LE(element_error(o, exact, 0.0, std::fabs(exact), f).scaled, 1.0);
    }
  }
}

TEST(ElementError, UlpUncertainWhenTheIntervalStraddlesARoundingBoundary) {
  // 1 + 2^-11 is the midpoint between binary16 neighbours 1 and 1 + 2^-10.
  EXPECT_TRUE(element_error(1.0, 1.0 + 0x1p-11, 0x1p-30, 1.0, Format::binary16).ulp_uncertain);
  EXPECT_FALSE(element_error(1.0, 1.0 + 0x1p-12, 0x1p-30, 1.0, Format::binary16).ulp_uncertain);
  EXPECT_FALSE(element_error(1.0, 1.0, 0.0, 1.0, Format::float32).ulp_uncertain);
}

// --- case statistics on hand examples ----------------------------------------

// A core reference [1, 1, 2, 2] (B, Hq, Tq, Dv) with row 1 fully masked.
CoreReference two_row_reference() {
  CoreReference r;
  r.out = Tensor({1, 1, 2, 2});
  r.out.values = {1.0, -2.0, kNaN, kNaN};
  r.bound = Tensor({1, 1, 2, 2});
  r.bound.values = {0, 0, kNaN, kNaN};
  r.magnitude = Tensor({1, 1, 2, 2});
  r.magnitude.values = {2.0, 2.0, kNaN, kNaN};
  r.lse = Tensor({1, 1, 2});
  r.lse.values = {0.5, kNaN};
  r.lse_bound = Tensor({1, 1, 2});
  r.fully_masked = {0, 1};
  return r;
}

Tensor output(std::vector<double> v) {
  Tensor t({1, 1, 2, 2});
  t.values = std::move(v);
  return t;
}

TEST(ScoreCore, RmseCosineAndL1OnAHandExample) {
  const CoreReference ref = two_row_reference();
  // Row 0: errors 0.5 and 0; row 1 (masked) holds garbage that must not count.
  const CaseScore s = score_core(output({1.5, -2.0, 1e30, -7.0}), nullptr, ref, Format::float32);
  EXPECT_EQ(s.elements, 2);
  EXPECT_EQ(s.masked_rows, 1);
  EXPECT_EQ(s.masked_elements, 2);
  EXPECT_EQ(s.non_finite, 0);
  EXPECT_DOUBLE_EQ(s.max_abs_error, 0.5);
  EXPECT_DOUBLE_EQ(s.rmse, std::sqrt(0.25 / 2));
  EXPECT_DOUBLE_EQ(s.rms_expected, std::sqrt(5.0 / 2));
  EXPECT_DOUBLE_EQ(s.relative_rmse, std::sqrt(0.25 / 5.0));
  EXPECT_DOUBLE_EQ(s.relative_l1, 0.5 / 3.0);
  // cos = (1.5·1 + 2·2) / (|(1.5, −2)|·|(1, −2)|) = 5.5 / (2.5·√5)
  EXPECT_DOUBLE_EQ(s.cosine, 5.5 / (2.5 * std::sqrt(5.0)));
  // Scaled: 0.5 / (2^-24 · 2) = 2^22. ULP: float32 [1, 2) steps 2^-23, so 2^22 steps.
  EXPECT_DOUBLE_EQ(s.max_scaled_error, 0x1p22);
  EXPECT_EQ(s.max_ulp, 1 << 22);
  EXPECT_EQ(s.worst_scaled.index, (std::vector<std::int64_t>{0, 0, 0, 0}));
  EXPECT_EQ(s.worst_scaled.expected, 1.0);
  EXPECT_EQ(s.worst_scaled.obtained, 1.5);
  EXPECT_EQ(s.ulp_histogram[0], 1);   // the exact element
  EXPECT_EQ(s.ulp_histogram[23], 1);  // 2^22 ulp: past the last edge 2^20
}

TEST(ScoreCore, ExactOutputScoresZeroAndCosineOne) {
  const CaseScore s = score_core(output({1.0, -2.0, 0.0, 0.0}), nullptr, two_row_reference(), Format::float32);
  EXPECT_EQ(s.max_scaled_error, 0.0);
  EXPECT_EQ(s.rmse, 0.0);
  EXPECT_EQ(s.relative_l1, 0.0);
  EXPECT_DOUBLE_EQ(s.cosine, 1.0);
}

TEST(ScoreCore, NonFiniteOutputsAreCountedAndExcluded) {
  const CaseScore s = score_core(output({kNaN, -2.5, 0.0, 0.0}), nullptr, two_row_reference(), Format::float32);
  EXPECT_EQ(s.non_finite, 1);
  EXPECT_EQ(s.first_non_finite, (std::vector<std::int64_t>{0, 0, 0, 0}));
  EXPECT_EQ(s.elements, 1);
  // Only the finite element (error 0.5) is in the statistics: never averaged with NaN.
  EXPECT_DOUBLE_EQ(s.rmse, 0.5);
  EXPECT_DOUBLE_EQ(s.max_abs_error, 0.5);
  EXPECT_FALSE(std::isnan(s.cosine));
  const CaseScore inf = score_core(output({kInf, -kInf, 0.0, 0.0}), nullptr, two_row_reference(), Format::float32);
  EXPECT_EQ(inf.non_finite, 2);
  EXPECT_EQ(inf.elements, 0);
  EXPECT_EQ(inf.rmse, 0.0);
}

TEST(ScoreCore, LogSumExpErrorSkipsMaskedRows) {
  Tensor lse({1, 1, 2});
  lse.values = {0.5 + 0x1p-10, 123.0};
  const CaseScore s = score_core(output({1.0, -2.0, 0.0, 0.0}), &lse, two_row_reference(), Format::float32);
  ASSERT_TRUE(s.lse_error.has_value());
  EXPECT_DOUBLE_EQ(*s.lse_error, 0x1p-10);
  EXPECT_FALSE(score_core(output({1.0, -2.0, 0.0, 0.0}), nullptr, two_row_reference(), Format::float32).lse_error);
}

TEST(ScoreCore, ShapeMismatchIsRefused) {
  Tensor wrong({1, 1, 1, 2});
  EXPECT_THROW(score_core(wrong, nullptr, two_row_reference(), Format::float32), std::invalid_argument);
}

TEST(ScoreBlock, RowsWithAFullyMaskedHeadAreExcluded) {
  // Y [1, 2, 2]; Hq = 2, Tq = 2: head 1 has query 0 fully masked, so Y[0, 0, :] has no value.
  BlockReference r;
  r.out = Tensor({1, 2, 2});
  r.out.values = {3.0, 4.0, 1.0, 1.0};
  r.bound = Tensor({1, 2, 2});
  r.magnitude = Tensor({1, 2, 2});
  r.magnitude.values = {4.0, 4.0, 1.0, 1.0};
  r.fully_masked = {0, 0, 1, 0};  // (b=0,h=0,i=0), (0,0,1), (0,1,0), (0,1,1)
  Tensor y({1, 2, 2});
  y.values = {100.0, 100.0, 1.0, 1.0 + 0x1p-23};
  const CaseScore s = score_block(y, r, Format::float32);
  EXPECT_EQ(s.elements, 2);
  EXPECT_EQ(s.masked_elements, 2);
  EXPECT_DOUBLE_EQ(s.max_scaled_error, 2.0);  // 2^-23 / (2^-24 · 1)
  EXPECT_EQ(s.worst_scaled.index, (std::vector<std::int64_t>{0, 1, 1}));
  EXPECT_EQ(s.ulp_histogram[0], 1);  // Y[0,1,0] exact
  EXPECT_EQ(s.ulp_histogram[2], 1);  // Y[0,1,1] one step (float32 [1, 2) is spaced 2^-23)
}

TEST(Describe, HexFloatsInTheFailureLine) {
  const CaseScore s = score_core(output({1.5, -2.0, 0.0, 0.0}), nullptr, two_row_reference(), Format::float32);
  const std::string line = describe(s.worst_scaled);
  EXPECT_NE(line.find("[0,0,0,0]"), std::string::npos) << line;
  EXPECT_NE(line.find("expected 0x1p+0"), std::string::npos) << line;
  EXPECT_NE(line.find("obtained 0x1.8p+0"), std::string::npos) << line;
  EXPECT_EQ(hex_float(0.375), "0x1.8p-2");
}

// --- ratio to the plain kernel and the quantisation split --------------------

TEST(RatioToPlain, GuardsZerosWithTheCorrectRoundingFloor) {
  CaseScore k, p;
  k.unit_roundoff = p.unit_roundoff = 0x1p-24;
  k.max_scaled_error = 8, p.max_scaled_error = 2;
  k.rmse = 3e-7, p.rmse = 1e-7, p.rms_expected = 1;
  PlainRatio r = ratio_to_plain(k, p);
  EXPECT_DOUBLE_EQ(r.max_scaled_error, 4.0);
  EXPECT_DOUBLE_EQ(r.rmse, 3.0);
  // An exact plain kernel is credited with correct rounding: floors 1 and u·RMS(o*).
  p.max_scaled_error = 0, p.rmse = 0;
  r = ratio_to_plain(k, p);
  EXPECT_DOUBLE_EQ(r.max_scaled_error, 8.0);
  EXPECT_DOUBLE_EQ(r.rmse, 3e-7 / 0x1p-24);
  // Everything zero: the ratio is 0, not NaN; only the kernel off: +inf.
  p.rms_expected = 0;
  k.rmse = 0;
  EXPECT_EQ(ratio_to_plain(k, p).rmse, 0.0);
  k.rmse = 1e-9;
  EXPECT_TRUE(std::isinf(ratio_to_plain(k, p).rmse));
  p.format = Format::binary16;
  EXPECT_THROW(ratio_to_plain(k, p), std::invalid_argument);
}

TEST(RatioToPlain, LogSumExpErrorAgainstThePlainKernelsWithAFloat32Floor) {
  CaseScore k, p;
  k.unit_roundoff = p.unit_roundoff = 0x1p-24;
  // Neither returns a log-sum-exp: no ratio (NaN is never over a limit).
  EXPECT_TRUE(std::isnan(ratio_to_plain(k, p).lse));
  k.lse_error = 3e-4;
  EXPECT_TRUE(std::isnan(ratio_to_plain(k, p).lse));
  p.lse_error = 1e-4, p.lse_magnitude = 2.0;
  EXPECT_DOUBLE_EQ(ratio_to_plain(k, p).lse, 3.0);
  // A nearly exact plain kernel is credited with 8 float32 roundings of max(1, max|L*|).
  p.lse_error = 0;
  EXPECT_DOUBLE_EQ(ratio_to_plain(k, p).lse, 3e-4 / (8 * 0x1p-24 * 2.0));
  p.lse_magnitude = 0.25;
  EXPECT_DOUBLE_EQ(ratio_to_plain(k, p).lse, 3e-4 / (8 * 0x1p-24));
}

TEST(SplitQuantisation, GivesInputAndArithmeticErrorsSeparately) {
  CoreReference source = two_row_reference();
  CoreReference received = two_row_reference();
  received.out.values = {1.0 + 0x1p-20, -2.0, kNaN, kNaN};  // what input rounding moved
  // The kernel is exact on what it received except rounding to float32 (none needed here).
  const Tensor out = output({1.0 + 0x1p-20, -2.0 + 0x1p-21, 0.0, 0.0});
  const QuantSplit q = split_quantisation(out, nullptr, received, source, Format::float32);
  // Units: u·M = 2^-24 · 2 = 2^-23.
  EXPECT_DOUBLE_EQ(q.input.max_scaled_error, 8.0);       // 2^-20 / 2^-23
  EXPECT_DOUBLE_EQ(q.arithmetic.max_scaled_error, 4.0);  // 2^-21 / 2^-23
  EXPECT_DOUBLE_EQ(q.total.max_scaled_error, 8.0);       // max(2^-20, 2^-21) / 2^-23
  EXPECT_EQ(q.arithmetic.worst_scaled.index, (std::vector<std::int64_t>{0, 0, 0, 1}));
}

// --- the a-priori bound behind the unit: float32 dot products ----------------
//
// Higham 2002, §3.1 (eq. 3.5): a recursively summed dot product of n terms
// satisfies |fl(xᵀy) − xᵀy| ≤ γ_n Σ|x_i y_i|, γ_n = n·u/(1 − n·u), u = 2^-24.
// The exact value is computed in MPFR at 256 bits and proven exact: a float32
// product has 48 significant bits, and every value here lies in [2^-55, 2^19)
// (entries in [2^-4, 2^4), n ≤ 1024), a span of 74 bits; MPFR's ternary value 0
// confirms each operation exact rather than assuming it.
TEST(AprioriBound, Float32TextbookDotProductsStayWithinGammaN) {
  std::mt19937 gen(20190314);
  std::uniform_real_distribution<float> mag(0.0625f, 16.0f);
  std::bernoulli_distribution neg(0.5);
  mpfr_t exact, absum, term, err, bound;
  for (mpfr_t* m : {&exact, &absum, &term, &err, &bound}) mpfr_init2(*m, 256);
  double worst_of_gamma = 0, worst_of_sqrt = 0;
  for (int n : {1, 2, 3, 7, 16, 64, 100, 257, 1024}) {
    for (int trial = 0; trial < 40; ++trial) {
      std::vector<float> x(n), y(n);
      for (int i = 0; i < n; ++i) {
        x[i] = neg(gen) ? -mag(gen) : mag(gen);
        y[i] = neg(gen) ? -mag(gen) : mag(gen);
      }
      float fl = 0.0f;  // the textbook loop, float32 throughout
      for (int i = 0; i < n; ++i) fl = fl + x[i] * y[i];
      mpfr_set_zero(exact, 1);
      mpfr_set_zero(absum, 1);
      for (int i = 0; i < n; ++i) {
        ASSERT_EQ(mpfr_set_flt(term, x[i], MPFR_RNDN), 0);
        ASSERT_EQ(mpfr_mul_d(term, term, y[i], MPFR_RNDN), 0);
        ASSERT_EQ(mpfr_add(exact, exact, term, MPFR_RNDN), 0);
        ASSERT_EQ(mpfr_abs(term, term, MPFR_RNDN), 0);
        ASSERT_EQ(mpfr_add(absum, absum, term, MPFR_RNDN), 0);
      }
      ASSERT_EQ(mpfr_set_flt(err, fl, MPFR_RNDN), 0);
      ASSERT_EQ(mpfr_sub(err, err, exact, MPFR_RNDN), 0);
      mpfr_abs(err, err, MPFR_RNDN);
      // bound = γ_n · Σ|x y|, rounded up so the comparison is conservative.
      const double nu = n * 0x1p-24;
      mpfr_set_d(bound, nu, MPFR_RNDU);
      mpfr_div_d(bound, bound, 1.0 - nu, MPFR_RNDU);
      mpfr_mul(bound, bound, absum, MPFR_RNDU);
      ASSERT_LE(mpfr_cmp(err, bound), 0) << "n = " << n << " trial " << trial;
      const double e = mpfr_get_d(err, MPFR_RNDN), s = mpfr_get_d(absum, MPFR_RNDN);
      worst_of_gamma = std::max(worst_of_gamma, e / mpfr_get_d(bound, MPFR_RNDN));
      worst_of_sqrt = std::max(worst_of_sqrt, e / (std::sqrt(static_cast<double>(n)) * 0x1p-24 * s));
    }
  }
  for (mpfr_t* m : {&exact, &absum, &term, &err, &bound}) mpfr_clear(*m);
  // Always print the worst figure seen (STYLE.md).
  std::printf("float32 dot products: worst error / (gamma_n sum|xy|) = %.3g, / (sqrt(n) u sum|xy|) = %.3g\n",
              worst_of_gamma, worst_of_sqrt);
  EXPECT_LT(worst_of_gamma, 1.0);
}

}  // namespace
}  // namespace headroom
