// headroom — tests of the fast certified reference (method fast) against the multiprecision one.
//
// The multiprecision method (MPFR, precision raised until certified) is the
// judge: on every drawn case the two results must enclose the same exact
// values — |fast − mp| ≤ bound_fast + bound_mp + 2^-53(|fast| + |mp|). Near-zero
// outputs from cancelling values make that check sharp: there the bounds
// (≈ 2^-85 of Σ p|v|) are far above the output's ulp, so a bound that is too
// small would show. Families built to force escalation (logits in the
// thousands, columns carried only by keys with weight below e^-650) must
// escalate (counted) and still agree.
#include <gtest/gtest.h>
#include <rapidcheck/gtest.h>

#include <bit>
#include <cmath>
#include <cstdio>
#include <random>

#include "../harness/reference/bound_arith.h"
#include "../harness/reference/fast_core.h"
#include "../harness/reference/parallel.h"
#include "headroom/reference.h"
#include "reference_support.h"

namespace headroom {
namespace {

using testing::enclose_same;

enum class Family { gaussian, cancelling, extreme_logits, negligible_keys };

const char* family_name(Family f) {
  switch (f) {
    case Family::gaussian: return "gaussian";
    case Family::cancelling: return "cancelling";
    case Family::extreme_logits: return "extreme_logits";
    case Family::negligible_keys: return "negligible_keys";
  }
  return "?";
}

// A case of the family: shape and seed from the caller.
testing::CoreCase build(Family f, const CoreShape& s, std::uint64_t seed) {
  std::mt19937_64 rng(seed);
  testing::CoreCase c = testing::random_core(s, seed, f == Family::extreme_logits ? 200.0 : 1.0);
  if (f == Family::cancelling) {
    // v = ±(1 + j·2^-50) in alternating signs and small scores: outputs are
    // sums of nearly cancelling terms, ~2^-40 of Σ p|v| or less, so their ulp
    // is far below the bounds and the comparison tests the bounds themselves.
    for (double& x : c.inputs.q.values) x = static_cast<float>(x * 1e-3);
    for (std::size_t e = 0; e < c.inputs.v.values.size(); ++e) {
      const auto j = static_cast<double>(e / static_cast<std::size_t>(s.value_dim));
      c.inputs.v.values[e] = (e % 2 == 0 ? 1.0 : -1.0) * (1.0 + j * 0x1p-50);
    }
  }
  if (f == Family::negligible_keys) {
    // Keys 1, 3, 5… get bias −680 (weight e^-680 ≈ 2^-981, below the fast
    // path's e^-650) and carry the only nonzero values of column 0, scaled up
    // so that column's outputs stay in the normal double range.
    c.problem.mask.kind = MaskKind::bias;
    c.problem.mask.bias = Tensor({s.batch, 1, s.q_len, s.kv_len});
    for (std::int64_t b = 0; b < s.batch; ++b)
      for (std::int64_t i = 0; i < s.q_len; ++i)
        for (std::int64_t j = 0; j < s.kv_len; ++j) c.problem.mask.bias.at(b, 0, i, j) = j % 2 == 1 ? -680.0 : 0.0;
    for (std::int64_t b = 0; b < s.batch; ++b)
      for (std::int64_t g = 0; g < s.kv_heads; ++g)
        for (std::int64_t j = 0; j < s.kv_len; ++j)
          c.inputs.v.at(b, g, j, 0) = j % 2 == 1 ? static_cast<float>(1e8 * (1 + c.inputs.v.at(b, g, j, 0))) : 0.0;
  }
  (void)rng;
  return c;
}

struct Drawn {
  Family family;
  testing::CoreCase c;
};

Drawn draw(std::initializer_list<Family> families) {
  const Family f = *rc::gen::elementOf(std::vector<Family>(families));
  CoreShape s;
  s.batch = *rc::gen::inRange<std::int64_t>(1, 3);
  s.kv_heads = *rc::gen::inRange<std::int64_t>(1, 3);
  s.q_heads = s.kv_heads * *rc::gen::inRange<std::int64_t>(1, 3);
  s.q_len = *rc::gen::inRange<std::int64_t>(1, 5);
  s.kv_len = *rc::gen::inRange<std::int64_t>(f == Family::negligible_keys ? 2 : 1, 40);
  s.key_dim = *rc::gen::inRange<std::int64_t>(1, 20);
  s.value_dim = *rc::gen::inRange<std::int64_t>(1, 10);
  return {f, build(f, s, *rc::gen::arbitrary<std::uint64_t>())};
}

CoreReference run(const testing::CoreCase& c, ReferenceMethod method, unsigned threads = 1) {
  ReferenceOptions opt;
  opt.method = method;
  opt.threads = threads;
  return reference_core(c.problem, c.inputs, opt);
}

RC_GTEST_PROP(ReferenceFast, AgreesWithMultiprecisionWithinBounds, ()) {
  const auto [family, c] = draw({Family::gaussian, Family::cancelling, Family::extreme_logits, Family::negligible_keys});
  RC_TAG(family_name(family));
  const CoreReference fast = run(c, ReferenceMethod::fast), mp = run(c, ReferenceMethod::multiprecision);
  RC_ASSERT(fast.certified);
  RC_ASSERT(mp.certified);
  RC_ASSERT(enclose_same(fast.out, fast.bound, mp.out, mp.bound));
  RC_ASSERT(enclose_same(fast.lse, fast.lse_bound, mp.lse, mp.lse_bound));
  RC_ASSERT(fast.fully_masked == mp.fully_masked);
  // Every bound within the target, and magnitudes within 2^-48 of each other.
  for (std::size_t e = 0; e < fast.out.values.size(); ++e) {
    RC_ASSERT(fast.bound.values[e] <= 0x1p-80 * fast.magnitude.values[e] * (1 + 0x1p-40));
    RC_ASSERT(std::fabs(fast.magnitude.values[e] - mp.magnitude.values[e]) <= 0x1p-48 * mp.magnitude.values[e]);
  }
}

// Outputs cancelling to ~2^-53 of Σ p|v|: two keys with scores z0, z1 and
// values v0 = RN(e^z1), v1 = −RN(e^z0), so N = e^{z0+z1}(η0 − η1) with η the
// roundings of the C library's exp. The output's ulp (~2^-106 of Σ p|v|) is
// then far below the fast path's bound (~2^-85 of it), so the comparison with
// the multiprecision result tests the bound itself, not the final rounding.
// Prints how close the results come (always below 1).
TEST(ReferenceFast, CancellingOutputsStayInsideTheirBounds) {
  double worst = 0, smallest = 1;
  std::mt19937_64 rng(17);
  std::uniform_real_distribution<double> score(-3.0, 3.0);
  for (int trial = 0; trial < 200; ++trial) {
    CoreShape s;
    s.kv_len = 2;
    s.key_dim = s.value_dim = 1;
    testing::CoreCase c = testing::random_core(s, static_cast<std::uint64_t>(trial));
    c.problem.scale = 1.0f;
    c.inputs.q.values = {1.0};
    const double z0 = static_cast<float>(score(rng)), z1 = static_cast<float>(score(rng));
    c.inputs.k.values = {z0, z1};
    c.inputs.v.values = {std::exp(z1), -std::exp(z0)};
    const CoreReference fast = run(c, ReferenceMethod::fast), mp = run(c, ReferenceMethod::multiprecision);
    double w = 0;
    EXPECT_TRUE(enclose_same(fast.out, fast.bound, mp.out, mp.bound, &w)) << "trial " << trial;
    EXPECT_EQ(fast.stats.escalated_elements, 0);
    worst = std::max(worst, w);
    if (mp.out.values[0] != 0) smallest = std::min(smallest, std::fabs(mp.out.values[0]) / mp.magnitude.values[0]);
  }
  std::printf("cancelling outputs (|o|/magnitude down to 2^%.1f): worst |fast - mp| / (bounds + roundings) = %.3g\n",
              std::log2(smallest), worst);
}

RC_GTEST_PROP(ReferenceFast, ForcedCasesEscalateAndStillAgree, ()) {
  const auto [family, c] = draw({Family::extreme_logits, Family::negligible_keys});
  RC_TAG(family_name(family));
  const CoreReference fast = run(c, ReferenceMethod::fast), mp = run(c, ReferenceMethod::multiprecision);
  if (family == Family::negligible_keys) {
    // Column 0 of every row is carried by negligible keys only.
    RC_ASSERT(fast.stats.escalated_elements >= fast.stats.rows);
  }
  RC_ASSERT(fast.certified && mp.certified);
  RC_ASSERT(enclose_same(fast.out, fast.bound, mp.out, mp.bound));
  RC_ASSERT(enclose_same(fast.lse, fast.lse_bound, mp.lse, mp.lse_bound));
}

TEST(ReferenceFast, EscalationHappensWhereForcedAndNotElsewhere) {
  CoreShape s;
  s.q_heads = s.kv_heads = 2;
  s.q_len = 6;
  s.kv_len = 33;
  s.key_dim = 16;
  s.value_dim = 5;
  long long counts[4] = {};
  for (Family f : {Family::gaussian, Family::cancelling, Family::extreme_logits, Family::negligible_keys}) {
    const CoreReference r = run(build(f, s, 99), ReferenceMethod::fast);
    EXPECT_TRUE(r.certified) << family_name(f);
    counts[static_cast<int>(f)] = r.stats.escalated_elements;
    std::printf("%-16s rows %lld, escalated rows %lld, elements %lld of %lld, lse %lld\n", family_name(f),
                static_cast<long long>(r.stats.rows), static_cast<long long>(r.stats.escalated_rows),
                static_cast<long long>(r.stats.escalated_elements), static_cast<long long>(r.out.size()),
                static_cast<long long>(r.stats.escalated_lse));
  }
  EXPECT_EQ(counts[static_cast<int>(Family::gaussian)], 0);     // the fast path certifies these alone
  EXPECT_EQ(counts[static_cast<int>(Family::cancelling)], 0);
  EXPECT_GT(counts[static_cast<int>(Family::extreme_logits)], 0);
  EXPECT_EQ(counts[static_cast<int>(Family::negligible_keys)], 2 * 6);  // column 0 of each row, nothing else
}

RC_GTEST_PROP(ReferenceFast, ThreadCountChangesNoBit, ()) {
  const auto [family, c] = draw({Family::gaussian, Family::cancelling, Family::extreme_logits, Family::negligible_keys});
  const CoreReference a = run(c, ReferenceMethod::fast, 1);
  const CoreReference b = run(c, ReferenceMethod::fast, *rc::gen::inRange(2u, 6u));
  RC_ASSERT(bit_identical(a.out, b.out) && bit_identical(a.bound, b.bound) && bit_identical(a.magnitude, b.magnitude));
  RC_ASSERT(bit_identical(a.lse, b.lse) && bit_identical(a.lse_bound, b.lse_bound));
  RC_ASSERT(a.stats.escalated_elements == b.stats.escalated_elements);
}

// Rows that see the same keys go through the kernel in groups; each must get
// exactly the bits it gets alone (a problem of that one query row).
RC_GTEST_PROP(ReferenceFast, GroupedRowsMatchRowsAlone, ()) {
  const auto [family, c] = draw({Family::gaussian, Family::cancelling, Family::negligible_keys});
  const CoreShape& s = c.problem.shape;
  const CoreReference all = run(c, ReferenceMethod::fast);
  const std::int64_t i = *rc::gen::inRange<std::int64_t>(0, s.q_len);
  testing::CoreCase one = c;
  one.problem.shape.q_len = 1;
  one.inputs.q = Tensor({s.batch, s.q_heads, 1, s.key_dim});
  if (one.problem.mask.kind == MaskKind::bias) one.problem.mask.bias = Tensor({s.batch, 1, 1, s.kv_len});
  for (std::int64_t b = 0; b < s.batch; ++b) {
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      for (std::int64_t d = 0; d < s.key_dim; ++d) one.inputs.q.at(b, h, 0, d) = c.inputs.q.at(b, h, i, d);
    if (one.problem.mask.kind == MaskKind::bias)
      for (std::int64_t j = 0; j < s.kv_len; ++j)
        one.problem.mask.bias.at(b, 0, 0, j) = c.problem.mask.bias.at(b, 0, i, j);
  }
  const CoreReference alone = run(one, ReferenceMethod::fast);
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < s.q_heads; ++h) {
      for (std::int64_t d = 0; d < s.value_dim; ++d) {
        RC_ASSERT(std::bit_cast<std::uint64_t>(all.out.at(b, h, i, d)) ==
                  std::bit_cast<std::uint64_t>(alone.out.at(b, h, 0, d)));
        RC_ASSERT(std::bit_cast<std::uint64_t>(all.bound.at(b, h, i, d)) ==
                  std::bit_cast<std::uint64_t>(alone.bound.at(b, h, 0, d)));
      }
      RC_ASSERT(std::bit_cast<std::uint64_t>(all.lse.at(b, h, i)) == std::bit_cast<std::uint64_t>(alone.lse.at(b, h, 0)));
    }
}

// The AVX2 build of the kernel and the baseline build return the same bits
// (they perform the same IEEE operations in the same order).
RC_GTEST_PROP(ReferenceFast, InstructionSetsAgreeBitForBit, ()) {
  const auto [family, c] = draw({Family::gaussian, Family::cancelling, Family::extreme_logits, Family::negligible_keys});
  const CoreShape& s = c.problem.shape;
  ReferenceOptions opt;
  auto compute = [&](const detail::FastKernels* k) {
    CoreReference r;
    r.out = Tensor({s.batch, s.q_heads, s.q_len, s.value_dim});
    r.bound = Tensor(r.out.shape);
    r.magnitude = Tensor(r.out.shape);
    r.lse = Tensor({s.batch, s.q_heads, s.q_len});
    r.lse_bound = Tensor(r.lse.shape);
    r.fully_masked.assign(static_cast<std::size_t>(s.batch * s.q_heads * s.q_len), 0);
    detail::FastCore fast(c.problem, c.inputs, opt, 1, k);
    detail::FastCore::Scratch scratch;
    detail::MpCoreRows mp(c.problem, c.inputs, opt);
    detail::WideExponentRange range;
    for (std::int64_t group = 0; group < fast.groups(); ++group) fast.run_group(group, r, scratch, mp, r.stats);
    return r;
  };
  const CoreReference a = compute(&detail::fast_kernels()), b = compute(&detail::fast_kernels_baseline());
  RC_TAG(detail::fast_kernels().name);
  RC_ASSERT(bit_identical(a.out, b.out) && bit_identical(a.bound, b.bound) && bit_identical(a.lse, b.lse));
}

// The bound arithmetic's inline steps are the C library's nextafter
// (ISO C 7.12.11.3) on every class of double: zeros, subnormals, normals,
// the largest finite, infinities, NaN, and random bit patterns.
TEST(ReferenceFast, InlineStepsAreTheLibrarysNextafter) {
  std::vector<double> xs = {0.0, -0.0, 0x1p-1074, 0x1p-1022, 0x1.fffffffffffffp-1023, 1.0, 0x1.fffffffffffffp1023,
                            -1.0, -0x1p-1074, detail::kInf, -detail::kInf, std::nan("")};
  std::mt19937_64 rng(11);
  for (int k = 0; k < 10000; ++k) xs.push_back(std::bit_cast<double>(rng()));
  for (const double x : xs) {
    const double up = detail::step_up(x), lib = std::nextafter(x, detail::kInf);
    EXPECT_TRUE(std::bit_cast<std::uint64_t>(up) == std::bit_cast<std::uint64_t>(lib) || (std::isnan(up) && std::isnan(lib)))
        << x;
    const double down = detail::step_down_clamped(x), lib_down = std::nextafter(x, 0.0);
    EXPECT_EQ(std::bit_cast<std::uint64_t>(down), std::bit_cast<std::uint64_t>(lib_down > 0 ? lib_down : 0.0)) << x;
  }
}

// The weighted sums run on a grid scaled by max_j |v_jd| (fast_row.inc,
// weighted_sums_grid). A value 2^60 on a key of weight ≈ e^-100 (2^-144:
// it moves the output by ~2^-84 of the others, yet the grid's scale by 2^60)
// makes the grid too coarse for that column: the row is run again with the
// cascaded sums and certified there, with no multiprecision escalation; a grid
// row that was not run again would miss the target and escalate.
TEST(ReferenceFast, CoarseGridRowsAreRunAgainWithCascadedSums) {
  CoreShape s;
  s.q_len = 3;
  s.kv_len = 40;
  s.key_dim = 8;
  s.value_dim = 6;
  testing::CoreCase c = testing::random_core(s, 5);
  c.problem.mask.kind = MaskKind::bias;
  c.problem.mask.bias = Tensor({1, 1, s.q_len, s.kv_len});
  for (std::int64_t i = 0; i < s.q_len; ++i) c.problem.mask.bias.at(0, 0, i, 7) = -100.0;
  c.inputs.v.at(0, 0, 7, 2) = 0x1p60;
  const CoreReference fast = run(c, ReferenceMethod::fast), mp = run(c, ReferenceMethod::multiprecision);
  EXPECT_TRUE(fast.certified);
  EXPECT_EQ(fast.stats.escalated_elements, 0);
  EXPECT_TRUE(enclose_same(fast.out, fast.bound, mp.out, mp.bound));
  for (std::size_t e = 0; e < fast.out.values.size(); ++e)
    EXPECT_LE(fast.bound.values[e], 0x1p-80 * fast.magnitude.values[e] * (1 + 0x1p-40));
}

// Memory stays O((Tq + Tk)·D): a long problem (Tk = 16384, D = 128) computed
// on a few query rows; the prepared layouts are the size of K and V.
TEST(ReferenceFast, LongKeysCertifiedOnTheFastPath) {
  CoreShape s;
  s.q_len = 4;
  s.kv_len = 16384;
  s.key_dim = s.value_dim = 128;
  const auto c = testing::random_core(s, 3);
  const CoreReference r = run(c, ReferenceMethod::fast, 2);
  EXPECT_TRUE(r.certified);
  EXPECT_EQ(r.stats.escalated_elements, 0);
  double worst = 0;
  for (std::size_t e = 0; e < r.out.values.size(); ++e) worst = std::max(worst, r.bound.values[e] / r.magnitude.values[e]);
  std::printf("Tk = 16384, D = 128: worst bound / magnitude = 2^%.1f (target 2^-80)\n", std::log2(worst));
  EXPECT_LE(worst, 0x1p-80);
}

}  // namespace
}  // namespace headroom
