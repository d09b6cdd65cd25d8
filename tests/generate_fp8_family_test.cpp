// headroom — the fp8_scales family's kinds do what they say. The subnormal-block kind:
// under the per-tensor amax scale (quant.h, quantize_fp8) a good part of the
// block's E4M3 codes are subnormal. A subnormal E4M3 pattern has exponent
// field 0 and a nonzero mantissa (OCP 8-bit Floating Point Specification
// rev 1.0, the E4M3 encoding table); a kernel that decodes such codes as
// normals is then exposed. With the family's former factor 2^-10 the block's
// entries scaled to normal codes and this test failed.
#include <gtest/gtest.h>

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <vector>

#include "headroom/generate.h"
#include "headroom/quant.h"

namespace headroom {
namespace {

double median_abs(const Tensor& t, std::int64_t from, std::int64_t to) {
  std::vector<double> a;
  for (std::int64_t b = 0; b < t.shape[0]; ++b)
    for (std::int64_t h = 0; h < t.shape[1]; ++h)
      for (std::int64_t j = from; j < to; ++j)
        for (std::int64_t d = 0; d < t.shape[3]; ++d) a.push_back(std::fabs(t.at(b, h, j, d)));
  std::nth_element(a.begin(), a.begin() + static_cast<std::ptrdiff_t>(a.size() / 2), a.end());
  return a[a.size() / 2];
}

TEST(GenerateFp8Family, SubnormalBlocksGiveSubnormalE4m3CodesUnderOneScale) {
  int blocks = 0;
  for (std::uint64_t seed = 1; seed <= 120; ++seed) {
    CaseRequest req;
    req.family = "fp8_scales";
    req.seed = seed;
    const Case c = make_case(req);
    const Tensor& k = c.core_inputs.k;
    const std::int64_t tk = k.shape[2];
    if (tk <= 64) continue;
    // The subnormal kind shrinks keys [0, min(64, Tk/2)) by 2^-13 or 2^-15.
    const std::int64_t end = std::min<std::int64_t>(64, tk / 2);
    if (median_abs(k, 0, end) > 1e-3 * median_abs(k, end, tk)) continue;
    ++blocks;
    const QuantizedTensor q = quantize_fp8(k, QuantScheme{}, Format::e4m3);
    std::int64_t subnormal = 0, total = 0;
    for (std::int64_t b = 0; b < k.shape[0]; ++b)
      for (std::int64_t h = 0; h < k.shape[1]; ++h)
        for (std::int64_t j = 0; j < end; ++j)
          for (std::int64_t d = 0; d < k.shape[3]; ++d) {
            const auto code = static_cast<std::uint8_t>(
                q.codes[static_cast<std::size_t>(((b * k.shape[1] + h) * tk + j) * k.shape[3] + d)]);
            subnormal += ((code >> 3) & 0xF) == 0 && (code & 0x7) != 0;
            ++total;
          }
    EXPECT_GE(4 * subnormal, total) << "seed " << seed << ": " << subnormal << " of " << total << " subnormal";
  }
  EXPECT_GE(blocks, 10) << "the family should draw its subnormal kind often enough in 120 seeds";
}

// The largest weight key j* holds in any visible row of (b, kv head g), and
// the smallest over rows: exact softmax in double of the received values.
double least_top_weight(const Case& c, const Tensor& q, const Tensor& k) {
  const CoreShape& s = c.core.shape;
  double least = 1.0;
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i) {
        const std::int64_t g = h / (s.q_heads / s.kv_heads);
        std::vector<double> z;
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          if (!c.core.mask.visible(s, b, h, i, j)) continue;
          double dot = 0;
          for (std::int64_t d = 0; d < s.key_dim; ++d) dot += q.at(b, h, i, d) * k.at(b, g, j, d);
          z.push_back(static_cast<double>(c.core.scale) * dot);
        }
        if (z.size() < 2) continue;
        const double m = *std::max_element(z.begin(), z.end());
        double l = 0;
        for (double x : z) l += std::exp(x - m);
        least = std::min(least, 1.0 / l);
      }
  return least;
}

