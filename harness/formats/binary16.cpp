// headroom — binary16 and bfloat16 conversions, by integer arithmetic on the bits.
//
// Both formats are IEEE-style (sign, biased exponent, fraction with a hidden
// bit), so one routine rounds a binary64 value to either: it works on the 53-bit
// integer significand and drops the low bits with round-to-nearest-even. Working
// from the double's bits rounds exactly once; going through float32 first could
// round twice (a double just above a binary16 midpoint can round down onto the
// midpoint in float32, and the tie then goes to even — the wrong way). float32
// inputs widen to double exactly, so they take the same single-rounding path.
#include "headroom/binary16.h"

#include <bit>
#include <cstdint>

namespace headroom {
namespace {

/// An IEEE-style 16-bit format: `fraction_bits` stored fraction bits, the rest
/// (after the sign) exponent bits.
struct Layout16 {
  int fraction_bits;  ///< t: 10 for binary16, 7 for bfloat16
  int exponent_bits;  ///< 5 for binary16, 8 for bfloat16
};

constexpr Layout16 kBinary16Layout{10, 5};
constexpr Layout16 kBfloat16Layout{7, 8};

constexpr int kDoubleFractionBits = 52;
constexpr int kDoubleBias = 1023;

/// Returns: the pattern of `layout` nearest to `x` (ties to even), overflow to
/// ±infinity, NaN quieted with sign and the leading payload bits kept.
std::uint16_t round_double_to_16(double x, Layout16 layout) {
  const std::uint64_t bits = std::bit_cast<std::uint64_t>(x);
  const auto sign = static_cast<std::uint16_t>((bits >> 48) & 0x8000u);
  const int raw_exponent = static_cast<int>((bits >> kDoubleFractionBits) & 0x7FFu);
  const std::uint64_t fraction = bits & ((std::uint64_t{1} << kDoubleFractionBits) - 1);

  const int t = layout.fraction_bits;
  const std::uint32_t exponent_all_ones = (1u << layout.exponent_bits) - 1;
  const std::uint32_t infinity = exponent_all_ones << t;

  if (raw_exponent == 0x7FF) {
    if (fraction == 0) return static_cast<std::uint16_t>(sign | infinity);
    // NaN: keep the leading payload bits (as hardware narrowing does) and set
    // the quiet bit, so a NaN never turns into an infinity.
    const auto payload = static_cast<std::uint32_t>(fraction >> (kDoubleFractionBits - t));
    const std::uint32_t quiet = 1u << (t - 1);
    return static_cast<std::uint16_t>(sign | infinity | quiet | payload);
  }
  // Zero and binary64 subnormals (|x| < 2^-1022): both targets' smallest
  // subnormal halves (2^-25, 2^-134) are far larger, so these round to ±0.
  if (raw_exponent == 0) return sign;

  const int bias = (1 << (layout.exponent_bits - 1)) - 1;
  const int emin = 1 - bias;
  const int exponent = raw_exponent - kDoubleBias;  // x = m · 2^(exponent − 52)
  const std::uint64_t significand = fraction | (std::uint64_t{1} << kDoubleFractionBits);

  // Bits to drop so that one unit of the kept integer is the target's quantum:
  // 2^(exponent − t) in the normal range, 2^(emin − t) below it (gradual underflow).
  int shift = kDoubleFractionBits - t;
  if (exponent < emin) shift += emin - exponent;
  // Past 54 the significand (< 2^53) is below half a quantum: it rounds to 0.
  // Clamping keeps the shifts defined and gives the same answer.
  if (shift > 60) shift = 60;

  std::uint64_t kept = significand >> shift;
  const std::uint64_t rest = significand & ((std::uint64_t{1} << shift) - 1);
  const std::uint64_t half = std::uint64_t{1} << (shift - 1);
  if (rest > half || (rest == half && (kept & 1u) != 0)) ++kept;

  if (exponent < emin) {
    // Subnormal: the pattern is the kept integer itself; rounding up to 2^t
    // lands exactly on the smallest normal's pattern (biased exponent 1).
    return static_cast<std::uint16_t>(sign | kept);
  }
  // Normal: kept ∈ [2^t, 2^(t+1)]. Adding it to (biased exponent − 1) << t
  // places the hidden bit into the exponent field, so a carry out of the
  // fraction (kept = 2^(t+1)) bumps the exponent by itself.
  const std::uint64_t biased_minus_one = static_cast<std::uint64_t>(exponent + bias - 1);
  const std::uint64_t magnitude = (biased_minus_one << t) + kept;
  if (magnitude >= infinity) return static_cast<std::uint16_t>(sign | infinity);
  return static_cast<std::uint16_t>(sign | magnitude);
}

}  // namespace

std::uint16_t double_to_binary16(double x) { return round_double_to_16(x, kBinary16Layout); }

// float → double is exact, so this is still one rounding.
std::uint16_t float_to_binary16(float x) { return round_double_to_16(static_cast<double>(x), kBinary16Layout); }

float binary16_to_float(std::uint16_t bits) {
  const std::uint32_t sign = static_cast<std::uint32_t>(bits & 0x8000u) << 16;
  const std::uint32_t exponent = (bits >> 10) & 0x1Fu;
  const std::uint32_t fraction = bits & 0x3FFu;
  if (exponent == 0x1F) {
    // Infinity or NaN: the payload moves up unchanged (no quieting), so the
    // conversion is exact even for signalling NaNs.
    return std::bit_cast<float>(sign | 0x7F800000u | (fraction << 13));
  }
  if (exponent == 0) {
    // Zero or subnormal: fraction · 2^-24, at most 10 bits, exact in float32.
    const float magnitude = static_cast<float>(fraction) * 0x1p-24f;
    return std::bit_cast<float>(sign | std::bit_cast<std::uint32_t>(magnitude));
  }
  // Normal: rebias the exponent (15 → 127) and widen the fraction.
  return std::bit_cast<float>(sign | ((exponent + 127 - 15) << 23) | (fraction << 13));
}

std::uint16_t double_to_bfloat16(double x) { return round_double_to_16(x, kBfloat16Layout); }

std::uint16_t float_to_bfloat16(float x) { return round_double_to_16(static_cast<double>(x), kBfloat16Layout); }

// bfloat16 is the upper half of a float32 pattern: widening is a shift.
float bfloat16_to_float(std::uint16_t bits) { return std::bit_cast<float>(static_cast<std::uint32_t>(bits) << 16); }

}  // namespace headroom
