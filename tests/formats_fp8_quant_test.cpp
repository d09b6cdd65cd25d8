// headroom — tests of 8-bit float quantisation (quant.h, quantize_fp8,
// quantize_fp8_delayed): scale groups per tensor, head, token, channel and
// block, the amax scale rule, delayed scales that saturate or overflow, the
// error bound stated in quant.h, exact dequantisation, and bad input.
#include <gtest/gtest.h>
#include <rapidcheck/gtest.h>

#include <cmath>
#include <cstdint>
#include <cstdio>
#include <limits>
#include <stdexcept>

#include "headroom/fp8.h"
#include "headroom/quant.h"
#include "headroom/tensor.h"

namespace headroom {
namespace {

Tensor ramp(std::vector<std::int64_t> shape, double scale) {
  Tensor t(std::move(shape));
  for (std::size_t i = 0; i < t.values.size(); ++i) t.values[i] = scale * std::sin(1.0 + 0.7 * static_cast<double>(i));
  return t;
}

Fp8Kind kind_of(Format f) { return f == Format::e4m3 ? Fp8Kind::e4m3 : Fp8Kind::e5m2; }

// The bound quant.h states: relative 2^-4 (E4M3) / 2^-3 (E5M2) in the normal
// range, absolute s·2^-10 / s·2^-17 (half the smallest subnormal) below it.
// Returns the worst error over the bound (≤ 1 when the bound holds).
double worst_over_bound(const Tensor& x, const QuantizedTensor& q) {
  const Tensor back = dequantize(q);
  const Fp8Kind k = kind_of(q.format);
  const double u = fp8_unit_roundoff(k);
  const double half_sub = (k == Fp8Kind::e4m3 ? kE4m3MinSubnormal : kE5m2MinSubnormal) / 2;
  double worst = 0;
  for (std::int64_t b = 0; b < x.shape[0]; ++b)
    for (std::int64_t h = 0; h < x.shape[1]; ++h)
      for (std::int64_t t = 0; t < x.shape[2]; ++t)
        for (std::int64_t d = 0; d < x.shape[3]; ++d) {
          const double s = q.scales[static_cast<std::size_t>(q.group(b, h, t, d))];
          const double xv = x.at(b, h, t, d);
          const double bound = std::fmax(u * std::fabs(xv), half_sub * s);
          worst = std::fmax(worst, std::fabs(xv - back.at(b, h, t, d)) / bound);
        }
  return worst;
}

TEST(Fp8Quant, ScaleShapesAndGroupIndices) {
  const Tensor x = ramp({2, 3, 10, 4}, 5.0);
  EXPECT_EQ(quantize_fp8(x, {Granularity::per_tensor}, Format::e4m3).scale_shape, (std::vector<std::int64_t>{1}));
  EXPECT_EQ(quantize_fp8(x, {Granularity::per_head}, Format::e4m3).scale_shape, (std::vector<std::int64_t>{3}));
  const QuantizedTensor blk = quantize_fp8(x, {Granularity::per_block, false, 4}, Format::e4m3);
  // ceil(10 / 4) = 3 blocks per (b, h); index (b·H + h)·3 + t/4 (kernel_abi.h).
  EXPECT_EQ(blk.scale_shape, (std::vector<std::int64_t>{2, 3, 3}));
  EXPECT_EQ(blk.group(1, 2, 9, 3), (1 * 3 + 2) * 3 + 2);
  EXPECT_EQ(blk.group(0, 1, 4, 0), (0 * 3 + 1) * 3 + 1);
  EXPECT_EQ(blocks_of(10, 4), 3);
  EXPECT_EQ(blocks_of(8, 4), 2);
  EXPECT_EQ(scheme_name({Granularity::per_block, false, 64}), "symmetric per_block of 64");
}

// amax/M, the smallest float32 with M·s ≥ amax: the largest element lands on
// or just under the largest finite code and nothing overflows.
TEST(Fp8Quant, AmaxScaleRule) {
  for (Format f : {Format::e4m3, Format::e5m2}) {
    const double m = fp8_max(kind_of(f));
    Tensor x({1, 1, 3, 2});
    x.values = {0.5, -3.0, 1.25, 2.0, -0.001, 0.0};  // amax 3
    const QuantizedTensor q = quantize_fp8(x, {}, f);
    const double s = q.scales[0];
    EXPECT_GE(s * m, 3.0);
    EXPECT_LT(static_cast<double>(std::nextafter(q.scales[0], 0.0f)) * m, 3.0);
    EXPECT_EQ(static_cast<std::uint8_t>(q.codes[1]) & 0x7F, f == Format::e4m3 ? 0x7E : 0x7B) << format_name(f);
    EXPECT_LE(worst_over_bound(x, q), 1.0);
  }
}

TEST(Fp8Quant, AllZeroGroupGetsScaleOne) {
  Tensor x({1, 2, 2, 2});
  x.values = {0, 0, 0, 0, 1, 2, 3, 4};
  const QuantizedTensor q = quantize_fp8(x, {Granularity::per_head}, Format::e4m3);
  EXPECT_EQ(q.scales[0], 1.0f);
  EXPECT_NE(q.scales[1], 1.0f);
}

// A block holding one large value gets its own scale; its neighbours keep
// theirs (what per-block scales are for), while one per-tensor scale pushes
// the small values of other blocks into the subnormals.
TEST(Fp8Quant, OneLargeValueStaysInItsBlock) {
  Tensor x({1, 1, 8, 4});
  for (std::size_t i = 0; i < x.values.size(); ++i) x.values[i] = 0.01 * static_cast<double>(i % 5 + 1);
  x.at(0, 0, 5, 2) = 1e4;
  const QuantizedTensor blk = quantize_fp8(x, {Granularity::per_block, false, 4}, Format::e4m3);
  const QuantizedTensor ten = quantize_fp8(x, {}, Format::e4m3);
  EXPECT_GT(blk.scales[1], 1000 * blk.scales[0]);
  const Tensor bb = dequantize(blk), bt = dequantize(ten);
  double blk_err = 0, ten_err = 0;
  for (std::int64_t t = 0; t < 4; ++t)
    for (std::int64_t d = 0; d < 4; ++d) {
      blk_err = std::fmax(blk_err, std::fabs(bb.at(0, 0, t, d) - x.at(0, 0, t, d)) / x.at(0, 0, t, d));
      ten_err = std::fmax(ten_err, std::fabs(bt.at(0, 0, t, d) - x.at(0, 0, t, d)) / x.at(0, 0, t, d));
    }
  EXPECT_LE(blk_err, 0x1p-4);
  EXPECT_GT(ten_err, 0.1);  // 0.01 / (1e4/448) ≈ 0.45: a subnormal with ~1 bit
  EXPECT_LE(worst_over_bound(x, blk), 1.0);
  EXPECT_LE(worst_over_bound(x, ten), 1.0);
}

// A block whose values all sit in the subnormal range of E4M3 once scaled by a
// per-tensor amax: the error stays within half the smallest subnormal times s.
TEST(Fp8Quant, SubnormalOnlyBlock) {
  Tensor x({1, 1, 4, 4});
  for (std::size_t i = 0; i < 8; ++i) x.values[i] = 0x1p-8 * (1 + static_cast<double>(i % 3)) + 0x1p-12;
  for (std::size_t i = 8; i < 16; ++i) x.values[i] = 448.0 * (i == 8 ? 1.0 : 0.5);
  const QuantizedTensor q = quantize_fp8(x, {}, Format::e4m3);
  EXPECT_EQ(q.scales[0], 1.0f);
  for (std::size_t i = 0; i < 8; ++i) EXPECT_EQ(static_cast<std::uint8_t>(q.codes[i]) >> 3, 0) << i;  // exponent field 0
  EXPECT_LE(worst_over_bound(x, q), 1.0);
}

TEST(Fp8Quant, DequantisationIsExact) {
  const Tensor x = ramp({1, 2, 5, 3}, 7.0);
  const QuantizedTensor q = quantize_fp8(x, {Granularity::per_token}, Format::e5m2);
  const Tensor back = dequantize(q);
  for (std::size_t i = 0; i < back.values.size(); ++i) {
    const std::int64_t t = static_cast<std::int64_t>(i / 3) % 5, h = static_cast<std::int64_t>(i / 15);
    const float s = q.scales[static_cast<std::size_t>(q.group(0, h, t, 0))];
    // decode (≤ 3 significant bits) × s (24 bits): exact in double, computed
    // here by long double as an independent product.
    const long double want = static_cast<long double>(fp8_to_double(static_cast<std::uint8_t>(q.codes[i]), Fp8Kind::e5m2)) * s;
    EXPECT_EQ(static_cast<long double>(back.values[i]), want);
  }
}

TEST(Fp8Quant, RefusesWhatItCannotHold) {
  Tensor x({1, 1, 2, 2});
  x.values = {1, 2, std::nan(""), 4};
  EXPECT_THROW(quantize_fp8(x, {}, Format::e4m3), std::invalid_argument);
  x.values[2] = 3;
  EXPECT_THROW(quantize_fp8(x, {Granularity::per_tensor, true}, Format::e4m3), std::invalid_argument);
  EXPECT_THROW(quantize_fp8(x, {Granularity::per_block, false, 0}, Format::e4m3), std::invalid_argument);
  EXPECT_THROW(quantize_fp8(x, {Granularity::per_head, false, 4}, Format::e4m3), std::invalid_argument);
  EXPECT_THROW(quantize_fp8(x, {}, Format::int8), std::invalid_argument);
  QuantizedTensor q = quantize_fp8(x, {}, Format::e4m3);
  q.codes[0] = static_cast<std::int8_t>(0x7F);  // E4M3 NaN
  EXPECT_THROW(dequantize(q), std::invalid_argument);
}

// Delayed scales (quantize_fp8_delayed): every group takes the given scale,
// each code is the conversion of x/s in the requested saturation mode, so
// values past M·s reach the format's edge: 464·s ties to 448 (even), 465·s
// and 480·s become 448 saturating and NaN (0x7F) otherwise in E4M3; in E5M2
// 61440·s becomes 57344 or +infinity (0x7C). The amax rule would have
// scaled them all into range.
TEST(Fp8Quant, DelayedScaleSaturatesOrOverflowsAsDeclared) {
  const float s = 0x1p-5f;
  Tensor x({1, 2, 3, 2});
  x.values = {448 * 0x1p-5, 464 * 0x1p-5, 465 * 0x1p-5, -480 * 0x1p-5, 1.0, 0.0,
              57344 * 0x1p-5, 61440 * 0x1p-5, -1000.0, 0x1p-20, 2.0, -3.0};
  for (const QuantScheme scheme : {QuantScheme{}, QuantScheme{Granularity::per_block, false, 2},
                                   QuantScheme{Granularity::per_head, false, 0}}) {
    for (const Format f : {Format::e4m3, Format::e5m2})
      for (const bool sat : {true, false}) {
        const QuantizedTensor q = quantize_fp8_delayed(x, scheme, f, s, sat);
        for (float sc : q.scales) EXPECT_EQ(sc, s);
        for (std::size_t i = 0; i < x.values.size(); ++i)
          EXPECT_EQ(static_cast<std::uint8_t>(q.codes[i]), double_to_fp8(x.values[i] / s, kind_of(f), sat)) << i;
      }
  }
  const auto code = [&](Format f, bool sat, std::size_t i) {
    return static_cast<std::uint8_t>(quantize_fp8_delayed(x, {}, f, s, sat).codes[i]);
  };
  EXPECT_EQ(code(Format::e4m3, false, 0), 0x7E);  // 448 exactly
  EXPECT_EQ(code(Format::e4m3, false, 1), 0x7E);  // the tie 464 rounds to 448
  EXPECT_EQ(code(Format::e4m3, true, 2), 0x7E);
  EXPECT_EQ(code(Format::e4m3, false, 2), 0x7F);  // NaN
  EXPECT_EQ(code(Format::e4m3, true, 3), 0xFE);   // −448
  EXPECT_EQ(code(Format::e4m3, false, 3), 0xFF);
  EXPECT_EQ(code(Format::e5m2, true, 6), 0x7B);   // 57344
  EXPECT_EQ(code(Format::e5m2, true, 7), 0x7B);
  EXPECT_EQ(code(Format::e5m2, false, 7), 0x7C);  // +infinity
  // Saturated codes dequantise to ±M·s; overflowed ones are refused.
  EXPECT_EQ(dequantize(quantize_fp8_delayed(x, {}, Format::e4m3, s, true)).values[8], -448 * 0x1p-5);
  EXPECT_THROW(dequantize(quantize_fp8_delayed(x, {}, Format::e4m3, s, false)), std::invalid_argument);
  // The amax rule on the same tensor keeps every code finite.
  for (std::int8_t c : quantize_fp8(x, {}, Format::e4m3).codes) EXPECT_TRUE(std::isfinite(fp8_to_double(static_cast<std::uint8_t>(c), Fp8Kind::e4m3)));
  for (const float bad : {0.0f, -1.0f, std::numeric_limits<float>::infinity()})
    EXPECT_THROW(quantize_fp8_delayed(x, {}, Format::e4m3, bad, true), std::invalid_argument);
}

// Every granularity, both formats, random shapes and magnitudes (1e-6 … 1e6):
// the stated bound holds.
RC_GTEST_PROP(Fp8Quant, ErrorBoundHolds, ()) {
  const auto b = *rc::gen::inRange<std::int64_t>(1, 3);
  const auto h = *rc::gen::inRange<std::int64_t>(1, 3);
  const auto t = *rc::gen::inRange<std::int64_t>(1, 20);
  const auto d = *rc::gen::inRange<std::int64_t>(1, 6);
  const int e = *rc::gen::inRange(-6, 7);
  const Format f = *rc::gen::element(Format::e4m3, Format::e5m2);
  const Granularity g = *rc::gen::element(Granularity::per_tensor, Granularity::per_head, Granularity::per_token,
                                          Granularity::per_channel, Granularity::per_block);
  const std::int64_t blk = g == Granularity::per_block ? *rc::gen::inRange<std::int64_t>(1, 9) : 0;
  Tensor x({b, h, t, d});
  for (double& v : x.values) v = *rc::gen::inRange(-1000, 1000) * std::pow(10.0, e) / 1000.0;
  const QuantizedTensor q = quantize_fp8(x, {g, false, blk}, f);
  RC_ASSERT(worst_over_bound(x, q) <= 1.0);
}

}  // namespace
}  // namespace headroom
