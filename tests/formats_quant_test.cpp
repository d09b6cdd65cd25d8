// headroom — tests of int8 quantisation: group indexing, code ranges, the s/2
// error bound, exact dequantisation, zero points and bad input.
#include <gtest/gtest.h>
#include <rapidcheck/gtest.h>

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <cstdint>
#include <limits>
#include <set>
#include <stdexcept>
#include <string>

#include "headroom/quant.h"
#include "headroom/tensor.h"

namespace headroom {
namespace {

constexpr Granularity kAll[] = {Granularity::per_tensor, Granularity::per_head, Granularity::per_token,
                                Granularity::per_channel};

std::int64_t product(const std::vector<std::int64_t>& v) {
  std::int64_t n = 1;
  for (auto e : v) n *= e;
  return n;
}

struct Verdict {
  std::string failure;     ///< the first broken invariant, empty when all hold
  long double worst = 0;   ///< the worst |x − x̂| / s seen (≤ 1/2 when correct)
};

/// Returns: the first broken invariant of `q` as the quantisation of `x`.
Verdict check_invariants(const Tensor& x, const QuantizedTensor& q) {
  Verdict v;
  auto fail = [&v](const std::string& what) {
    if (v.failure.empty()) v.failure = what;
  };
  if (q.shape != x.shape || static_cast<std::int64_t>(q.codes.size()) != x.size()) fail("shape or code count");
  if (static_cast<std::int64_t>(q.scales.size()) != product(q.scale_shape)) fail("scale count");
  if (q.zero_points.size() != (q.scheme.asymmetric ? q.scales.size() : 0u)) fail("zero point count");
  if (!v.failure.empty()) return v;
  const Tensor back = dequantize(q);
  for (std::int64_t b = 0; b < x.shape[0]; ++b)
    for (std::int64_t h = 0; h < x.shape[1]; ++h)
      for (std::int64_t t = 0; t < x.shape[2]; ++t)
        for (std::int64_t d = 0; d < x.shape[3]; ++d) {
          const auto g = static_cast<std::size_t>(q.group(b, h, t, d));
          const auto i = static_cast<std::size_t>(x.offset(b, h, t, d));
          const std::string at = " at element " + std::to_string(i) + " (x = " + std::to_string(x.values[i]) + ")";
          const int c = q.codes[i];
          const int z = q.scheme.asymmetric ? q.zero_points[g] : 0;
          const float s = q.scales[g];
          if (!(s > 0.0f) || !std::isfinite(s)) fail("scale not positive and finite" + at);
          if (c < (q.scheme.asymmetric ? -128 : -127)) fail("code " + std::to_string(c) + " out of range" + at);
          // Exactness: x86-64 long double keeps 64 bits, more than the 8 + 24
          // of (c − z)·s, so this product is exact and must equal the double.
          const long double exact = static_cast<long double>(c - z) * static_cast<long double>(s);
          if (static_cast<long double>(back.values[i]) != exact) fail("dequantised value not exact" + at);
          // Error bound |x − x̂| ≤ s/2. The difference is exact in long double:
          // with c = z it is x itself; otherwise |x| ≥ s/2, so both operands are
          // multiples of s·2^-54 below 2^9·s, which 64 bits hold.
          const long double err = std::fabs(static_cast<long double>(x.values[i]) - exact);
          if (err > static_cast<long double>(s) / 2) fail("error above s/2" + at);
          v.worst = std::max(v.worst, err / static_cast<long double>(s));
        }
  return v;
}

/// EXPECTs every invariant and the s/2 bound; returns the worst |x − x̂| / s.
long double expect_invariants(const Tensor& x, const QuantizedTensor& q) {
  const Verdict v = check_invariants(x, q);
  EXPECT_EQ(v.failure, "") << scheme_name(q.scheme);
  EXPECT_LE(v.worst, 0.5L) << scheme_name(q.scheme);
  return v.worst;
}

Tensor ramp(std::vector<std::int64_t> shape, double step, double offset) {
  Tensor x(std::move(shape));
  for (std::size_t i = 0; i < x.values.size(); ++i) {
    // A spread of magnitudes and signs that differs per group.
    x.values[i] = offset + step * std::sin(static_cast<double>(i) * 1.7) * (1.0 + static_cast<double>(i % 7));
  }
  return x;
}

TEST(Quant, NamesRoundTrip) {
  for (Granularity g : kAll) EXPECT_EQ(parse_granularity(granularity_name(g)), g);
  EXPECT_FALSE(parse_granularity("per_row").has_value());
  EXPECT_EQ(scheme_name({Granularity::per_token, false}), "symmetric per_token");
  EXPECT_EQ(scheme_name({Granularity::per_channel, true}), "asymmetric per_channel");
}

// The group layouts match kernel_abi.h's hr_granularity comment.
TEST(Quant, GroupIndexing) {
  const std::vector<std::int64_t> shape{2, 3, 4, 5};
  const Tensor x = ramp(shape, 1.0, 0.0);
  for (Granularity g : kAll) {
    const QuantizedTensor q = quantize(x, {g, false});
    std::set<std::int64_t> seen;
    for (std::int64_t b = 0; b < 2; ++b)
      for (std::int64_t h = 0; h < 3; ++h)
        for (std::int64_t t = 0; t < 4; ++t)
          for (std::int64_t d = 0; d < 5; ++d) {
            const std::int64_t i = q.group(b, h, t, d);
            std::int64_t expected = 0;
            if (g == Granularity::per_head) expected = h;
            if (g == Granularity::per_token) expected = (b * 3 + h) * 4 + t;
            if (g == Granularity::per_channel) expected = h * 5 + d;
            EXPECT_EQ(i, expected) << granularity_name(g);
            seen.insert(i);
          }
    // Every scale is used and none is out of range.
    EXPECT_EQ(static_cast<std::int64_t>(seen.size()), product(q.scale_shape)) << granularity_name(g);
    EXPECT_EQ(*seen.begin(), 0);
    EXPECT_EQ(*seen.rbegin(), product(q.scale_shape) - 1);
  }
  EXPECT_EQ(quantize(x, {Granularity::per_tensor, false}).scale_shape, (std::vector<std::int64_t>{1}));
  EXPECT_EQ(quantize(x, {Granularity::per_head, false}).scale_shape, (std::vector<std::int64_t>{3}));
  EXPECT_EQ(quantize(x, {Granularity::per_token, false}).scale_shape, (std::vector<std::int64_t>{2, 3, 4}));
  EXPECT_EQ(quantize(x, {Granularity::per_channel, false}).scale_shape, (std::vector<std::int64_t>{3, 5}));
}

TEST(Quant, EveryScheme) {
  long double worst = 0;
  for (double offset : {0.0, 3.0, -250.0}) {
    for (double step : {1.0, 1e-3, 1e5}) {
      const Tensor x = ramp({2, 2, 3, 6}, step, offset * step);
      for (Granularity g : kAll) {
        for (bool asym : {false, true}) {
          const QuantizedTensor q = quantize(x, {g, asym});
          EXPECT_EQ(q.scheme, (QuantScheme{g, asym}));
          worst = std::max(worst, expect_invariants(x, q));
        }
      }
    }
  }
  std::printf("worst |x - dequantised| / s over every scheme: %.6Lf (bound 0.5)\n", worst);
}

// With max|x| = 127 the symmetric scale is exactly 1, so codes are rne(x):
// ties go to even (IEEE 754-2019 §4.3.1 roundTiesToEven), both signs.
TEST(Quant, TiesToEvenCodes) {
  Tensor x({1, 1, 1, 7});
  x.values = {127.0, 2.5, 3.5, -2.5, -3.5, 0.5, -127.0};
  const QuantizedTensor q = quantize(x, {Granularity::per_tensor, false});
  ASSERT_EQ(q.scales[0], 1.0f);
  EXPECT_EQ(q.codes, (std::vector<std::int8_t>{127, 2, 4, -2, -4, 0, -127}));
}

TEST(Quant, SymmetricNeverUsesMinus128) {
  Tensor x({1, 1, 2, 3});
  x.values = {-1.0, 0.25, 0.5, -0.999, 0.1, -0.3};
  const QuantizedTensor q = quantize(x, {Granularity::per_tensor, false});
  EXPECT_EQ(q.codes[0], -127);
  for (auto c : q.codes) EXPECT_GE(c, -127);
  EXPECT_GE(static_cast<double>(q.scales[0]) * 127, 1.0);  // upward: no code overflows
  const QuantizedTensor a = quantize(x, {Granularity::per_tensor, true});
  EXPECT_EQ(a.codes[0], -128);  // asymmetric maps the minimum onto −128
}

// Asymmetric: the range is widened to include 0, so 0 dequantises to exactly 0
// and the zero point always fits int8, even for a group far from 0.
TEST(Quant, AsymmetricZeroPoint) {
  Tensor x({1, 2, 1, 4});
  x.values = {100.0, 100.25, 100.5, 101.0,  // all positive: z = −128
              -7.0, 0.0, 3.0, 1.0};         // mixed signs: z inside
  const QuantizedTensor q = quantize(x, {Granularity::per_head, true});
  EXPECT_EQ(q.zero_points[0], -128);
  EXPECT_GT(q.zero_points[1], -128);
  EXPECT_LT(q.zero_points[1], 127);
  EXPECT_EQ(dequantize(q).values[5], 0.0);
  EXPECT_EQ(q.codes[5], q.zero_points[1]);
  expect_invariants(x, q);
  // All negative: the maximum 0 lands on 127.
  Tensor n({1, 1, 1, 3});
  n.values = {-5.0, -1.0, -2.0};
  const QuantizedTensor qn = quantize(n, {Granularity::per_tensor, true});
  EXPECT_EQ(qn.codes[0], -128);
  EXPECT_LE(qn.zero_points[0], 127);
  expect_invariants(n, qn);
}

// Span exactly 255 with both ends on ties: with s = 1, −127.5 → −128 and
// 127.5 → 128 would overflow; the scale must grow past 1.
TEST(Quant, AsymmetricBothEndsOnTies) {
  Tensor x({1, 1, 1, 2});
  x.values = {-127.5, 127.5};
  const QuantizedTensor q = quantize(x, {Granularity::per_tensor, true});
  EXPECT_GT(q.scales[0], 1.0f);
  expect_invariants(x, q);
}

TEST(Quant, AllZeroGroups) {
  Tensor x({1, 2, 1, 3});
  x.values = {0.0, -0.0, 0.0, 1.0, -2.0, 0.5};
  for (bool asym : {false, true}) {
    const QuantizedTensor q = quantize(x, {Granularity::per_head, asym});
    EXPECT_EQ(q.scales[0], 1.0f);
    for (int i = 0; i < 3; ++i) EXPECT_EQ(q.codes[static_cast<std::size_t>(i)], 0);
    if (asym) {
      EXPECT_EQ(q.zero_points[0], 0);
    }
    expect_invariants(x, q);
  }
  // An empty tensor quantises to nothing, without dividing by zero.
  const QuantizedTensor e = quantize(Tensor({1, 2, 0, 3}), {Granularity::per_channel, true});
  EXPECT_TRUE(e.codes.empty());
  EXPECT_EQ(e.scales.size(), 6u);
}

TEST(Quant, ExtremeMagnitudes) {
  Tensor tiny({1, 1, 1, 3});
  tiny.values = {1e-310, -3e-320, 0.0};  // binary64 subnormals: scale is float32's smallest
  const QuantizedTensor q = quantize(tiny, {Granularity::per_tensor, false});
  EXPECT_EQ(q.scales[0], std::numeric_limits<float>::denorm_min());
  expect_invariants(tiny, q);
  Tensor big({1, 1, 1, 2});
  big.values = {1e300, 1.0};
  EXPECT_THROW(quantize(big, {Granularity::per_tensor, false}), std::invalid_argument);
  big.values = {std::numeric_limits<double>::max(), -std::numeric_limits<double>::max()};
  EXPECT_THROW(quantize(big, {Granularity::per_tensor, true}), std::invalid_argument);
}

TEST(Quant, BadInput) {
  Tensor nan({1, 1, 1, 2});
  nan.values[1] = std::numeric_limits<double>::quiet_NaN();
  EXPECT_THROW(quantize(nan, {}), std::invalid_argument);
  nan.values[1] = std::numeric_limits<double>::infinity();
  EXPECT_THROW(quantize(nan, {}), std::invalid_argument);
  EXPECT_THROW(quantize(Tensor({2, 3}), {}), std::invalid_argument);

  const QuantizedTensor good = quantize(ramp({1, 2, 2, 2}, 1.0, 0.0), {Granularity::per_head, true});
  QuantizedTensor bad = good;
  bad.codes.pop_back();
  EXPECT_THROW(dequantize(bad), std::invalid_argument);
  bad = good;
  bad.scales[1] = 0.0f;
  EXPECT_THROW(dequantize(bad), std::invalid_argument);
  bad = good;
  bad.zero_points[0] = 200;
  EXPECT_THROW(dequantize(bad), std::invalid_argument);
  bad = good;
  bad.zero_points.clear();
  EXPECT_THROW(dequantize(bad), std::invalid_argument);
  bad = good;
  bad.scheme = {Granularity::per_head, false};
  bad.zero_points.clear();
  bad.codes[0] = -128;
  EXPECT_THROW(dequantize(bad), std::invalid_argument);
}

// Property: any finite tensor, any scheme — codes in range, error ≤ s/2, exact
// dequantisation. Magnitudes span many binades and groups carry offsets, the
// case asymmetric schemes exist for.
RC_GTEST_PROP(QuantProperty, InvariantsHold, ()) {
  const std::int64_t B = *rc::gen::inRange(1, 3), H = *rc::gen::inRange(1, 4);
  const std::int64_t T = *rc::gen::inRange(1, 6), D = *rc::gen::inRange(1, 7);
  const QuantScheme scheme{*rc::gen::elementOf(std::vector<Granularity>(std::begin(kAll), std::end(kAll))),
                           *rc::gen::arbitrary<bool>()};
  const int exponent = *rc::gen::inRange(-60, 60);
  const double offset = *rc::gen::inRange(-1000, 1000) * std::ldexp(1.0, exponent);
  Tensor x({B, H, T, D});
  const auto mantissas =
      *rc::gen::container<std::vector<int>>(static_cast<std::size_t>(x.size()), rc::gen::inRange(-1 << 20, 1 << 20));
  for (std::size_t i = 0; i < x.values.size(); ++i) {
    x.values[i] = offset + std::ldexp(static_cast<double>(mantissas[i]), exponent - 20);
  }
  const QuantizedTensor q = quantize(x, scheme);
  const Verdict v = check_invariants(x, q);
  RC_LOG() << scheme_name(scheme) << ": " << v.failure;
  RC_ASSERT(v.failure.empty());
}

}  // namespace
}  // namespace headroom
