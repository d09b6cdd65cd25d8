// headroom — the fp8_scales family's subnormal-block kind does what it says:
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

}  // namespace
}  // namespace headroom
