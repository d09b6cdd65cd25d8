// headroom — binary16 (IEEE 754-2019 half precision) and bfloat16, emulated.
//
// Storage is the 16-bit pattern. Conversion from float32/float64 rounds to
// nearest, ties to even, with gradual underflow to subnormals, overflow to
// infinity, signed zero kept and NaN kept NaN (quieted, sign kept). Conversion
// to float32 is exact. One arithmetic operation done in float32 on converted
// values and rounded once to binary16 or bfloat16 is correctly rounded, since
// 24 ≥ 2·11 + 2 (Figueroa, 1995: double rounding is innocuous when p' ≥ 2p + 2).
#pragma once

#include <cstdint>

namespace headroom {

/// IEEE 754-2019 binary16 parameters (Table 3.5): p = 11, emax = 15.
inline constexpr double kBinary16Max = 65504.0;
inline constexpr double kBinary16MinNormal = 0x1p-14;
inline constexpr double kBinary16MinSubnormal = 0x1p-24;
inline constexpr double kBinary16Epsilon = 0x1p-10;

/// Returns: the binary16 pattern nearest to `x` (ties to even). Error: exact
/// rounding, |result − x| ≤ 2^-11·|x| in the normal range.
std::uint16_t float_to_binary16(float x);
/// Returns: the binary16 pattern nearest to `x`, rounded once from double.
std::uint16_t double_to_binary16(double x);
/// Returns: the value of a binary16 pattern, exactly.
float binary16_to_float(std::uint16_t bits);

/// Returns: the bfloat16 pattern nearest to `x` (ties to even): the upper 16
/// bits of float32 after rounding; subnormals, infinities and NaN as float32.
std::uint16_t float_to_bfloat16(float x);
/// Returns: the bfloat16 pattern nearest to `x`, rounded once from double.
std::uint16_t double_to_bfloat16(double x);
/// Returns: the value of a bfloat16 pattern, exactly.
float bfloat16_to_float(std::uint16_t bits);

}  // namespace headroom
