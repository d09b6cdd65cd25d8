// headroom — tests of the formats stage: IEEE parameters through the
// conversions, format names, rounding, Tensor, and int8 quantisation.
#include <gtest/gtest.h>
#include <rapidcheck/gtest.h>

#include <bit>
#include <cmath>
#include <cstdint>
#include <limits>
#include <stdexcept>
#include <utility>

#include "headroom/binary16.h"
#include "headroom/format.h"
#include "headroom/quant.h"
#include "headroom/tensor.h"

namespace headroom {
namespace {

constexpr double kInf = std::numeric_limits<double>::infinity();

double b16(double x) { return binary16_to_float(double_to_binary16(x)); }

// IEEE 754-2019 Table 3.5, binary16: p = 11, emax = 15, so the largest finite
// value is (2 − 2^-10)·2^15 = 65504, the smallest normal 2^-14, the smallest
// subnormal 2^(emin − p + 1) = 2^-24, and the gap above 1 is 2^-10.
TEST(Binary16, Ieee754Parameters) {
  EXPECT_EQ(double_to_binary16(kBinary16Max), 0x7BFF);
  EXPECT_EQ(binary16_to_float(0x7BFF), kBinary16Max);
  EXPECT_EQ(double_to_binary16(kBinary16MinNormal), 0x0400);
  EXPECT_EQ(binary16_to_float(0x0400), kBinary16MinNormal);
  EXPECT_EQ(double_to_binary16(kBinary16MinSubnormal), 0x0001);
  EXPECT_EQ(binary16_to_float(0x0001), kBinary16MinSubnormal);
  EXPECT_EQ(binary16_to_float(0x3C01) - 1.0f, kBinary16Epsilon);
  EXPECT_EQ(binary16_to_float(0x03FF), kBinary16MinNormal - kBinary16MinSubnormal);  // largest subnormal
  EXPECT_EQ(kBinary16Max, (2.0 - kBinary16Epsilon) * 32768.0);
}

// Round to nearest, ties to even (IEEE 754-2019 §4.3.1), at the edges.
TEST(Binary16, TiesToEvenAndOverflow) {
  EXPECT_EQ(double_to_binary16(1.0 + 0x1p-11), 0x3C00);        // tie, 0x3C00 even
  EXPECT_EQ(double_to_binary16(1.0 + 3 * 0x1p-11), 0x3C02);    // tie, 0x3C02 even
  EXPECT_EQ(double_to_binary16(1.0 + 0x1p-11 + 0x1p-40), 0x3C01);
  EXPECT_EQ(double_to_binary16(0x1p-25), 0x0000);              // half the smallest subnormal: tie to 0
  EXPECT_EQ(double_to_binary16(0x1p-25 + 0x1p-60), 0x0001);
  EXPECT_EQ(double_to_binary16(3 * 0x1p-25), 0x0002);          // tie between 1 and 2 units: 2
  EXPECT_EQ(double_to_binary16(kBinary16MinNormal - 0x1p-25), 0x0400);  // subnormal rounds up to normal
  // |x| ≥ 65520 = 65504 + half an ulp (16) overflows; the tie goes to the even
  // "2^16", which is infinity.
  EXPECT_EQ(double_to_binary16(65520.0), 0x7C00);
  EXPECT_EQ(double_to_binary16(std::nextafter(65520.0, 0.0)), 0x7BFF);
  EXPECT_EQ(double_to_binary16(-65520.0), 0xFC00);
  EXPECT_EQ(double_to_binary16(1e300), 0x7C00);
  EXPECT_EQ(double_to_binary16(kInf), 0x7C00);
  EXPECT_EQ(double_to_binary16(-kInf), 0xFC00);
}

TEST(Binary16, SignedZeroAndNan) {
  EXPECT_EQ(double_to_binary16(0.0), 0x0000);
  EXPECT_EQ(double_to_binary16(-0.0), 0x8000);
  EXPECT_EQ(double_to_binary16(-1e-300), 0x8000);  // underflow keeps the sign
  EXPECT_TRUE(std::signbit(binary16_to_float(0x8000)));
  const std::uint16_t pos = double_to_binary16(std::numeric_limits<double>::quiet_NaN());
  const std::uint16_t neg = double_to_binary16(-std::numeric_limits<double>::quiet_NaN());
  EXPECT_TRUE(std::isnan(binary16_to_float(pos)));
  EXPECT_EQ(pos & 0x8000, 0);
  EXPECT_EQ(neg & 0x8000, 0x8000);
  // A signalling NaN whose payload lies below binary16's 10 bits must not become infinity.
  const double snan = std::bit_cast<double>(std::uint64_t{0x7FF0000000000001});
  EXPECT_EQ(double_to_binary16(snan) & 0x7E00, 0x7E00);  // NaN and quiet
  EXPECT_EQ(float_to_bfloat16(std::bit_cast<float>(0x7F800001u)) & 0x7FC0, 0x7FC0);
}

// bfloat16 shares float32's exponent (emax 127, emin −126) with p = 8.
TEST(Bfloat16, Parameters) {
  EXPECT_EQ(double_to_bfloat16(1.0), 0x3F80);
  EXPECT_EQ(bfloat16_to_float(0x3F81), 1.0f + 0x1p-7f);
  EXPECT_EQ(double_to_bfloat16(1.0 + 0x1p-8), 0x3F80);                // tie to even
  EXPECT_EQ(double_to_bfloat16(1.0 + 3 * 0x1p-8), 0x3F82);            // tie to even
  EXPECT_EQ(bfloat16_to_float(0x7F7F), 0x1.FEp127f);                  // largest finite
  EXPECT_EQ(double_to_bfloat16(0x1.FFp127), 0x7F80);                  // its overflow tie → inf
  EXPECT_EQ(double_to_bfloat16(std::nextafter(0x1.FFp127, 0.0)), 0x7F7F);
  EXPECT_EQ(bfloat16_to_float(0x0001), 0x1p-133f);                    // smallest subnormal
  EXPECT_EQ(double_to_bfloat16(0x1p-134), 0x0000);                    // tie to 0
  EXPECT_EQ(double_to_bfloat16(-0x1p-133), 0x8001);
  EXPECT_EQ(float_to_bfloat16(-0.0f), 0x8000);
}

TEST(Format, NamesRoundTrip) {
  for (Format f : {Format::float64, Format::float32, Format::binary16, Format::bfloat16, Format::int8}) {
    EXPECT_EQ(parse_format(format_name(f)), f) << format_name(f);
  }
  EXPECT_EQ(format_name(Format::binary16), "binary16");
  EXPECT_EQ(parse_format("f64"), Format::float64);
  EXPECT_EQ(parse_format("f32"), Format::float32);
  EXPECT_EQ(parse_format("f16"), Format::binary16);
  EXPECT_EQ(parse_format("fp16"), Format::binary16);
  EXPECT_EQ(parse_format("half"), Format::binary16);
  EXPECT_EQ(parse_format("bf16"), Format::bfloat16);
  EXPECT_FALSE(parse_format("float16x").has_value());
  EXPECT_FALSE(parse_format("").has_value());
  EXPECT_FALSE(parse_format("int4").has_value());
}

TEST(Format, UnitRoundoff) {
  EXPECT_EQ(unit_roundoff(Format::float64), std::numeric_limits<double>::epsilon() / 2);
  EXPECT_EQ(unit_roundoff(Format::float32), std::numeric_limits<float>::epsilon() / 2);
  EXPECT_EQ(unit_roundoff(Format::binary16), kBinary16Epsilon / 2);
  EXPECT_EQ(unit_roundoff(Format::bfloat16), 0x1p-8);
  EXPECT_EQ(unit_roundoff(Format::int8), unit_roundoff(Format::float32));
}

TEST(Format, RoundToFormat) {
  EXPECT_EQ(round_to_format(1.0 + 0x1p-30, Format::float64), 1.0 + 0x1p-30);
  EXPECT_EQ(round_to_format(1.0 + 0x1p-24, Format::float32), 1.0);
  EXPECT_EQ(round_to_format(1.0 + 0x1p-24 + 0x1p-50, Format::float32), 1.0 + 0x1p-23);
  EXPECT_EQ(round_to_format(1e39, Format::float32), kInf);
  EXPECT_EQ(round_to_format(65520.0, Format::binary16), kInf);
  EXPECT_EQ(round_to_format(0.1, Format::binary16), 0x1.998p-4);
  EXPECT_EQ(round_to_format(0.1, Format::bfloat16), 0x1.9Ap-4);
  EXPECT_EQ(round_to_format(1.0 + 0x1p-24, Format::int8), 1.0);
  EXPECT_TRUE(std::signbit(round_to_format(-0.0, Format::binary16)));
}

// The rounding error bound the scores rely on: |fl(x) − x| ≤ u·|x| for x in
// the normal range (Higham 2002, Theorem 2.2), and fl is idempotent.
RC_GTEST_PROP(FormatProperty, RoundingWithinUnitRoundoff, ()) {
  const Format f = *rc::gen::element(Format::float32, Format::binary16, Format::bfloat16);
  const double lo = f == Format::binary16 ? -14 : -126;
  const double hi = f == Format::binary16 ? 15 : 127;
  const int e = *rc::gen::inRange(static_cast<int>(lo), static_cast<int>(hi));
  const double m = 1.0 + static_cast<double>(*rc::gen::inRange<std::int64_t>(0, std::int64_t{1} << 52)) * 0x1p-52;
  const double x = (*rc::gen::arbitrary<bool>() ? -1 : 1) * std::ldexp(m, e);
  const double r = round_to_format(x, f);
  RC_ASSERT(std::fabs(r - x) <= unit_roundoff(f) * std::fabs(x));
  RC_ASSERT(round_to_format(r, f) == r);
}

RC_GTEST_PROP(FormatProperty, Binary16RoundingIsMonotonic, (double a, double b)) {
  RC_PRE(std::isfinite(a) && std::isfinite(b));
  if (a > b) std::swap(a, b);
  RC_ASSERT(b16(a) <= b16(b));
}

TEST(Tensor, ShapeSizeAndZeros) {
  const Tensor t({2, 3, 4});
  EXPECT_EQ(t.size(), 24);
  EXPECT_EQ(t.values.size(), 24u);
  for (double v : t.values) EXPECT_EQ(std::bit_cast<std::uint64_t>(v), 0u);  // +0, not −0
  EXPECT_EQ(Tensor(std::vector<std::int64_t>{}).size(), 1);
  EXPECT_EQ(Tensor({3, 0, 2}).size(), 0);
  EXPECT_EQ(Tensor({2, 3, 4, 5}).offset(1, 2, 3, 4), 119);
  EXPECT_THROW(Tensor({2, -1}), std::invalid_argument);
}

TEST(Tensor, BitIdentical) {
  Tensor a({2, 2});
  Tensor b({2, 2});
  EXPECT_TRUE(bit_identical(a, b));
  b.values[3] = -0.0;
  EXPECT_FALSE(bit_identical(a, b));  // −0 ≠ +0 bitwise though equal as values
  a.values[3] = -0.0;
  EXPECT_TRUE(bit_identical(a, b));
  a.values[0] = b.values[0] = std::numeric_limits<double>::quiet_NaN();
  EXPECT_TRUE(bit_identical(a, b));  // the same NaN is identical though NaN ≠ NaN
  b.values[0] = std::bit_cast<double>(std::bit_cast<std::uint64_t>(a.values[0]) | 1u);
  EXPECT_FALSE(bit_identical(a, b));  // another payload
  EXPECT_FALSE(bit_identical(Tensor({4}), Tensor({2, 2})));
}

}  // namespace
}  // namespace headroom
