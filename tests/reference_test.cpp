// headroom — tests of the certified reference (reference.h): worked values and properties.
#include "headroom/reference.h"

#include <gtest/gtest.h>
#include <rapidcheck/gtest.h>

#include <bit>
#include <cmath>
#include <cstdio>
#include <limits>
#include <random>
#include <string>
#include <mpfr.h>
#include <boost/multiprecision/cpp_bin_float.hpp>

#include "../harness/reference/mp_arith.h"
#include "../harness/reference/mp_row.h"
#include "headroom/input_error.h"
#include "reference_support.h"

namespace headroom {
namespace {

using testing::enclose_same;
using testing::random_core;

CoreShape small_shape(std::int64_t hq, std::int64_t hkv, std::int64_t tq, std::int64_t tk, std::int64_t dk,
                      std::int64_t dv) {
  CoreShape s;
  s.batch = 1;
  s.q_heads = hq;
  s.kv_heads = hkv;
  s.q_len = tq;
  s.kv_len = tk;
  s.key_dim = dk;
  s.value_dim = dv;
  return s;
}

// Every finite element's bound within 2^target of its magnitude.
void expect_within_target(const CoreReference& r, int target_log2) {
  double worst = 0;
  for (std::size_t i = 0; i < r.out.values.size(); ++i) {
    if (std::isnan(r.out.values[i])) continue;
    const double m = r.magnitude.values[i];
    ASSERT_LE(r.bound.values[i], std::ldexp(m, target_log2) * (1 + 0x1p-40)) << "element " << i;
    if (m > 0) worst = std::max(worst, r.bound.values[i] / m);
  }
  std::printf("worst bound / magnitude = %a (target 2^%d)\n", worst, target_log2);
}

// softmax([1, 2, 3]) = [0.0900305732, 0.2447284711, 0.6652409558] (common
// knowledge, 10 digits). Scores z_j = q·k_j with q = 1, k = 1, 2, 3; V the
// identity makes out[d] = p_d.
TEST(ReferenceCore, SoftmaxOfOneTwoThree) {
  CoreProblem p;
  p.shape = small_shape(1, 1, 1, 3, 1, 3);
  CoreInputs in;
  in.q = Tensor({1, 1, 1, 1});
  in.q.values = {1.0};
  in.k = Tensor({1, 1, 3, 1});
  in.k.values = {1.0, 2.0, 3.0};
  in.v = Tensor({1, 1, 3, 3});
  in.v.values = {1, 0, 0, 0, 1, 0, 0, 0, 1};
  for (ReferenceMethod method : {ReferenceMethod::fast, ReferenceMethod::multiprecision}) {
  ReferenceOptions opt;
  opt.method = method;
  const CoreReference r = reference_core(p, in, opt);
  const double expected[3] = {0.0900305732, 0.2447284711, 0.6652409558};
  for (int d = 0; d < 3; ++d) {
    EXPECT_NEAR(r.out.values[d], expected[d], 5e-11) << d;
    EXPECT_LE(r.bound.values[d], 0x1p-80 * r.magnitude.values[d]);
    EXPECT_NEAR(r.magnitude.values[d], expected[d], 5e-11);  // v one-hot: Σ p|v| = p_d
  }
  // lse = log(e + e² + e³) = 3 + log(1 + e^-1 + e^-2); the double formula is
  // accurate to a few ulps here.
  EXPECT_NEAR(r.lse.values[0], 3.0 + std::log1p(std::exp(-1.0) + std::exp(-2.0)), 1e-14);
  EXPECT_LE(r.lse_bound.values[0], 0x1p-80);
  EXPECT_TRUE(r.certified);
  EXPECT_EQ(r.fully_masked[0], 0);
  }
}

// Equal scores (q = 0): every p_j = 1/n, lse = log n, out = mean of v.
TEST(ReferenceCore, EqualScoresGiveTheMean) {
  CoreProblem p;
  p.shape = small_shape(1, 1, 1, 4, 2, 1);
  CoreInputs in;
  in.q = Tensor({1, 1, 1, 2});
  in.k = Tensor({1, 1, 4, 2});
  in.k.values = {1, -2, 3, 0.5, -7, 2, 0.25, 9};
  in.v = Tensor({1, 1, 4, 1});
  in.v.values = {1, 2, 4, -3};
  const CoreReference r = reference_core(p, in);
  EXPECT_EQ(r.out.values[0], 1.0);                    // (1 + 2 + 4 − 3)/4, exact in double
  EXPECT_EQ(r.magnitude.values[0], 2.5);              // (1 + 2 + 4 + 3)/4
  EXPECT_NEAR(r.lse.values[0], std::log(4.0), 0x1p-52);
}

TEST(ReferenceCore, FullyMaskedRowsAreFlaggedNaN) {
  auto c = random_core(small_shape(2, 1, 3, 4, 3, 2), 7);
  c.problem.mask.kind = MaskKind::dense;
  c.problem.mask.allowed = Tensor({1, 1, 3, 4});
  for (std::int64_t j = 0; j < 4; ++j) c.problem.mask.allowed.at(0, 0, 0, j) = 1;  // row 0 sees all
  c.problem.mask.allowed.at(0, 0, 2, 3) = 1;                                      // row 2 sees key 3; row 1 none
  const CoreReference r = reference_core(c.problem, c.inputs);
  for (std::int64_t h = 0; h < 2; ++h) {
    const std::size_t row1 = static_cast<std::size_t>(h * 3 + 1);
    EXPECT_EQ(r.fully_masked[row1], 1);
    EXPECT_EQ(r.fully_masked[row1 - 1], 0);
    EXPECT_EQ(r.fully_masked[row1 + 1], 0);
    EXPECT_TRUE(std::isnan(r.out.at(0, h, 1, 0)) && std::isnan(r.bound.at(0, h, 1, 1)));
    EXPECT_TRUE(std::isnan(r.lse.at(0, h, 1)));
    // A single visible key: out = v of that key exactly.
    EXPECT_EQ(r.out.at(0, h, 2, 0), c.inputs.v.at(0, 0, 3, 0));
    EXPECT_EQ(r.out.at(0, h, 2, 1), c.inputs.v.at(0, 0, 3, 1));
  }
  EXPECT_TRUE(r.certified);
}

TEST(ReferenceCore, RejectsBadInputWithInputError) {
  auto c = random_core(small_shape(1, 1, 2, 2, 2, 2), 3);
  c.inputs.v.values[1] = std::numeric_limits<double>::quiet_NaN();
  EXPECT_THROW(reference_core(c.problem, c.inputs), InputError);
  auto d = random_core(small_shape(1, 1, 2, 2, 2, 2), 3);
  d.inputs.k.shape[2] = 3;  // shape disagrees with the problem
  EXPECT_THROW(reference_core(d.problem, d.inputs), InputError);
}

TEST(ReferenceCore, MeetsAStricterTargetOnLargeLogits) {
  auto c = random_core(small_shape(1, 1, 3, 17, 8, 4), 11, 6.0);  // logits in the hundreds
  ReferenceOptions opt;
  opt.target_log2 = -200;
  const CoreReference r = reference_core(c.problem, c.inputs, opt);
  EXPECT_TRUE(r.certified);
  expect_within_target(r, -200);
}

// Boost's exp for cpp_bin_float<256> against MPFR's correctly rounded one: the
// error assumed for it in mp_arith.h (2^12 units of 2^-256) must hold. Prints
// the worst seen.
TEST(ReferenceBackends, BinFloatExpWithinAssumedError) {
  using Bin = boost::multiprecision::number<
      boost::multiprecision::cpp_bin_float<256, boost::multiprecision::digit_base_2>, boost::multiprecision::et_off>;
  mpfr_t x, y, e;
  mpfr_inits2(600, x, y, e, static_cast<mpfr_ptr>(nullptr));
  std::mt19937_64 rng(5);
  std::uniform_real_distribution<double> arg(-800.0, 0.0);
  double worst = 0;
  for (int trial = 0; trial < 300; ++trial) {
    const double t = trial < 3 ? -static_cast<double>(trial) * 0.5 : arg(rng) / (1 + trial % 7);
    Bin b = boost::multiprecision::exp(Bin(t));
    const std::string text = b.str(0, std::ios_base::scientific);
    mpfr_set_str(y, text.c_str(), 10, MPFR_RNDN);  // 0 digits = all of them: the exact binary value
    mpfr_set_d(x, t, MPFR_RNDN);
    mpfr_exp(x, x, MPFR_RNDN);
    mpfr_sub(e, y, x, MPFR_RNDN);
    mpfr_div(e, e, x, MPFR_RNDN);
    worst = std::max(worst, std::fabs(mpfr_get_d(e, MPFR_RNDN)) * 0x1p256);
  }
  mpfr_clears(x, y, e, static_cast<mpfr_ptr>(nullptr));
  std::printf("cpp_bin_float<256> exp: worst relative error %.3g units of 2^-256 (assumed <= 4096)\n", worst);
  EXPECT_LE(worst, 4096.0);
}

// ---- properties ---------------------------------------------------------

// A small random core case drawn by RapidCheck: sizes 1..5, seeds free.
struct SmallCase {
  testing::CoreCase c;
  std::uint64_t seed;
};

SmallCase draw_case(bool gqa) {
  const auto hkv = *rc::gen::inRange<std::int64_t>(1, 3);
  const auto group = gqa ? *rc::gen::inRange<std::int64_t>(1, 3) : 1;
  const auto tq = *rc::gen::inRange<std::int64_t>(1, 6);
  const auto tk = *rc::gen::inRange<std::int64_t>(1, 6);
  const auto dk = *rc::gen::inRange<std::int64_t>(1, 6);
  const auto dv = *rc::gen::inRange<std::int64_t>(1, 5);
  const auto seed = *rc::gen::arbitrary<std::uint64_t>();
  const double sigma = *rc::gen::element(0.25, 1.0, 4.0);
  return {random_core(small_shape(hkv * group, hkv, tq, tk, dk, dv), seed, sigma), seed};
}

RC_GTEST_PROP(ReferenceProperties, ConstantBiasChangesNothing, ()) {
  auto [c, seed] = draw_case(false);
  const double offset = *rc::gen::element(-3.5, 1.0, 40.0, 1e6);
  const CoreReference plain = reference_core(c.problem, c.inputs);
  CoreProblem shifted = c.problem;
  shifted.mask.kind = MaskKind::bias;
  shifted.mask.bias = Tensor({1, 1, c.problem.shape.q_len, c.problem.shape.kv_len});
  for (double& b : shifted.mask.bias.values) b = offset;
  const CoreReference moved = reference_core(shifted, c.inputs);
  RC_ASSERT(plain.certified && moved.certified);
  RC_ASSERT(enclose_same(plain.out, plain.bound, moved.out, moved.bound));
  // lse moves by exactly the offset.
  for (std::size_t i = 0; i < plain.lse.values.size(); ++i) {
    const double diff = std::fabs(moved.lse.values[i] - (plain.lse.values[i] + offset));
    RC_ASSERT(diff <= plain.lse_bound.values[i] + moved.lse_bound.values[i] +
                          0x1p-52 * (std::fabs(moved.lse.values[i]) + std::fabs(plain.lse.values[i]) + std::fabs(offset)));
  }
}

RC_GTEST_PROP(ReferenceProperties, GroupedQueryEqualsRepeatedHeads, ()) {
  auto [c, seed] = draw_case(true);
  const CoreShape& s = c.problem.shape;
  const std::int64_t group = s.q_heads / s.kv_heads;
  CoreProblem full = c.problem;
  full.shape.kv_heads = s.q_heads;
  CoreInputs rep = c.inputs;
  rep.k = Tensor({s.batch, s.q_heads, s.kv_len, s.key_dim});
  rep.v = Tensor({s.batch, s.q_heads, s.kv_len, s.value_dim});
  for (std::int64_t h = 0; h < s.q_heads; ++h)
    for (std::int64_t j = 0; j < s.kv_len; ++j) {
      for (std::int64_t d = 0; d < s.key_dim; ++d) rep.k.at(0, h, j, d) = c.inputs.k.at(0, h / group, j, d);
      for (std::int64_t d = 0; d < s.value_dim; ++d) rep.v.at(0, h, j, d) = c.inputs.v.at(0, h / group, j, d);
    }
  const CoreReference a = reference_core(c.problem, c.inputs), b = reference_core(full, rep);
  RC_ASSERT(bit_identical(a.out, b.out) && bit_identical(a.bound, b.bound) && bit_identical(a.lse, b.lse));
}

RC_GTEST_PROP(ReferenceProperties, CausalAlignmentsCoincideOnlyForSquareProblems, ()) {
  auto [c, seed] = draw_case(false);
  const CoreShape& s = c.problem.shape;
  // Scores of size ≤ a few units, so that an extra visible key always moves
  // the lse visibly (with logits of 50 an extra key may weigh e^-50, below
  // what a double shows).
  for (double& x : c.inputs.q.values) x *= 0x1p-6;
  CoreProblem tl = c.problem, br = c.problem;
  tl.mask.kind = MaskKind::causal_top_left;
  br.mask.kind = MaskKind::causal_bottom_right;
  const CoreReference a = reference_core(tl, c.inputs), b = reference_core(br, c.inputs);
  if (s.q_len == s.kv_len) {
    RC_ASSERT(bit_identical(a.out, b.out));
  } else {
    // Row 0 sees key 0 only (top-left) or keys 0..Tk−Tq (bottom-right; Tk > Tq),
    // or row Tq−1 sees Tq keys (top-left) versus Tk (bottom-right): the visible
    // sets differ, so the fully-masked flags or the values must differ.
    bool differ = a.fully_masked != b.fully_masked;
    for (std::size_t i = 0; i < a.lse.values.size() && !differ; ++i) {
      const double x = a.lse.values[i], y = b.lse.values[i];
      differ = std::isnan(x) != std::isnan(y) ||
               std::fabs(x - y) > a.lse_bound.values[i] + b.lse_bound.values[i] + 0x1p-50 * std::fabs(x);
    }
    RC_ASSERT(differ);
  }
}

RC_GTEST_PROP(ReferenceProperties, MaskedKeysCannotInfluenceTheOutput, ()) {
  auto [c, seed] = draw_case(false);
  const CoreShape& s = c.problem.shape;
  c.problem.mask.kind = MaskKind::dense;
  c.problem.mask.allowed = Tensor({1, 1, s.q_len, s.kv_len});
  for (double& a : c.problem.mask.allowed.values) a = *rc::gen::element(0.0, 1.0, 1.0);
  const CoreReference before = reference_core(c.problem, c.inputs);
  // For each row i, poison K and V of the keys hidden from row i (huge
  // values that would dominate any sum) and compare row i bit for bit.
  for (std::int64_t i = 0; i < s.q_len; ++i) {
    CoreInputs poisoned = c.inputs;
    for (std::int64_t j = 0; j < s.kv_len; ++j) {
      if (c.problem.mask.allowed.at(0, 0, i, j) != 0) continue;
      for (std::int64_t g = 0; g < s.kv_heads; ++g) {
        for (std::int64_t d = 0; d < s.key_dim; ++d) poisoned.k.at(0, g, j, d) = 1e30;
        for (std::int64_t d = 0; d < s.value_dim; ++d) poisoned.v.at(0, g, j, d) = -1e30;
      }
    }
    const CoreReference after = reference_core(c.problem, poisoned);
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      for (std::int64_t d = 0; d < s.value_dim; ++d) {
        const double x = before.out.at(0, h, i, d), y = after.out.at(0, h, i, d);
        RC_ASSERT((std::isnan(x) && std::isnan(y)) || std::bit_cast<std::uint64_t>(x) == std::bit_cast<std::uint64_t>(y));
      }
  }
}

RC_GTEST_PROP(ReferenceProperties, MpfrAndBinFloatAgreeWithinTheirBounds, ()) {
  auto [c, seed] = draw_case(true);
  ReferenceOptions mpfr, bin;
  mpfr.method = bin.method = ReferenceMethod::multiprecision;  // both backends on every row
  bin.backend = ReferenceBackend::cpp_bin_float;
  const CoreReference a = reference_core(c.problem, c.inputs, mpfr), b = reference_core(c.problem, c.inputs, bin);
  RC_ASSERT(a.certified && b.certified);
  RC_ASSERT(enclose_same(a.out, a.bound, b.out, b.bound));
  RC_ASSERT(enclose_same(a.lse, a.lse_bound, b.lse, b.lse_bound));
}

RC_GTEST_PROP(ReferenceProperties, ThreadCountChangesNoBit, ()) {
  auto [c, seed] = draw_case(true);
  ReferenceOptions one, many;
  one.method = many.method = ReferenceMethod::multiprecision;  // the fast path has its own test
  many.threads = *rc::gen::inRange(2u, 6u);
  const CoreReference a = reference_core(c.problem, c.inputs, one), b = reference_core(c.problem, c.inputs, many);
  RC_ASSERT(bit_identical(a.out, b.out) && bit_identical(a.bound, b.bound) && bit_identical(a.magnitude, b.magnitude));
  RC_ASSERT(bit_identical(a.lse, b.lse) && bit_identical(a.lse_bound, b.lse_bound));
}

TEST(ReferenceCore, MultiprecisionScratchIsAtTheWorkingPrecisionWhenARowGrows) {
  // Under a causal mask each row sees one key more than the one before, so a
  // worker's scratch grows row by row at one precision. A number added then
  // must be at the working precision, not the library's default (167 bits for
  // Boost's mpfr_float): its roundings would escape the bound's analysis above
  // 167 bits, and results would depend on which rows a worker did before (seen
  // as last-bit differences between --threads 2 runs of one case).
  using Ws = detail::MpWorkspace<detail::MpfrArith>;
  for (long prec : {120L, 300L}) {
    const detail::MpfrArith ar(prec);
    Ws ws;
    ws.prepare(ar, 3, 2, 2);
    ws.prepare(ar, 40, 5, 7);  // a longer row, same precision
    for (auto* v : {&ws.w, &ws.n_acc, &ws.g_acc, &ws.q})
      for (std::size_t i = 0; i < v->size(); ++i)
        EXPECT_EQ(mpfr_get_prec(detail::MpfrArith::raw((*v)[i])), prec) << "element " << i << " at " << prec << " bits";
  }
}

}  // namespace
}  // namespace headroom