// The delayed-scale kind: K's spike passes its delayed scale's range, so its
// code saturates to ±448 under a saturating conversion and is NaN under a
// non-saturating one, whatever the granularity (the delayed scale is every
// group's); and the clipped key still holds more than 464/480 of every
// visible row, the weight past which a P scale of 480 overflows E4M3
// (kernels/flawed/e4m3_overflow_nan.cpp). Under the amax rule nothing saturates.
TEST(GenerateFp8Family, DelayedScaleKindSaturatesKAndKeepsTheClippedKeyDominant) {
  int cases = 0;
  for (std::uint64_t seed = 1; seed <= 120; ++seed) {
    CaseRequest req;
    req.family = "fp8_scales";
    req.seed = seed;
    const Case c = make_case(req);
    if (c.core.fp8_delayed.k == 0.0f) continue;
    ++cases;
    const float sk = c.core.fp8_delayed.k;
    EXPECT_EQ(c.core.fp8_delayed.v, sk);
    const Tensor& k = c.core_inputs.k;
    std::int64_t beyond = 0;
    for (double x : k.values) beyond += std::fabs(x) > 448.0 * sk;
    EXPECT_EQ(beyond, k.shape[0] * k.shape[1]) << "seed " << seed << ": one spike per (batch, kv head)";
    for (const QuantScheme scheme : {QuantScheme{}, QuantScheme{Granularity::per_block, false, 64}}) {
      const QuantizedTensor sat = quantize_fp8_delayed(k, scheme, Format::e4m3, sk, true);
      const QuantizedTensor over = quantize_fp8_delayed(k, scheme, Format::e4m3, sk, false);
      std::int64_t clipped = 0, nan = 0;
      for (std::size_t i = 0; i < k.values.size(); ++i) {
        clipped += (static_cast<std::uint8_t>(sat.codes[i]) & 0x7F) == 0x7E && std::fabs(k.values[i]) > 448.0 * sk;
        nan += (static_cast<std::uint8_t>(over.codes[i]) & 0x7F) == 0x7F;
      }
      EXPECT_EQ(clipped, beyond) << "seed " << seed;
      EXPECT_EQ(nan, beyond) << "seed " << seed;
      const Tensor q = dequantize(quantize_fp8(c.core_inputs.q, scheme, Format::e4m3));
      EXPECT_GT(least_top_weight(c, q, dequantize(sat)), 464.0 / 480.0) << "seed " << seed;
    }
    std::int64_t fresh_top = 0;
    for (std::int8_t code : quantize_fp8(k, {}, Format::e4m3).codes) fresh_top += (static_cast<std::uint8_t>(code) & 0x7F) == 0x7E;
    EXPECT_GE(fresh_top, 1);  // the amax rule maps the spike to 448 too, but converts nothing beyond it
  }
  EXPECT_GE(cases, 10) << "the family should draw its delayed-scale kind often enough in 120 seeds";
}

// The saturation kind: V's delayed scale is 1, so its edge entries reach the
// conversion as they are: every entry above 448 becomes ±448 saturating (464
// by its tie, the others by saturation) — where the amax rule would have
// mapped only the largest to 448.
TEST(GenerateFp8Family, SaturationKindHandsItsEdgesToTheConversion) {
  int cases = 0;
  for (std::uint64_t seed = 1; seed <= 120; ++seed) {
    CaseRequest req;
    req.family = "fp8_scales";
    req.seed = seed;
    const Case c = make_case(req);
    if (c.core.fp8_delayed.v != 1.0f || c.core.fp8_delayed.k != 0.0f) continue;
    const Tensor& v = c.core_inputs.v;
    const QuantizedTensor sat = quantize_fp8_delayed(v, {}, Format::e4m3, 1.0f, true);
    std::int64_t past = 0, at_max = 0;
    for (std::size_t i = 0; i < v.values.size(); ++i) {
      past += std::fabs(v.values[i]) > 448.0;
      at_max += std::fabs(v.values[i]) > 448.0 && (static_cast<std::uint8_t>(sat.codes[i]) & 0x7F) == 0x7E;
    }
    if (past == 0) continue;
    ++cases;
    EXPECT_EQ(at_max, past) << "seed " << seed;
  }
  EXPECT_GE(cases, 5);
}

}  // namespace
}  // namespace headroom
