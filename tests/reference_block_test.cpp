// headroom — tests of the certified block reference (reference_block in reference.h).
#include <gtest/gtest.h>
#include <rapidcheck/gtest.h>

#include <cmath>
#include <cstdio>
#include <random>

#include "headroom/input_error.h"
#include "headroom/reference.h"
#include "reference_support.h"

namespace headroom {
namespace {

using testing::enclose_same;
using testing::random_block;

BlockShape block_shape(std::int64_t dm, std::int64_t hq, std::int64_t hkv, std::int64_t tq, std::int64_t tk,
                       std::int64_t dk, std::int64_t dv) {
  BlockShape s;
  s.batch = 1;
  s.model_dim = dm;
  s.q_heads = hq;
  s.kv_heads = hkv;
  s.q_len = tq;
  s.kv_len = tk;
  s.key_dim = dk;
  s.value_dim = dv;
  return s;
}

Tensor identity(std::int64_t n) {
  Tensor t({n, n});
  for (std::int64_t i = 0; i < n; ++i) t.values[static_cast<std::size_t>(i * n + i)] = 1.0;
  return t;
}

void expect_within_target(const BlockReference& r, int target_log2) {
  double worst = 0;
  for (std::size_t i = 0; i < r.out.values.size(); ++i) {
    if (std::isnan(r.out.values[i])) continue;
    ASSERT_LE(r.bound.values[i], std::ldexp(r.magnitude.values[i], target_log2) * (1 + 0x1p-30)) << i;
    if (r.magnitude.values[i] > 0) worst = std::max(worst, r.bound.values[i] / r.magnitude.values[i]);
  }
  std::printf("block: worst bound / magnitude = %a (target 2^%d)\n", worst, target_log2);
}

// With identity projections and no biases, head h of the block sees columns
// [h·Dk, (h+1)·Dk) of X as its queries/keys (problem.h), and Y is the
// concatenation of the head outputs: the block must agree with reference_core
// on the rearranged tensors (here Dk = Dv, Hkv = Hq, Dm = Hq·Dk).
TEST(ReferenceBlock, IdentityProjectionsReduceToCoreAttention) {
  const std::int64_t hq = 2, d = 3, dm = hq * d, tq = 4, tk = 5;
  auto c = random_block(block_shape(dm, hq, hq, tq, tk, d, d), 21, false);
  c.inputs.w_q = c.inputs.w_k = c.inputs.w_v = c.inputs.w_o = identity(dm);
  const BlockReference y = reference_block(c.problem, c.inputs);
  ASSERT_TRUE(y.certified);

  CoreProblem cp;
  cp.shape = c.problem.shape.core();
  cp.scale = c.problem.scale;
  CoreInputs ci;
  ci.q = Tensor({1, hq, tq, d});
  ci.k = Tensor({1, hq, tk, d});
  ci.v = Tensor({1, hq, tk, d});
  for (std::int64_t h = 0; h < hq; ++h)
    for (std::int64_t e = 0; e < d; ++e) {
      for (std::int64_t i = 0; i < tq; ++i) ci.q.at(0, h, i, e) = c.inputs.x_q.at(0, i, h * d + e);
      for (std::int64_t j = 0; j < tk; ++j) ci.k.at(0, h, j, e) = ci.v.at(0, h, j, e) = c.inputs.x_kv.at(0, j, h * d + e);
    }
  const CoreReference o = reference_core(cp, ci);
  Tensor as_block({1, tq, dm}), bound_block({1, tq, dm});
  for (std::int64_t h = 0; h < hq; ++h)
    for (std::int64_t i = 0; i < tq; ++i)
      for (std::int64_t e = 0; e < d; ++e) {
        as_block.at(0, i, h * d + e) = o.out.at(0, h, i, e);
        bound_block.at(0, i, h * d + e) = o.bound.at(0, h, i, e);
      }
  double worst = 0;
  EXPECT_TRUE(enclose_same(y.out, y.bound, as_block, bound_block, &worst));
  std::printf("identity block vs core: worst |diff| / allowance = %.3g\n", worst);
}

TEST(ReferenceBlock, CausalBlockWithBiasesIsCertified) {
  auto c = random_block(block_shape(16, 4, 2, 6, 9, 4, 3), 5, true);
  c.problem.shape.batch = 1;
  c.problem.mask.kind = MaskKind::causal_bottom_right;
  const BlockReference r = reference_block(c.problem, c.inputs);
  EXPECT_TRUE(r.certified);
  expect_within_target(r, -80);
  for (auto f : r.fully_masked) EXPECT_EQ(f, 0);
}

TEST(ReferenceBlock, FullyMaskedQueryRowsAreNaN) {
  auto c = random_block(block_shape(8, 2, 1, 3, 4, 4, 4), 9, true);
  c.problem.mask.kind = MaskKind::key_padding;
  c.problem.mask.key_lengths = {0};
  const BlockReference r = reference_block(c.problem, c.inputs);
  for (double x : r.out.values) EXPECT_TRUE(std::isnan(x));
  for (auto f : r.fully_masked) EXPECT_EQ(f, 1);
}

TEST(ReferenceBlock, RejectsMisshapenWeights) {
  auto c = random_block(block_shape(8, 2, 1, 3, 4, 4, 4), 9, false);
  c.inputs.w_o = Tensor({8, 7});
  EXPECT_THROW(reference_block(c.problem, c.inputs), InputError);
}

testing::BlockCase draw_block() {
  const auto hkv = *rc::gen::inRange<std::int64_t>(1, 3);
  const auto hq = hkv * *rc::gen::inRange<std::int64_t>(1, 3);
  const auto dm = *rc::gen::inRange<std::int64_t>(1, 7);
  const auto tq = *rc::gen::inRange<std::int64_t>(1, 5);
  const auto tk = *rc::gen::inRange<std::int64_t>(1, 5);
  const auto dk = *rc::gen::inRange<std::int64_t>(1, 4);
  const auto dv = *rc::gen::inRange<std::int64_t>(1, 4);
  const bool biases = *rc::gen::arbitrary<bool>();
  return random_block(block_shape(dm, hq, hkv, tq, tk, dk, dv), *rc::gen::arbitrary<std::uint64_t>(), biases);
}

RC_GTEST_PROP(ReferenceBlockProperties, MpfrAndBinFloatAgreeWithinTheirBounds, ()) {
  const auto c = draw_block();
  ReferenceOptions bin;
  bin.backend = ReferenceBackend::cpp_bin_float;
  const BlockReference a = reference_block(c.problem, c.inputs), b = reference_block(c.problem, c.inputs, bin);
  RC_ASSERT(a.certified && b.certified);
  RC_ASSERT(enclose_same(a.out, a.bound, b.out, b.bound));
}

RC_GTEST_PROP(ReferenceBlockProperties, ThreadCountChangesNoBit, ()) {
  const auto c = draw_block();
  ReferenceOptions many;
  many.threads = *rc::gen::inRange(2u, 5u);
  const BlockReference a = reference_block(c.problem, c.inputs), b = reference_block(c.problem, c.inputs, many);
  RC_ASSERT(bit_identical(a.out, b.out) && bit_identical(a.bound, b.bound) && bit_identical(a.magnitude, b.magnitude));
}

// The fast block and the all-MPFR block enclose the same exact values.
// Returns: the fast reference (for its stats).
BlockReference expect_fast_and_mpfr_agree(const testing::BlockCase& c) {
  ReferenceOptions mp;
  mp.method = ReferenceMethod::multiprecision;
  const BlockReference f = reference_block(c.problem, c.inputs), m = reference_block(c.problem, c.inputs, mp);
  double worst = 0;
  RC_ASSERT(f.certified && m.certified);
  RC_ASSERT(enclose_same(f.out, f.bound, m.out, m.bound, &worst));
  RC_ASSERT(f.fully_masked == m.fully_masked);
  for (std::size_t i = 0; i < f.out.values.size(); ++i) {
    if (std::isnan(f.out.values[i])) continue;
    RC_ASSERT(f.bound.values[i] <= std::ldexp(f.magnitude.values[i], -80) * (1 + 0x1p-30));
  }
  return f;
}

enum class Stress { none, cancelling_values, huge_activations, masked_rows };

testing::BlockCase draw_stressed(Stress stress) {
  auto c = draw_block();
  BlockInputs& in = c.inputs;
  const BlockShape& s = c.problem.shape;
  const auto mask = *rc::gen::inRange(0, 3);
  if (mask == 1) c.problem.mask.kind = MaskKind::causal_bottom_right;
  if (mask == 2) c.problem.mask.kind = MaskKind::causal_top_left;
  switch (stress) {
    case Stress::none:
      break;
    case Stress::cancelling_values:
      // Two model channels nearly equal and W_v rows of opposite sign on them,
      // every other W_v row zero: each V value is a difference of nearly equal
      // products, far below Σ|X||W_v| — the head outputs shrink against the
      // projections' uncertainty, and the block must escalate.
      if (s.model_dim >= 2) {
        for (std::int64_t j = 0; j < s.kv_len; ++j)
          in.x_kv.at(0, j, 1) = in.x_kv.at(0, j, 0) * (1 + 0x1p-30 * static_cast<double>(j + 1));
        for (std::int64_t m = 0; m < s.model_dim; ++m)
          for (std::int64_t e = 0; e < s.kv_heads * s.value_dim; ++e)
            in.w_v.values[static_cast<std::size_t>(m * s.kv_heads * s.value_dim + e)] =
                m == 0 ? 1.0 : (m == 1 ? -1.0 : 0.0);
        in.b_v = in.b_o = Tensor();  // a bias on Y would dwarf the cancelled values
      }
      break;
    case Stress::huge_activations:
      // Activations 2^12 times the usual (massive activations, Sun et al. 2024):
      // scores of order 2^24, far past what the double-double exponent bound
      // certifies.
      for (double& x : in.x_q.values) x *= 0x1p12;
      for (double& x : in.x_kv.values) x *= 0x1p12;
      break;
    case Stress::masked_rows:
      c.problem.mask = Mask{};
      c.problem.mask.kind = MaskKind::key_padding;
      c.problem.mask.key_lengths = {*rc::gen::inRange<std::int64_t>(0, s.kv_len + 1)};
      break;
  }
  return c;
}

RC_GTEST_PROP(ReferenceBlockProperties, FastAndMultiprecisionAgreeWithinTheirBounds, ()) {
  const BlockReference f = expect_fast_and_mpfr_agree(draw_stressed(Stress::none));
  RC_ASSERT(f.stats.redone_batches == 0);  // well-scaled cases stay on the fast path
}

RC_GTEST_PROP(ReferenceBlockProperties, CancellingValuesEscalateAndAgree, ()) {
  const BlockReference f = expect_fast_and_mpfr_agree(draw_stressed(Stress::cancelling_values));
  RC_CLASSIFY(f.stats.escalated_rows > 0, "escalated rows");
  RC_CLASSIFY(f.stats.redone_batches > 0, "redone batch");
}

RC_GTEST_PROP(ReferenceBlockProperties, HugeActivationsEscalateAndAgree, ()) {
  const BlockReference f = expect_fast_and_mpfr_agree(draw_stressed(Stress::huge_activations));
  RC_CLASSIFY(f.stats.escalated_rows > 0, "escalated rows");
  RC_CLASSIFY(f.stats.redone_batches > 0, "redone batch");
}

// Fixed cases where escalation must happen (the properties above only count it).
TEST(ReferenceBlock, EscalatesWhereTheFastBoundMissesAndStaysCertified) {
  for (const Stress stress : {Stress::cancelling_values, Stress::huge_activations}) {
    auto c = random_block(block_shape(8, 2, 1, 4, 6, 4, 3), 33, true);
    if (stress == Stress::cancelling_values) {
      for (std::int64_t j = 0; j < 6; ++j) c.inputs.x_kv.at(0, j, 1) = c.inputs.x_kv.at(0, j, 0) * (1 + 0x1p-30 * (j + 1));
      for (std::int64_t m = 0; m < 8; ++m)
        for (std::int64_t e = 0; e < 3; ++e) c.inputs.w_v.values[static_cast<std::size_t>(m * 3 + e)] = m == 0 ? 1.0 : (m == 1 ? -1.0 : 0.0);
      c.inputs.b_v = c.inputs.b_o = Tensor();  // a bias on Y would dwarf the cancelled values
    } else {
      for (double& x : c.inputs.x_q.values) x *= 0x1p12;
      for (double& x : c.inputs.x_kv.values) x *= 0x1p12;
    }
    ReferenceOptions mp;
    mp.method = ReferenceMethod::multiprecision;
    const BlockReference f = reference_block(c.problem, c.inputs), m = reference_block(c.problem, c.inputs, mp);
    EXPECT_TRUE(f.certified && m.certified);
    EXPECT_GT(f.stats.escalated_rows, 0);
    double worst = 0;
    EXPECT_TRUE(enclose_same(f.out, f.bound, m.out, m.bound, &worst));
    expect_within_target(f, -80);
    std::printf("stress %d: %lld rows of Y escalated, %lld head elements in MPFR, %lld batches redone; worst |fast - mpfr| / allowance %.3g\n",
                static_cast<int>(stress), static_cast<long long>(f.stats.escalated_rows),
                static_cast<long long>(f.stats.escalated_elements), static_cast<long long>(f.stats.redone_batches), worst);
  }
}

// The output projection sums on power-of-two grids (fast_block.cpp, stage
// (3)). Two query heads built alike (head 1's W_q columns and b_q copy head
// 0's; one shared kv head) give bit-identical head outputs, and W_o's rows for
// head 1 are the negatives of head 0's, no b_o: every exact Y is 0 while its
// magnitude Σ|O||W_o| is not. The fast Y is then nothing but the sums' own
// error, far above its ulp, so the comparison with MPFR (Y = 0) tests the
// stage's bound itself. A grid too narrow for its terms (σ_m below
// 2·Σ_c|Õ_c·W_o,cm|) breaks the sums' exactness and fails here.
TEST(ReferenceBlock, CancellingOutputProjectionStaysInsideItsBound) {
  std::mt19937_64 rng(23);
  double worst = 0, largest = 0;
  for (int trial = 0; trial < 40; ++trial) {
    auto dim = [&](std::int64_t lo, std::int64_t hi) { return std::uniform_int_distribution<std::int64_t>(lo, hi)(rng); };
    const std::int64_t dk = dim(1, 6), dv = dim(1, 6);
    const BlockShape s = block_shape(dim(2, 9), 2, 1, dim(1, 4), dim(1, 7), dk, dv);
    auto c = random_block(s, static_cast<std::uint64_t>(trial), true);
    BlockInputs& in = c.inputs;
    for (std::int64_t m = 0; m < s.model_dim; ++m)
      for (std::int64_t e = 0; e < dk; ++e)
        in.w_q.values[static_cast<std::size_t>(m * 2 * dk + dk + e)] = in.w_q.values[static_cast<std::size_t>(m * 2 * dk + e)];
    for (std::int64_t e = 0; e < dk; ++e) in.b_q.values[static_cast<std::size_t>(dk + e)] = in.b_q.values[static_cast<std::size_t>(e)];
    for (std::int64_t e = 0; e < dv; ++e)
      for (std::int64_t m = 0; m < s.model_dim; ++m)
        in.w_o.values[static_cast<std::size_t>((dv + e) * s.model_dim + m)] = -in.w_o.values[static_cast<std::size_t>(e * s.model_dim + m)];
    in.b_o = Tensor();
    ReferenceOptions mp;
    mp.method = ReferenceMethod::multiprecision;
    const BlockReference f = reference_block(c.problem, c.inputs), m = reference_block(c.problem, c.inputs, mp);
    EXPECT_TRUE(f.certified && m.certified) << "trial " << trial;
    double w = 0;
    EXPECT_TRUE(enclose_same(f.out, f.bound, m.out, m.bound, &w)) << "trial " << trial;
    worst = std::max(worst, w);
    for (std::size_t i = 0; i < f.out.values.size(); ++i)
      largest = std::max(largest, std::fabs(f.out.values[i]) / f.magnitude.values[i]);
  }
  std::printf("cancelling Y (exact 0): fast |Y| up to 2^%.1f of its magnitude; worst |fast - mpfr| / allowance %.3g\n",
              std::log2(largest), worst);
}

RC_GTEST_PROP(ReferenceBlockProperties, FullyMaskedRowsAgree, ()) {
  expect_fast_and_mpfr_agree(draw_stressed(Stress::masked_rows));
}

RC_GTEST_PROP(ReferenceBlockProperties, FastThreadCountChangesNoBit, ()) {
  const auto c = draw_stressed(static_cast<Stress>(*rc::gen::inRange(0, 4)));
  ReferenceOptions many;
  many.threads = *rc::gen::inRange(2u, 5u);
  const BlockReference a = reference_block(c.problem, c.inputs), b = reference_block(c.problem, c.inputs, many);
  RC_ASSERT(bit_identical(a.out, b.out) && bit_identical(a.bound, b.bound) && bit_identical(a.magnitude, b.magnitude));
}

}  // namespace
}  // namespace headroom
