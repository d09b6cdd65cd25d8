// headroom — property tests of the backward reference's fast path (grids, fallbacks, kernels).
//
// The judge is the multiprecision method (MPFR intervals, backward_mp.cpp),
// run at a target 2^20 tighter than the fast path's (2^-100 against 2^-80):
// its enclosure is then far narrower than the fast bound, so "the two
// enclose the same value" checks the fast value against its own bound. The
// cases are drawn to take every path of backward_fast.cpp: dP on the grid and
// by Dot2 (a key with huge values and a tiny weight), dQ on the grid and by
// the cascade (a key column with an outlier), massive activations (charged
// rows and per-element escalation), one-hot and zero upstream gradients.
// The AVX2 and baseline builds of the kernels must return the same bits.
#include <gtest/gtest.h>
#include <rapidcheck/gtest.h>

#include <algorithm>
#include <cmath>
#include <random>
#include <string>
#include <tuple>
#include <utility>

#include "../harness/reference/backward_fast.h"
#include "headroom/reference_backward.h"
#include "reference_support.h"

namespace headroom {
namespace {

enum class Kind { gaussian, cancelling, dot2_key, outlier_column, massive, one_hot, zero_rows };
const char* kind_name(Kind k) {
  switch (k) {
    case Kind::gaussian: return "gaussian";
    case Kind::cancelling: return "cancelling";
    case Kind::dot2_key: return "dot2_key";
    case Kind::outlier_column: return "outlier_column";
    case Kind::massive: return "massive";
    case Kind::one_hot: return "one_hot";
    case Kind::zero_rows: return "zero_rows";
  }
  return "?";
}

struct Case {
  testing::CoreCase c;
  Tensor d_o;
};

// A case of kind `k`; every value float32 so the MPFR path sees the same inputs.
Case build(Kind k, const CoreShape& s, std::uint64_t seed) {
  Case out{testing::random_core(s, seed), {}};
  std::mt19937_64 rng(seed + 5);
  out.d_o = testing::gaussian({s.batch, s.q_heads, s.q_len, s.value_dim}, rng);
  CoreInputs& in = out.c.inputs;
  Mask& m = out.c.problem.mask;
  switch (k) {
    case Kind::gaussian:
      m.kind = MaskKind::causal_bottom_right;
      break;
    case Kind::cancelling:
      // K and V rows 1 + 2^-20·N(0,1) in every channel (float32): dP_j − D and
      // Σ_j dS_j K_jd cancel to some 2^-20 of their magnitudes.
      for (double& x : in.k.values) x = static_cast<float>(1.0 + 0x1p-20 * x);
      for (double& x : in.v.values) x = static_cast<float>(1.0 + 0x1p-20 * x);
      break;
    case Kind::dot2_key: {
      // Key 0: values 2^24 times the rest, weight about e^-40 by a bias: its
      // grid (‖dO‖‖V_0‖) dwarfs the row's A_i, so dP takes Dot2.
      m.kind = MaskKind::bias;
      m.bias = Tensor({s.batch, s.q_heads, s.q_len, s.kv_len});
      for (std::int64_t b = 0; b < s.batch; ++b)
        for (std::int64_t h = 0; h < s.q_heads; ++h)
          for (std::int64_t i = 0; i < s.q_len; ++i) m.bias.at(b, h, i, 0) = -40.0;
      for (std::int64_t b = 0; b < s.batch; ++b)
        for (std::int64_t g = 0; g < s.kv_heads; ++g)
          for (std::int64_t d = 0; d < s.value_dim; ++d) in.v.at(b, g, 0, d) *= 0x1p24;
      break;
    }
    case Kind::outlier_column:
      // The last key, seen by no row (causal, Tk = Tq + 1), has 2^30 in channel 0:
      // the dQ grid of that channel (on the block's largest |K|) is far too
      // coarse for the rows' products.
      m.kind = MaskKind::causal_top_left;
      for (std::int64_t b = 0; b < s.batch; ++b)
        for (std::int64_t g = 0; g < s.kv_heads; ++g) in.k.at(b, g, s.kv_len - 1, 0) = 0x1p30;
      break;
    case Kind::massive:
      // Query row 0 and key 0 carry 3e4 in channel 0 (scores near 1e9 / sqrt(Dk)):
      // a charged row whose elements may escalate to MPFR. The causal mask
      // gives row 0 key 0 alone and the other rows have 0 there, so no exact
      // weight falls below the double range (where a magnitude rounds to 0
      // and no element can be certified, MPFR's included).
      m.kind = MaskKind::causal_top_left;
      for (std::int64_t b = 0; b < s.batch; ++b) {
        for (std::int64_t h = 0; h < s.q_heads; ++h) {
          in.q.at(b, h, 0, 0) = 3e4;
          for (std::int64_t i = 1; i < s.q_len; ++i) in.q.at(b, h, i, 0) = 0.0;
        }
        for (std::int64_t g = 0; g < s.kv_heads; ++g) in.k.at(b, g, 0, 0) = 3e4;
      }
      break;
    case Kind::one_hot:
      std::fill(out.d_o.values.begin(), out.d_o.values.end(), 0.0);
      for (std::int64_t b = 0; b < s.batch; ++b)
        for (std::int64_t h = 0; h < s.q_heads; ++h)
          for (std::int64_t i = 0; i < s.q_len; ++i) out.d_o.at(b, h, i, (i + h) % s.value_dim) = i % 2 ? -1.0 : 1.0;
      break;
    case Kind::zero_rows:
      for (std::int64_t b = 0; b < s.batch; ++b)
        for (std::int64_t h = 0; h < s.q_heads; ++h)
          for (std::int64_t d = 0; d < s.value_dim; ++d) out.d_o.at(b, h, 0, d) = 0.0;
      for (std::int64_t b = 0; b < s.batch; ++b)
        for (std::int64_t g = 0; g < s.kv_heads; ++g)
          for (std::int64_t d = 0; d < s.value_dim; ++d) in.v.at(b, g, 0, d) = 0.0;
      break;
  }
  return out;
}

CoreShape draw_shape(Kind k) {
  CoreShape s;
  s.batch = *rc::gen::inRange<std::int64_t>(1, 3);
  s.kv_heads = *rc::gen::inRange<std::int64_t>(1, 3);
  s.q_heads = s.kv_heads * *rc::gen::inRange<std::int64_t>(1, 3);
  s.q_len = *rc::gen::inRange<std::int64_t>(k == Kind::outlier_column ? 2 : 1, 7);
  s.kv_len = *rc::gen::inRange<std::int64_t>(2, 24);
  if (k == Kind::outlier_column) s.kv_len = s.q_len + 1;
  s.key_dim = *rc::gen::inRange<std::int64_t>(1, 20);
  s.value_dim = *rc::gen::inRange<std::int64_t>(1, 13);
  return s;
}

BackwardReference run(const Case& c, ReferenceMethod method, int target, const detail::FastKernels* fk = nullptr,
                      const detail::BackwardKernels* bk = nullptr) {
  BackwardOptions opt;
  opt.base.method = method;
  opt.base.target_log2 = target;
  opt.with_d_scores = c.c.problem.mask.kind == MaskKind::bias;
  return detail::reference_backward_with(c.c.problem, c.c.inputs, c.d_o, opt, fk, bk);
}

// Fast (`f`) against the tight multiprecision enclosure (`m`): the same exact
// value, the fast bound within 2^-80 of the natural magnitude, the MPFR bound
// within 2^-100 (so `f` itself is what is judged), equal magnitudes to 2^-29.
void check(const GradientReference& f, const GradientReference& m, const char* name) {
  double worst = 0;
  RC_ASSERT(testing::enclose_same(f.out, f.bound, m.out, m.bound, &worst));
  for (std::size_t e = 0; e < f.out.values.size(); ++e) {
    const double fb = f.bound.values[e], mag = f.magnitude.values[e];
    if (!(fb <= 0x1p-80 * mag || (fb == 0 && mag == 0))) RC_FAIL(std::string(name) + " bound above 2^-80");
    if (!(m.bound.values[e] <= 0x1p-100 * m.magnitude.values[e] || m.bound.values[e] == 0))
      RC_FAIL(std::string(name) + " judge not tight");
    RC_ASSERT(std::fabs(mag - m.magnitude.values[e]) <= 0x1p-29 * m.magnitude.values[e]);
  }
}

RC_GTEST_PROP(ReferenceBackwardFast, AgreesWithMultiprecisionWithinItsBounds, ()) {
  const Kind k = *rc::gen::element(Kind::gaussian, Kind::cancelling, Kind::dot2_key, Kind::outlier_column,
                                   Kind::massive, Kind::one_hot, Kind::zero_rows);
  const Case c = build(k, draw_shape(k), *rc::gen::arbitrary<std::uint64_t>());
  const BackwardReference f = run(c, ReferenceMethod::fast, -80);
  const BackwardReference m = run(c, ReferenceMethod::multiprecision, -100);
  RC_TAG(kind_name(k));
  RC_LOG() << kind_name(k) << " fast certified " << f.certified << " multiprecision certified " << m.certified << "\n";
  if (f.stats.dp_dot2_rows > 0) RC_TAG("dP by Dot2");
  if (f.stats.dq_cascade_rows > 0) RC_TAG("dQ by cascade");
  if (f.stats.escalated_elements > 0) RC_TAG("escalated");
  RC_ASSERT(f.certified && m.certified);
  RC_ASSERT(f.fully_masked == m.fully_masked);
  check(f.d_q, m.d_q, "dQ");
  check(f.d_k, m.d_k, "dK");
  check(f.d_v, m.d_v, "dV");
  if (!f.d_s.out.values.empty()) check(f.d_s, m.d_s, "dS");
}

// Each built kind takes the path it was built for (so the property above covers them).
TEST(ReferenceBackwardFast, EachBuiltCaseTakesItsPath) {
  const CoreShape s{1, 2, 1, 6, 7, 9, 7};
  const BackwardStats gaussian = run(build(Kind::gaussian, s, 1), ReferenceMethod::fast, -80).stats;
  const BackwardStats massive = run(build(Kind::massive, s, 4), ReferenceMethod::fast, -80).stats;
  EXPECT_EQ(gaussian.dp_dot2_rows, 0);
  EXPECT_EQ(gaussian.dq_cascade_rows, 0);
  EXPECT_GT(run(build(Kind::dot2_key, s, 2), ReferenceMethod::fast, -80).stats.dp_dot2_rows, 0);
  EXPECT_GT(run(build(Kind::outlier_column, s, 3), ReferenceMethod::fast, -80).stats.dq_cascade_rows, 0);
  EXPECT_GT(massive.escalated_elements, 0);
  // Charging term by term is for rows whose τ would lift the whole block's
  // bound (massive activations); ordinary rows (τ near 2^-85 at D = 128, the
  // forward's exp uncertainty) share the block's maxima instead.
  EXPECT_EQ(gaussian.charged_rows, 0);
  EXPECT_GT(massive.charged_rows, 0);
}

// The check has teeth: on a cancelling case the judge's resolution (the MPFR
// bound plus the rounding of both doubles, 2^-53(|x| + |y|)) lies far below
// the target 2^-80 of the magnitude for most elements, so a fast value off by
// its target (a bound too small to cover its error) is caught there.
TEST(ReferenceBackwardFast, TheJudgeResolvesBelowTheTargetOnCancellingCases) {
  const CoreShape s{1, 1, 1, 6, 9, 8, 8};
  const Case c = build(Kind::cancelling, s, 9);
  const BackwardReference f = run(c, ReferenceMethod::fast, -80);
  const BackwardReference m = run(c, ReferenceMethod::multiprecision, -100);
  int sharp = 0;
  for (const auto& [x, y] : {std::pair{&f.d_q, &m.d_q}, std::pair{&f.d_k, &m.d_k}}) {
    ASSERT_TRUE(testing::enclose_same(x->out, x->bound, y->out, y->bound));
    for (std::size_t e = 0; e < x->out.values.size(); ++e) {
      const double mag = x->magnitude.values[e];
      const double resolution = y->bound.values[e] + 0x1p-53 * (std::fabs(x->out.values[e]) + std::fabs(y->out.values[e]));
      if (!(resolution <= 0x1p-84 * mag)) continue;
      ++sharp;
      Tensor moved = x->out;
      moved.values[e] += 0x1p-80 * mag + 2 * x->bound.values[e];
      EXPECT_FALSE(testing::enclose_same(moved, x->bound, y->out, y->bound)) << e;
    }
  }
  EXPECT_GT(sharp, 40);
}

// The AVX2 build of the backward (and forward) kernels and the baseline build
// return the same bits, and both enclose the multiprecision gradients.
RC_GTEST_PROP(ReferenceBackwardFast, InstructionSetsAgreeBitForBit, ()) {
  const Kind k = *rc::gen::element(Kind::gaussian, Kind::cancelling, Kind::dot2_key, Kind::outlier_column,
                                   Kind::one_hot);
  const Case c = build(k, draw_shape(k), *rc::gen::arbitrary<std::uint64_t>());
  const BackwardReference a = run(c, ReferenceMethod::fast, -80);
  const BackwardReference b = run(c, ReferenceMethod::fast, -80, &detail::fast_kernels_baseline(),
                                  &detail::backward_kernels_baseline());
  const BackwardReference m = run(c, ReferenceMethod::multiprecision, -100);
  RC_TAG(detail::backward_kernels().name);
  for (const auto& [x, y, z] : {std::tuple{&a.d_q, &b.d_q, &m.d_q}, std::tuple{&a.d_k, &b.d_k, &m.d_k},
                                std::tuple{&a.d_v, &b.d_v, &m.d_v}}) {
    RC_ASSERT(bit_identical(x->out, y->out) && bit_identical(x->bound, y->bound) &&
              bit_identical(x->magnitude, y->magnitude));
    RC_ASSERT(testing::enclose_same(x->out, x->bound, z->out, z->bound));
    RC_ASSERT(testing::enclose_same(y->out, y->bound, z->out, z->bound));
  }
}

}  // namespace
}  // namespace headroom
