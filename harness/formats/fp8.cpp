// headroom — E4M3 and E5M2 conversions by integer arithmetic on the bits (fp8.h).
//
// Like binary16.cpp: take the binary64 significand as a 53-bit integer, drop the
// low bits with round-to-nearest-even so one unit of what is kept is the
// target's quantum (2^(e − t) in the normal range, 2^(emin − t) below it), and
// place the result. Working from the double rounds exactly once. The only
// departure from IEEE is E4M3's top: its exponent field 1111 holds normal
// numbers (256 … 448) and one NaN, so "too large" is decided on the magnitude
// of the rounded pattern, not on an all-ones exponent.
#include "headroom/fp8.h"

#include <bit>
#include <cmath>
#include <cstdint>
#include <limits>

namespace headroom {
namespace {

struct Layout8 {
  int fraction_bits;       ///< t: 3 for E4M3, 2 for E5M2
  int exponent_bits;       ///< 4 or 5
  std::uint8_t max_bits;   ///< pattern of the largest finite value
  std::uint8_t overflow;   ///< pattern of a non-saturating overflow (NaN or infinity)
  std::uint8_t nan;        ///< the quiet NaN produced (sign added)
};

constexpr Layout8 kE4m3{3, 4, 0x7E, 0x7F, 0x7F};
constexpr Layout8 kE5m2{2, 5, 0x7B, 0x7C, 0x7E};

constexpr int kDoubleFractionBits = 52;
constexpr int kDoubleBias = 1023;

const Layout8& layout_of(Fp8Kind k) { return k == Fp8Kind::e4m3 ? kE4m3 : kE5m2; }

std::uint8_t round_double_to_8(double x, const Layout8& L, bool saturating) {
  const std::uint64_t bits = std::bit_cast<std::uint64_t>(x);
  const auto sign = static_cast<std::uint8_t>((bits >> 56) & 0x80u);
  const int raw_exponent = static_cast<int>((bits >> kDoubleFractionBits) & 0x7FFu);
  const std::uint64_t fraction = bits & ((std::uint64_t{1} << kDoubleFractionBits) - 1);
  const std::uint8_t too_large = saturating ? L.max_bits : L.overflow;

  if (raw_exponent == 0x7FF) {
    if (fraction != 0) return static_cast<std::uint8_t>(sign | L.nan);
    return static_cast<std::uint8_t>(sign | too_large);  // ±inf: E5M2 inf, E4M3 NaN, or saturated
  }
  // Zero and binary64 subnormals: far below half the smallest fp8 subnormal.
  if (raw_exponent == 0) return sign;

  const int t = L.fraction_bits;
  const int bias = (1 << (L.exponent_bits - 1)) - 1;
  const int emin = 1 - bias;
  const int exponent = raw_exponent - kDoubleBias;
  const std::uint64_t significand = fraction | (std::uint64_t{1} << kDoubleFractionBits);

  int shift = kDoubleFractionBits - t;
  if (exponent < emin) shift += emin - exponent;
  if (shift > 60) shift = 60;  // below half a quantum either way: rounds to 0

  std::uint64_t kept = significand >> shift;
  const std::uint64_t rest = significand & ((std::uint64_t{1} << shift) - 1);
  const std::uint64_t half = std::uint64_t{1} << (shift - 1);
  if (rest > half || (rest == half && (kept & 1u) != 0)) ++kept;

  if (exponent < emin) return static_cast<std::uint8_t>(sign | kept);  // subnormal (or the smallest normal)
  // Far above the range: no fp8 pattern; avoid overflowing the arithmetic below.
  if (exponent > bias + 1) return static_cast<std::uint8_t>(sign | too_large);
  // Normal: kept ∈ [2^t, 2^(t+1)]; the hidden bit carries into the exponent field.
  const std::uint64_t magnitude = (static_cast<std::uint64_t>(exponent + bias - 1) << t) + kept;
  if (magnitude > L.max_bits) return static_cast<std::uint8_t>(sign | too_large);
  return static_cast<std::uint8_t>(sign | magnitude);
}

}  // namespace

double fp8_max(Fp8Kind k) { return k == Fp8Kind::e4m3 ? kE4m3Max : kE5m2Max; }

double fp8_unit_roundoff(Fp8Kind k) { return k == Fp8Kind::e4m3 ? 0x1p-4 : 0x1p-3; }

std::uint8_t double_to_fp8(double x, Fp8Kind k, bool saturating) {
  return round_double_to_8(x, layout_of(k), saturating);
}

std::uint8_t float_to_fp8(float x, Fp8Kind k, bool saturating) {
  return round_double_to_8(static_cast<double>(x), layout_of(k), saturating);
}

double fp8_to_double(std::uint8_t bits, Fp8Kind k) {
  const Layout8& L = layout_of(k);
  const double sign = (bits & 0x80u) != 0 ? -1.0 : 1.0;
  const unsigned magnitude = bits & 0x7Fu;
  const int t = L.fraction_bits;
  const unsigned exponent = magnitude >> t;
  const unsigned fraction = magnitude & ((1u << t) - 1);
  const int bias = (1 << (L.exponent_bits - 1)) - 1;
  constexpr double kNan = std::numeric_limits<double>::quiet_NaN();
  constexpr double kInf = std::numeric_limits<double>::infinity();
  if (k == Fp8Kind::e4m3 && magnitude == 0x7F) return std::copysign(kNan, sign);
  if (k == Fp8Kind::e5m2 && exponent == 0x1F) return std::copysign(fraction == 0 ? kInf : kNan, sign);
  // fraction · 2^(emin − t) for subnormals, (2^t + fraction) · 2^(e − bias − t)
  // otherwise: a few bits times a power of two, exact in double.
  const int e = exponent == 0 ? 1 - bias : static_cast<int>(exponent) - bias;
  const double integer = exponent == 0 ? fraction : static_cast<double>((1u << t) + fraction);
  return sign * std::ldexp(integer, e - t);
}

float fp8_to_float(std::uint8_t bits, Fp8Kind k) { return static_cast<float>(fp8_to_double(bits, k)); }

double round_to_fp8(double x, Fp8Kind k, bool saturating) {
  return fp8_to_double(double_to_fp8(x, k, saturating), k);
}

}  // namespace headroom
