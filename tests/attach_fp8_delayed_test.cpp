// headroom tests — delayed 8-bit float scales through attachment
// (problem.h fp8_delayed, quant.h quantize_fp8_delayed): a kernel declaring
// saturating conversions receives each tensor with its delayed scale and the
// values past its range clipped to ±448, and the reference judges those
// clipped values; a kernel declaring non-saturating conversions is not given
// the case (its codes would be NaN); formats without scales ignore it.
#include <gtest/gtest.h>

#include <cmath>

#include "attach_cases.h"
#include "headroom/attach.h"
#include "headroom/bundled_registry.h"
#include "headroom/input_error.h"

namespace headroom {
namespace {

using testing::core_case;

TEST(AttachFp8Delayed, SaturatingKernelsReceiveClippedCodesOthersAreUnfit) {
  Case c = core_case({1, 2, 1, 3, 5, 4, 3}, MaskKind::none, 7);
  c.core_inputs.k.at(0, 0, 2, 1) = 100.0;  // past 448·2^-5 = 14
  c.core_inputs.v.at(0, 0, 4, 0) = -30.0;
  c.core.fp8_delayed.k = 0x1p-5f;
  c.core.fp8_delayed.v = 0x1p-5f;
  KernelDeclaration d = find_bundled("e4m3_blockwise")->declaration;
  ASSERT_TRUE(d.fp8_saturating);
  ASSERT_FALSE(why_unfit(c, d));
  const ReceivedCase r = receive(c, d);
  for (float s : r.k8->scales) EXPECT_EQ(s, 0x1p-5f);
  for (float s : r.v8->scales) EXPECT_EQ(s, 0x1p-5f);
  EXPECT_NE(r.q8->scales.front(), 0x1p-5f);  // Q has no delayed scale: its amax scale
  EXPECT_EQ(r.received.core_inputs.k.at(0, 0, 2, 1), 14.0);
  EXPECT_EQ(r.received.core_inputs.v.at(0, 0, 4, 0), -14.0);
  // Values inside the range are the delayed scale's rounding of the source.
  const double src = c.core_inputs.k.at(0, 0, 0, 0);
  EXPECT_LE(std::fabs(r.received.core_inputs.k.at(0, 0, 0, 0) - src), std::fmax(0x1p-4 * std::fabs(src), 0x1p-15));

  d.fp8_saturating = false;
  ASSERT_TRUE(why_unfit(c, d));
  EXPECT_NE(why_unfit(c, d)->find("non-saturating"), std::string::npos) << *why_unfit(c, d);
  EXPECT_THROW(receive(c, d), InputError);

  // A float32 kernel ignores the delayed scales.
  const KernelDeclaration f32 = find_bundled("f32_textbook")->declaration;
  ASSERT_FALSE(why_unfit(c, f32));
  EXPECT_EQ(receive(c, f32).received.core_inputs.k.at(0, 0, 2, 1), 100.0);
}

}  // namespace
}  // namespace headroom
