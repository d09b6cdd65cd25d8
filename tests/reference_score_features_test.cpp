// headroom — the certified reference with soft caps and sink logits (kernel_abi.h version 2).
//
// mpmath checks both against an independent tanh and exp in
// tests/external/reference_vs_mpmath_test.cpp; here: the error charged for
// Boost's tanh (mp_arith.h) measured against MPFR's correctly rounded
// mpfr_tanh, the two backends agreeing within their bounds, and closed forms
// the features must reproduce.
#include <gtest/gtest.h>
#include <mpfr.h>
#include <rapidcheck/gtest.h>

#include <boost/multiprecision/cpp_bin_float.hpp>
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
using testing::random_core;

CoreShape shape_of(std::int64_t hq, std::int64_t hkv, std::int64_t tq, std::int64_t tk, std::int64_t dk, std::int64_t dv) {
  CoreShape s;
  s.q_heads = hq, s.kv_heads = hkv, s.q_len = tq, s.kv_len = tk, s.key_dim = dk, s.value_dim = dv;
  return s;
}

// Boost's tanh for cpp_bin_float<256> against MPFR's (MPFR 4.2 manual, §4.4:
// mpfr_tanh is correctly rounded): the error assumed for it in mp_arith.h
// (2^12 units of 2^-256, as for exp and log) must hold. Prints the worst seen.
TEST(ReferenceBackends, BinFloatTanhWithinAssumedError) {
  using Bin = boost::multiprecision::number<
      boost::multiprecision::cpp_bin_float<256, boost::multiprecision::digit_base_2>, boost::multiprecision::et_off>;
  mpfr_t x, y, e;
  mpfr_inits2(600, x, y, e, static_cast<mpfr_ptr>(nullptr));
  std::mt19937_64 rng(11);
  std::uniform_real_distribution<double> arg(-40.0, 40.0);
  double worst = 0;
  for (int trial = 0; trial < 300; ++trial) {
    // Small arguments (tanh x ≈ x), the saturated tails, and everything between.
    const double t = trial < 4 ? std::ldexp(1.0, -20 * trial) : arg(rng) / (1 + trial % 9);
    const Bin b = boost::multiprecision::tanh(Bin(t));
    mpfr_set_str(y, b.str(0, std::ios_base::scientific).c_str(), 10, MPFR_RNDN);
    mpfr_set_d(x, t, MPFR_RNDN);
    mpfr_tanh(x, x, MPFR_RNDN);
    mpfr_sub(e, y, x, MPFR_RNDN);
    mpfr_div(e, e, x, MPFR_RNDN);
    worst = std::max(worst, std::fabs(mpfr_get_d(e, MPFR_RNDN)) * 0x1p256);
  }
  mpfr_clears(x, y, e, static_cast<mpfr_ptr>(nullptr));
  std::printf("cpp_bin_float<256> tanh: worst relative error %.3g units of 2^-256 (assumed <= 4096)\n", worst);
  EXPECT_LE(worst, 4096.0);
}

RC_GTEST_PROP(ReferenceScoreFeatures, MpfrAndBinFloatAgreeWithinTheirBounds, ()) {
  const auto hkv = *rc::gen::inRange<std::int64_t>(1, 3);
  const auto hq = hkv * *rc::gen::inRange<std::int64_t>(1, 3);
  const CoreShape s = shape_of(hq, hkv, *rc::gen::inRange<std::int64_t>(1, 5), *rc::gen::inRange<std::int64_t>(1, 7),
                               *rc::gen::inRange<std::int64_t>(1, 6), *rc::gen::inRange<std::int64_t>(1, 4));
  testing::CoreCase c = random_core(s, *rc::gen::arbitrary<std::uint64_t>(), *rc::gen::element(0.5, 2.0, 8.0));
  c.problem.softcap = *rc::gen::element(0.0f, 0.5f, 3.0f, 50.0f);
  if (*rc::gen::arbitrary<bool>()) {
    for (std::int64_t h = 0; h < hq; ++h) c.problem.sinks.push_back(*rc::gen::element(-30.0f, -1.5f, 0.0f, 2.25f, 25.0f));
  }
  ReferenceOptions mpfr, bin;
  bin.backend = ReferenceBackend::cpp_bin_float;
  const CoreReference a = reference_core(c.problem, c.inputs, mpfr), b = reference_core(c.problem, c.inputs, bin);
  RC_ASSERT(a.certified && b.certified);
  RC_ASSERT(enclose_same(a.out, a.bound, b.out, b.bound));
  RC_ASSERT(enclose_same(a.lse, a.lse_bound, b.lse, b.lse_bound));
}

