// headroom — binary16 against the compiler's _Float16, bfloat16 against a
// reference derived from the IEEE 754-2019 definition.
//
// Outside references:
//  * GCC's _Float16 (ISO/IEC TS 18661-3, IEEE 754-2019 binary16). On x86-64
//    without AVX512-FP16, GCC lowers its conversions to libgcc's soft-fp
//    __extendhfsf2, __truncsfhf2 and __truncdfhf2, each a correctly rounded
//    conversion straight from its source format, so (_Float16)double is a
//    single rounding from binary64.
//  * bfloat16 has no compiler type here; its reference below is written from
//    the definition (sign, 8-bit exponent with bias 127, 7 fraction bits,
//    roundTiesToEven of IEEE 754-2019 §4.3.1) with frexp/ldexp on doubles —
//    no bit manipulation, so it shares no code path with the harness.
#include <gtest/gtest.h>

#include <bit>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <cstring>
#include <limits>

#include "headroom/binary16.h"

namespace headroom {
namespace {

std::uint16_t bits_of(_Float16 h) { return std::bit_cast<std::uint16_t>(h); }
_Float16 half_of(std::uint16_t bits) { return std::bit_cast<_Float16>(bits); }
bool is_nan16(std::uint16_t bits) { return (bits & 0x7C00) == 0x7C00 && (bits & 0x03FF) != 0; }

/// Tallies conversions and mismatches, keeps the first few for the failure
/// message, and prints the count seen even on a pass.
struct Tally {
  explicit Tally(const char* name) : what(name) {}
  const char* what;
  long checked = 0, mismatched = 0;
  std::string first;
  void add(bool ok, double input, unsigned got, unsigned want) {
    ++checked;
    if (ok) return;
    if (++mismatched <= 5) {
      char line[160];
      std::snprintf(line, sizeof line, "FAIL %s x=%a got=0x%04x want=0x%04x\n", what, input, got, want);
      first += line;
    }
  }
  ~Tally() { std::printf("%s: %ld conversions, %ld mismatched\n", what, checked, mismatched); }
};

/// Compares one float32 → binary16 conversion with the compiler's.
void check_float(Tally& tally, float f) {
  const std::uint16_t got = float_to_binary16(f);
  const std::uint16_t want = bits_of(static_cast<_Float16>(f));
  // NaN by class: both NaN (payload and quieting are not specified to match).
  const bool ok = std::isnan(f) ? is_nan16(got) && is_nan16(want) && ((got ^ want) & 0x8000) == 0 : got == want;
  tally.add(ok, f, got, want);
}

TEST(VsFloat16, AllPatternsToFloatAndBack) {
  Tally to_float{"binary16->float32"}, back{"float32->binary16 round trip"};
  for (std::uint32_t b = 0; b <= 0xFFFF; ++b) {
    const auto bits = static_cast<std::uint16_t>(b);
    const float got = binary16_to_float(bits);
    const float want = static_cast<float>(half_of(bits));
    if (is_nan16(bits)) {
      to_float.add(std::isnan(got) && std::signbit(got) == std::signbit(want), b, 0, 0);
      const std::uint16_t again = float_to_binary16(got);
      back.add(is_nan16(again) && (again & 0x8000) == (bits & 0x8000), got, again, bits);
    } else {
      to_float.add(std::bit_cast<std::uint32_t>(got) == std::bit_cast<std::uint32_t>(want), b,
                   std::bit_cast<std::uint32_t>(got) >> 16, std::bit_cast<std::uint32_t>(want) >> 16);
      back.add(float_to_binary16(got) == bits, got, float_to_binary16(got), bits);
    }
  }
  EXPECT_EQ(to_float.mismatched, 0) << to_float.first;
  EXPECT_EQ(back.mismatched, 0) << back.first;
}

TEST(VsFloat16, Float32SweepTiesAndEdges) {
  Tally tally{"float32->binary16"};
  // A stride through all 2^32 float32 patterns (prime, so every exponent and
  // low-bit pattern is visited): ~4.2 million values, NaNs and infinities included.
  for (std::uint64_t u = 0; u < (std::uint64_t{1} << 32); u += 1021) {
    check_float(tally, std::bit_cast<float>(static_cast<std::uint32_t>(u)));
  }
  // Every halfway point between neighbouring binary16 values (12 significant
  // bits, exact in float32), and the floats just either side of it.
  for (std::uint32_t b = 0; b < 0x7C00; ++b) {
    for (float sign : {1.0f, -1.0f}) {
      const float lo = binary16_to_float(static_cast<std::uint16_t>(b));
      const float hi = b + 1 == 0x7C00 ? 65536.0f : binary16_to_float(static_cast<std::uint16_t>(b + 1));
      const float mid = sign * (lo + (hi - lo) / 2);
      check_float(tally, mid);
      check_float(tally, std::nextafter(mid, 0.0f));
      check_float(tally, std::nextafter(mid, sign * 1e30f));
    }
  }
  // The subnormal range and its rim, [2^-26, 2^-13), densely.
  const auto first = std::bit_cast<std::uint32_t>(0x1p-26f), last = std::bit_cast<std::uint32_t>(0x1p-13f);
  for (std::uint32_t u = first; u < last; u += 37) check_float(tally, std::bit_cast<float>(u));
  // The overflow threshold: 65504 + 16 = 65520 rounds to infinity, below it to 65504.
  EXPECT_EQ(float_to_binary16(65520.0f), 0x7C00);
  EXPECT_EQ(float_to_binary16(std::nextafter(65520.0f, 0.0f)), 0x7BFF);
  EXPECT_EQ(bits_of(static_cast<_Float16>(std::nextafter(65520.0f, 0.0f))), 0x7BFF);
  for (float f = 65000.0f; f < 70000.0f; f = std::nextafter(f, 1e30f)) check_float(tally, f);
  EXPECT_EQ(tally.mismatched, 0) << tally.first;
}

// Rounding twice (double → float32 → binary16) goes wrong when the double sits
// just off a binary16 midpoint by less than half a float32 ulp: float32 rounds
// it onto the midpoint and the tie then breaks to even. A single rounding from
// double must follow the side the double is actually on.
TEST(VsFloat16, DoubleRoundsOnce) {
  Tally tally{"float64->binary16"};
  long double_rounding_traps = 0;
  for (std::uint32_t b = 0; b < 0x7C00; ++b) {
    const double lo = binary16_to_float(static_cast<std::uint16_t>(b));
    const double hi = b + 1 == 0x7C00 ? 65536.0 : binary16_to_float(static_cast<std::uint16_t>(b + 1));
    const double mid = lo + (hi - lo) / 2;
    for (double side : {1.0, -1.0}) {
      const double x = mid + side * (hi - lo) * 0x1p-30;  // far below float32's resolution at mid
      ASSERT_EQ(static_cast<double>(static_cast<float>(x)), mid);
      const std::uint16_t got = double_to_binary16(x);
      const std::uint16_t want = bits_of(static_cast<_Float16>(x));
      tally.add(got == want, x, got, want);
      // The answer from first principles: the side of the midpoint.
      const std::uint32_t nearest = side > 0 ? b + 1 : b;
      EXPECT_EQ(got, nearest) << std::hexfloat << x;
      if (float_to_binary16(static_cast<float>(x)) != nearest) ++double_rounding_traps;
      check_float(tally, static_cast<float>(-x));
    }
  }
  std::printf("double-rounding traps (float32 path would be wrong): %ld\n", double_rounding_traps);
  // Half the midpoints have an even lower neighbour, so about 0x7C00 traps exist.
  EXPECT_GT(double_rounding_traps, 0x7C00 / 2);
  EXPECT_EQ(tally.mismatched, 0) << tally.first;
}

TEST(VsFloat16, DoubleSweep) {
  Tally tally{"float64->binary16 sweep"};
  // Doubles across binary16's whole range and beyond, with full 52-bit
  // fractions (a fixed linear congruential sequence, reproducible).
  std::uint64_t state = 0x9E3779B97F4A7C15u;
  for (int i = 0; i < 400000; ++i) {
    state = state * 6364136223846793005u + 1442695040888963407u;
    const int exponent = static_cast<int>(state >> 58) - 34;  // 2^-34 … 2^29
    const double x = std::ldexp(1.0 + static_cast<double>(state & ((std::uint64_t{1} << 52) - 1)) * 0x1p-52,
                                exponent) * ((state >> 57) & 1 ? -1.0 : 1.0);
    const std::uint16_t got = double_to_binary16(x);
    const std::uint16_t want = bits_of(static_cast<_Float16>(x));
    tally.add(got == want, x, got, want);
  }
  EXPECT_EQ(tally.mismatched, 0) << tally.first;
}

// bfloat16 reference from the definition (see the banner).
constexpr int kBfEmin = -126, kBfFractionBits = 7;
const double kBfOverflow = std::ldexp(2.0 - std::ldexp(1.0, -8), 127);  // max + half an ulp

/// Returns: the bfloat16 value nearest to x, ties to even, as a double.
double reference_bfloat16(double x) {
  if (std::isnan(x) || std::isinf(x) || x == 0) return x;
  const double a = std::fabs(x);
  if (a >= kBfOverflow) return std::copysign(std::numeric_limits<double>::infinity(), x);
  int k = 0;
  std::frexp(a, &k);                                  // a = f·2^k, f ∈ [½, 1)
  const int e = std::max(k - 1, kBfEmin);             // the binade, clamped for subnormals
  const double quantum = std::ldexp(1.0, e - kBfFractionBits);
  const double n = a / quantum;                       // exact: a power-of-two scaling
  const double below = std::floor(n);
  const double rest = n - below;                      // exact: same binade
  double r = below;
  if (rest > 0.5 || (rest == 0.5 && std::fmod(below, 2.0) != 0)) r = below + 1;
  return std::copysign(r * quantum, x);
}

/// Returns: the value of a bfloat16 pattern from the definition.
double reference_bfloat16_value(std::uint16_t bits) {
  const int sign = bits >> 15, exponent = (bits >> 7) & 0xFF, fraction = bits & 0x7F;
  double v;
  if (exponent == 0xFF) v = fraction == 0 ? std::numeric_limits<double>::infinity() : std::nan("");
  else if (exponent == 0) v = std::ldexp(fraction, kBfEmin - kBfFractionBits);
  else v = std::ldexp(128 + fraction, exponent - 127 - kBfFractionBits);
  return sign ? -v : v;
}

void check_bfloat16(Tally& tally, double x) {
  const std::uint16_t got = double_to_bfloat16(x);
  if (std::isnan(x)) {
    tally.add((got & 0x7F80) == 0x7F80 && (got & 0x7F) != 0 && (got >> 15) == (std::signbit(x) ? 1 : 0), x, got, 0);
    return;
  }
  const double want = reference_bfloat16(x);
  const double value = bfloat16_to_float(got);
  const auto want_bits = static_cast<unsigned>(std::bit_cast<std::uint32_t>(static_cast<float>(want)) >> 16);
  tally.add(std::bit_cast<std::uint64_t>(value) == std::bit_cast<std::uint64_t>(want), x, got, want_bits);
  if (std::isfinite(x) && static_cast<double>(static_cast<float>(x)) == x) {
    tally.add(float_to_bfloat16(static_cast<float>(x)) == got, x, float_to_bfloat16(static_cast<float>(x)), got);
  }
}

TEST(VsDefinition, Bfloat16AllPatterns) {
  Tally tally{"bfloat16->float32 and back"};
  for (std::uint32_t b = 0; b <= 0xFFFF; ++b) {
    const auto bits = static_cast<std::uint16_t>(b);
    const float got = bfloat16_to_float(bits);
    const double want = reference_bfloat16_value(bits);
    if (std::isnan(want)) {
      const std::uint16_t again = float_to_bfloat16(got);
      tally.add(std::isnan(got) && std::signbit(got) == std::signbit(want) && (again & 0x7F80) == 0x7F80 &&
                    (again & 0x7F) != 0 && (again & 0x8000) == (bits & 0x8000),
                b, again, bits);
      continue;
    }
    tally.add(std::bit_cast<std::uint64_t>(static_cast<double>(got)) == std::bit_cast<std::uint64_t>(want), b, 0, 0);
    tally.add(float_to_bfloat16(got) == bits && double_to_bfloat16(want) == bits, want, float_to_bfloat16(got), bits);
  }
  EXPECT_EQ(tally.mismatched, 0) << tally.first;
}

TEST(VsDefinition, Bfloat16SweepTiesAndDoubleRounding) {
  Tally tally{"float32/float64->bfloat16"};
  for (std::uint64_t u = 0; u < (std::uint64_t{1} << 32); u += 4099) {
    check_bfloat16(tally, std::bit_cast<float>(static_cast<std::uint32_t>(u)));
  }
  long double_rounding_traps = 0;
  for (std::uint32_t b = 0; b < 0x7F80; ++b) {
    const double lo = reference_bfloat16_value(static_cast<std::uint16_t>(b));
    const double hi = b + 1 == 0x7F80 ? std::ldexp(1.0, 128) : reference_bfloat16_value(static_cast<std::uint16_t>(b + 1));
    const double mid = lo + (hi - lo) / 2;
    for (double x : {mid, std::nextafter(mid, 0.0), std::nextafter(mid, 1e300),
                     static_cast<double>(std::nextafter(static_cast<float>(mid), 0.0f)),
                     static_cast<double>(std::nextafter(static_cast<float>(mid), 1e30f)),
                     mid + (hi - lo) * 0x1p-40, mid - (hi - lo) * 0x1p-40, -mid, -(mid + (hi - lo) * 0x1p-40)}) {
      check_bfloat16(tally, x);
      if (double_to_bfloat16(x) != float_to_bfloat16(static_cast<float>(x))) ++double_rounding_traps;
    }
  }
  std::printf("bfloat16 double-rounding traps (float32 path would be wrong): %ld\n", double_rounding_traps);
  EXPECT_GT(double_rounding_traps, 0x7F80);  // the ±2^-40 offsets from every midpoint, half of them each way
  EXPECT_EQ(tally.mismatched, 0) << tally.first;
}

}  // namespace
}  // namespace headroom
