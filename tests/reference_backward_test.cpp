// headroom — tests of the certified backward reference.
//
// Three judges, none sharing code with the fast path's formulas:
//  - the multiprecision method (MPFR interval arithmetic, backward_mp.cpp):
//    fast and multiprecision must enclose the same exact gradients;
//  - a central finite difference of the certified *forward* reference:
//    for L = Σ dO·O, dL/dx ≈ (L(x + h) − L(x − h))/(2h) for x an element of
//    Q, K or V (and of the bias), the derivative check that cannot share a bug
//    with the analytic backward formula (truncation error O(h²), rounding
//    error of the double forward outputs ≈ 2^-53·Σ|dO||O|/h);
//  - structural facts: grouped-query dK, dV equal the sum of the heads of
//    the group computed as separate heads; a key masked from every query has
//    dK = dV = 0 exactly; a fully masked row has dQ = 0.
#include <gtest/gtest.h>

#include <cmath>
#include <cstdio>
#include <random>

#include "headroom/input_error.h"
#include "headroom/reference.h"
#include "headroom/reference_backward.h"
#include "reference_support.h"

namespace headroom {
namespace {

using testing::enclose_same;

struct Case {
  testing::CoreCase c;
  Tensor d_o;
};

// A case with the given mask kind; GQA when kv_heads < q_heads.
Case make_case(const CoreShape& s, MaskKind kind, std::uint64_t seed, double sigma = 1.0) {
  Case out{testing::random_core(s, seed, sigma), {}};
  std::mt19937_64 rng(seed + 17);
  out.d_o = testing::gaussian({s.batch, s.q_heads, s.q_len, s.value_dim}, rng);
  Mask& m = out.c.problem.mask;
  m.kind = kind;
  if (kind == MaskKind::key_padding) {
    for (std::int64_t b = 0; b < s.batch; ++b) m.key_lengths.push_back(b % 2 == 0 ? s.kv_len - 1 : 0);
  } else if (kind == MaskKind::dense) {
    m.allowed = Tensor({s.batch, 1, s.q_len, s.kv_len});
    std::bernoulli_distribution coin(0.7);
    for (double& x : m.allowed.values) x = coin(rng) ? 1.0 : 0.0;
  } else if (kind == MaskKind::bias) {
    m.bias = testing::gaussian({s.batch, s.q_heads, s.q_len, s.kv_len}, rng, 2.0);
    std::bernoulli_distribution coin(0.2);
    for (double& x : m.bias.values)
      if (coin(rng)) x = -INFINITY;
  }
  return out;
}

BackwardReference run(const Case& c, ReferenceMethod method, bool with_ds = false) {
  BackwardOptions opt;
  opt.base.method = method;
  opt.with_d_scores = with_ds;
  return reference_backward(c.c.problem, c.c.inputs, c.d_o, opt);
}

void expect_agree(const GradientReference& a, const GradientReference& b, const char* name) {
  double worst = 0;
  EXPECT_TRUE(enclose_same(a.out, a.bound, b.out, b.bound, &worst)) << name << " worst " << worst;
  for (std::size_t e = 0; e < a.out.values.size(); ++e) {
    EXPECT_LE(a.bound.values[e], 0x1p-80 * a.magnitude.values[e]) << name << " element " << e;
    EXPECT_NEAR(a.magnitude.values[e], b.magnitude.values[e], 0x1p-29 * b.magnitude.values[e]) << name << " " << e;
  }
}

TEST(ReferenceBackward, FastAndMultiprecisionEncloseTheSameGradients) {
  const MaskKind kinds[] = {MaskKind::none, MaskKind::causal_top_left, MaskKind::causal_bottom_right,
                            MaskKind::key_padding, MaskKind::dense, MaskKind::bias};
  int index = 0;
  for (MaskKind kind : kinds) {
    for (std::int64_t kv_heads : {1, 2}) {
      CoreShape s{2, 2, kv_heads, 3 + index % 3, 5 + index % 4, 4, 3};
      const Case c = make_case(s, kind, 100 + static_cast<std::uint64_t>(index), index % 3 == 2 ? 4.0 : 1.0);
      const bool with_ds = kind == MaskKind::bias;
      const BackwardReference fast = run(c, ReferenceMethod::fast, with_ds);
      const BackwardReference mp = run(c, ReferenceMethod::multiprecision, with_ds);
      SCOPED_TRACE(std::string(mask_kind_name(kind)) + " kv_heads " + std::to_string(kv_heads));
      EXPECT_TRUE(fast.certified);
      EXPECT_TRUE(mp.certified);
      EXPECT_EQ(fast.fully_masked, mp.fully_masked);
      expect_agree(fast.d_q, mp.d_q, "dQ");
      expect_agree(fast.d_k, mp.d_k, "dK");
      expect_agree(fast.d_v, mp.d_v, "dV");
      if (with_ds) expect_agree(fast.d_s, mp.d_s, "dS");
      EXPECT_EQ(fast.stats.escalated_elements, 0);
      ++index;
    }
  }
}

// L = Σ dO·O from the certified forward (double outputs).
double loss(const Case& c, const CoreInputs& in, const Mask& mask) {
  CoreProblem p = c.c.problem;
  p.mask = mask;
  const CoreReference r = reference_core(p, in);
  double l = 0;
  for (std::size_t e = 0; e < r.out.values.size(); ++e)
    if (!std::isnan(r.out.values[e])) l += c.d_o.values[e] * r.out.values[e];
  return l;
}

TEST(ReferenceBackward, MatchesACentralFiniteDifferenceOfTheForward) {
  CoreShape s{1, 2, 1, 3, 4, 3, 2};
  const Case c = make_case(s, MaskKind::bias, 7);
  const BackwardReference g = run(c, ReferenceMethod::fast, true);
  constexpr double h = 0x1p-18;  // exact steps: x ± h is representable for |x| ≥ 2^-18 up to 2^34
  // Allowance: truncation ≈ h²·|third derivative| (O(1) here) plus rounding
  // 2^-53·Σ|dO||O|/h; both below 1e-9 for these unit-sized values.
  constexpr double tol = 1e-8;
  int checked = 0;
  auto check = [&](Tensor CoreInputs::*which, const GradientReference& grad, const char* name) {
    for (std::size_t e = 0; e < grad.out.values.size(); ++e) {
      CoreInputs plus = c.c.inputs, minus = c.c.inputs;
      (plus.*which).values[e] += h;
      (minus.*which).values[e] -= h;
      const double fd = (loss(c, plus, c.c.problem.mask) - loss(c, minus, c.c.problem.mask)) / (2 * h);
      EXPECT_NEAR(grad.out.values[e], fd, tol) << name << " element " << e;
      ++checked;
    }
  };
  check(&CoreInputs::q, g.d_q, "dQ");
  check(&CoreInputs::k, g.d_k, "dK");
  check(&CoreInputs::v, g.d_v, "dV");
  for (std::size_t e = 0; e < g.d_s.out.values.size(); ++e) {
    if (std::isinf(c.c.problem.mask.bias.values[e])) {
      EXPECT_EQ(g.d_s.out.values[e], 0.0);
      continue;
    }
    Mask plus = c.c.problem.mask, minus = c.c.problem.mask;
    plus.bias.values[e] += h;
    minus.bias.values[e] -= h;
    const double fd = (loss(c, c.c.inputs, plus) - loss(c, c.c.inputs, minus)) / (2 * h);
    EXPECT_NEAR(g.d_s.out.values[e], fd, tol) << "d(bias) element " << e;
    ++checked;
  }
  EXPECT_GT(checked, 40);
}

// A bias shared by the query heads ([B, 1, Tq, Tk]): d(bias) = Σ_h dS_h
// (bias_gradient) against the finite difference of the shared element, which
// moves every head's score at once; bounds within Hq·2^-51 of the magnitude.
TEST(ReferenceBackward, SharedBiasGradientSumsTheHeadsAndMatchesAFiniteDifference) {
  CoreShape s{1, 4, 2, 3, 5, 3, 2};
  Case c = make_case(s, MaskKind::bias, 9);
  std::mt19937_64 rng(10);
  Tensor& bias = c.c.problem.mask.bias;
  bias = testing::gaussian({1, 1, s.q_len, s.kv_len}, rng, 2.0);
  bias.values[3] = -INFINITY;
  const BackwardReference g = run(c, ReferenceMethod::fast, true);
  const GradientReference d = bias_gradient(g, 1);
  ASSERT_EQ(d.out.shape, bias.shape);
  EXPECT_EQ(bias_gradient(g, s.q_heads).out.values, g.d_s.out.values);  // a bias per head: dS itself
  constexpr double h = 0x1p-18, tol = 1e-8;  // as in the finite-difference test above
  for (std::size_t e = 0; e < d.out.values.size(); ++e) {
    if (std::isinf(bias.values[e])) {
      EXPECT_EQ(d.out.values[e], 0.0);
      EXPECT_EQ(d.bound.values[e], 0.0);
      continue;
    }
    double heads = 0;
    for (std::int64_t hq = 0; hq < s.q_heads; ++hq)
      heads += g.d_s.out.values[static_cast<std::size_t>(hq) * d.out.values.size() + e];
    EXPECT_NEAR(d.out.values[e], heads, 0x1p-50 * d.magnitude.values[e]);
    EXPECT_GT(d.bound.values[e], 0.0);
    EXPECT_LE(d.bound.values[e], static_cast<double>(s.q_heads) * 0x1p-51 * d.magnitude.values[e]);
    Mask plus = c.c.problem.mask, minus = c.c.problem.mask;
    plus.bias.values[e] += h;
    minus.bias.values[e] -= h;
    const double fd = (loss(c, c.c.inputs, plus) - loss(c, c.c.inputs, minus)) / (2 * h);
    EXPECT_NEAR(d.out.values[e], fd, tol) << "shared d(bias) element " << e;
  }
}

TEST(ReferenceBackward, GroupedQueryGradientsSumOverTheGroup) {
  CoreShape s{1, 4, 2, 3, 5, 4, 3};
  const Case gqa = make_case(s, MaskKind::causal_bottom_right, 31);
  // The same problem with every query head given its own copy of its kv head.
  Case mha = gqa;
  CoreShape sm = s;
  sm.kv_heads = s.q_heads;
  mha.c.problem.shape = sm;
  mha.c.inputs.k = Tensor({1, sm.kv_heads, s.kv_len, s.key_dim});
  mha.c.inputs.v = Tensor({1, sm.kv_heads, s.kv_len, s.value_dim});
  for (std::int64_t h = 0; h < s.q_heads; ++h)
    for (std::int64_t j = 0; j < s.kv_len; ++j) {
      for (std::int64_t d = 0; d < s.key_dim; ++d) mha.c.inputs.k.at(0, h, j, d) = gqa.c.inputs.k.at(0, h / 2, j, d);
      for (std::int64_t d = 0; d < s.value_dim; ++d) mha.c.inputs.v.at(0, h, j, d) = gqa.c.inputs.v.at(0, h / 2, j, d);
    }
  const BackwardReference a = run(gqa, ReferenceMethod::fast), b = run(mha, ReferenceMethod::fast);
  ASSERT_TRUE(a.certified && b.certified);
  EXPECT_TRUE(enclose_same(a.d_q.out, a.d_q.bound, b.d_q.out, b.d_q.bound));
  for (std::int64_t g = 0; g < s.kv_heads; ++g)
    for (std::int64_t j = 0; j < s.kv_len; ++j)
      for (std::int64_t d = 0; d < s.key_dim; ++d) {
        const double sum = b.d_k.out.at(0, 2 * g, j, d) + b.d_k.out.at(0, 2 * g + 1, j, d);
        const double mag = b.d_k.magnitude.at(0, 2 * g, j, d) + b.d_k.magnitude.at(0, 2 * g + 1, j, d);
        EXPECT_NEAR(a.d_k.out.at(0, g, j, d), sum, 0x1p-50 * mag + 0x1p-1000) << g << ' ' << j << ' ' << d;
        EXPECT_NEAR(a.d_k.magnitude.at(0, g, j, d), mag, 0x1p-28 * mag);
      }
}

TEST(ReferenceBackward, MaskedKeysAndRowsHaveExactlyZeroGradients) {
  CoreShape s{2, 2, 1, 3, 4, 3, 2};
  const Case c = make_case(s, MaskKind::key_padding, 5);  // batch 0: last key masked; batch 1: every key
  for (ReferenceMethod method : {ReferenceMethod::fast, ReferenceMethod::multiprecision}) {
    const BackwardReference g = run(c, method);
    ASSERT_TRUE(g.certified);
    for (std::int64_t d = 0; d < s.key_dim; ++d) {
      EXPECT_EQ(g.d_k.out.at(0, 0, 3, d), 0.0);
      EXPECT_EQ(g.d_k.bound.at(0, 0, 3, d), 0.0);
      EXPECT_NE(g.d_k.out.at(0, 0, 2, d), 0.0);
    }
    for (std::int64_t d = 0; d < s.value_dim; ++d) EXPECT_EQ(g.d_v.out.at(0, 0, 3, d), 0.0);
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i) {
        EXPECT_EQ(g.fully_masked[static_cast<std::size_t>((2 + h) * 3 + i)], 1);
        for (std::int64_t d = 0; d < s.key_dim; ++d) EXPECT_EQ(g.d_q.out.at(1, h, i, d), 0.0);
      }
    for (double x : g.d_k.bound.values) EXPECT_FALSE(std::isnan(x));
  }
}

TEST(ReferenceBackward, NearOneHotRowsWhereDCancelsStayCertified) {
  // Logits spread over hundreds: P is one-hot to within e^-50 or less, so
  // dP_j − D_i cancels to nearly nothing for the dominant key.
  CoreShape s{1, 1, 1, 4, 24, 8, 4};
  const Case c = make_case(s, MaskKind::none, 11, 5.0);
  const BackwardReference fast = run(c, ReferenceMethod::fast), mp = run(c, ReferenceMethod::multiprecision);
  EXPECT_TRUE(fast.certified && mp.certified);
  EXPECT_TRUE(enclose_same(fast.d_q.out, fast.d_q.bound, mp.d_q.out, mp.d_q.bound));
  EXPECT_TRUE(enclose_same(fast.d_k.out, fast.d_k.bound, mp.d_k.out, mp.d_k.bound));
  EXPECT_TRUE(enclose_same(fast.d_v.out, fast.d_v.bound, mp.d_v.out, mp.d_v.bound));
}

TEST(ReferenceBackward, AMassiveRowAndAOneHotUpstreamGradientEscalateOnlyWhereTheyMust) {
  // Query row 0 and key 0 carry a massive activation in channel 0 (Sun et al.
  // 2024, "Massive Activations in Large Language Models": 10^4× typical), so
  // row 0's scores are ~10^8 and its weights' exponent uncertainty is far
  // above 2^-80; dO is one-hot per row (column 0 of dO is 0 throughout). Only
  // row 0's dQ and key 0's dK, dV, to which that row gives nearly all its
  // weight, may need multiprecision; every other element, the zero dV column
  // included, is certified on the fast path (before the per-row charge,
  // every dK and dV element of the block escalated). The causal mask sends
  // row 0 to key 0 alone; the other rows have 0 in channel 0, so their
  // scores stay ordinary.
  CoreShape s{1, 1, 1, 12, 12, 8, 6};
  Case c = make_case(s, MaskKind::causal_top_left, 21);
  c.c.inputs.q.at(0, 0, 0, 0) = 3e4;
  c.c.inputs.k.at(0, 0, 0, 0) = 3e4;
  for (std::int64_t i = 1; i < s.q_len; ++i) c.c.inputs.q.at(0, 0, i, 0) = 0.0;  // other rows: ordinary scores
  std::fill(c.d_o.values.begin(), c.d_o.values.end(), 0.0);
  for (std::int64_t i = 0; i < s.q_len; ++i) c.d_o.at(0, 0, i, 1 + i % (s.value_dim - 1)) = i % 2 == 0 ? 1.0 : -1.0;
  const BackwardReference fast = run(c, ReferenceMethod::fast), mp = run(c, ReferenceMethod::multiprecision);
  EXPECT_TRUE(fast.certified);
  EXPECT_TRUE(mp.certified);
  expect_agree(fast.d_q, mp.d_q, "dQ");
  expect_agree(fast.d_k, mp.d_k, "dK");
  expect_agree(fast.d_v, mp.d_v, "dV");
  for (std::int64_t j = 0; j < s.kv_len; ++j) {
    EXPECT_EQ(fast.d_v.out.at(0, 0, j, 0), 0.0);
    EXPECT_EQ(fast.d_v.bound.at(0, 0, j, 0), 0.0);
  }
  std::printf("escalated %lld of %zu elements\n", static_cast<long long>(fast.stats.escalated_elements),
              fast.d_q.out.values.size() + fast.d_k.out.values.size() + fast.d_v.out.values.size());
  EXPECT_LE(fast.stats.escalated_elements, s.key_dim + s.key_dim + s.value_dim);
}

TEST(ReferenceBackward, ThreadCountChangesNoBit) {
  CoreShape s{2, 4, 2, 5, 7, 4, 3};
  const Case c = make_case(s, MaskKind::causal_top_left, 3);
  BackwardOptions one, many;
  many.base.threads = 3;
  const BackwardReference a = reference_backward(c.c.problem, c.c.inputs, c.d_o, one);
  const BackwardReference b = reference_backward(c.c.problem, c.c.inputs, c.d_o, many);
  EXPECT_TRUE(bit_identical(a.d_q.out, b.d_q.out) && bit_identical(a.d_k.out, b.d_k.out) &&
              bit_identical(a.d_v.out, b.d_v.out) && bit_identical(a.d_k.bound, b.d_k.bound));
}

TEST(ReferenceBackward, RefusesAMisshapenUpstreamGradient) {
  CoreShape s{1, 1, 1, 2, 2, 2, 2};
  Case c = make_case(s, MaskKind::none, 1);
  c.d_o = Tensor({1, 1, 2, 3});
  EXPECT_THROW(reference_backward(c.c.problem, c.c.inputs, c.d_o), InputError);
}

}  // namespace
}  // namespace headroom