// Every score far past the cap saturates to c·tanh(≥ 40) = c(1 − O(e^-80)):
// the weights are equal and the output is the mean of the values.
TEST(ReferenceScoreFeatures, SaturatedCapGivesTheMeanOfTheValues) {
  testing::CoreCase c = random_core(shape_of(1, 1, 3, 6, 4, 3), 3, 1.0);
  for (double& x : c.inputs.q.values) x = 100.0;
  for (double& x : c.inputs.k.values) x = 100.0 + x;  // scores ≈ 2·10^4 each, all different
  c.problem.softcap = 0.5f;
  const CoreReference r = reference_core(c.problem, c.inputs);
  ASSERT_TRUE(r.certified);
  for (std::int64_t i = 0; i < 3; ++i) {
    for (std::int64_t d = 0; d < 3; ++d) {
      double mean = 0;
      for (std::int64_t j = 0; j < 6; ++j) mean += c.inputs.v.at(0, 0, j, d) / 6.0;
      EXPECT_NEAR(r.out.at(0, 0, i, d), mean, r.bound.at(0, 0, i, d) + 1e-15) << i << ' ' << d;
    }
    // lse = c + log 6 (to within c·e^-80, far below a double's resolution here).
    EXPECT_NEAR(r.lse.at(0, 0, i), 0.5 + std::log(6.0), 1e-15);
  }
  // Without the cap the same case is dominated by its largest score: not the mean.
  c.problem.softcap = 0.0f;
  const CoreReference plain = reference_core(c.problem, c.inputs);
  EXPECT_GT(plain.lse.at(0, 0, 0), 1e4);
}

// With K = 0 every score is 0, so with a sink σ: O_d = Σ_j v_jd / (n + e^σ)
// and lse = log(n + e^σ), in closed form.
TEST(ReferenceScoreFeatures, SinkJoinsTheNormaliserWithNoValueRow) {
  testing::CoreCase c = random_core(shape_of(2, 1, 2, 5, 3, 4), 8, 1.0);
  for (double& x : c.inputs.k.values) x = 0.0;
  c.problem.sinks = {2.5f, -40.0f};
  for (ReferenceMethod method : {ReferenceMethod::fast, ReferenceMethod::multiprecision}) {
    ReferenceOptions opt;
    opt.method = method;
    const CoreReference r = reference_core(c.problem, c.inputs, opt);
    ASSERT_TRUE(r.certified);
    for (std::int64_t h = 0; h < 2; ++h) {
      const double norm = 5.0 + std::exp(static_cast<double>(c.problem.sinks[static_cast<std::size_t>(h)]));
      for (std::int64_t i = 0; i < 2; ++i) {
        EXPECT_NEAR(r.lse.at(0, h, i), std::log(norm), 1e-15 * std::log(norm));
        for (std::int64_t d = 0; d < 4; ++d) {
          double sum = 0;
          for (std::int64_t j = 0; j < 5; ++j) sum += c.inputs.v.at(0, 0, j, d);
          EXPECT_NEAR(r.out.at(0, h, i, d), sum / norm, 1e-15 * 5.0 / norm * 4.0) << h << ' ' << i << ' ' << d;
        }
      }
    }
  }
}

TEST(ReferenceScoreFeatures, TheBackwardRefusesThem) {
  testing::CoreCase c = random_core(shape_of(1, 1, 2, 2, 2, 2), 1, 1.0);
  c.problem.softcap = 5.0f;
  EXPECT_THROW(reference_backward(c.problem, c.inputs, c.inputs.q), InputError);
}

}  // namespace
}  // namespace headroom
