// headroom — the OCP 8-bit floating point formats E4M3 and E5M2, emulated.
//
// OCP 8-bit Floating Point Specification (OFP8), revision 1.0, 2023:
//   E4M3  sign, 4 exponent bits (bias 7), 3 fraction bits; no infinities; the
//         only NaNs are S.1111.111 (0x7F, 0xFF); largest finite 448
//         (S.1111.110), smallest normal 2^-6, smallest subnormal 2^-9.
//   E5M2  sign, 5 exponent bits (bias 15), 2 fraction bits, IEEE 754-like:
//         infinities S.11111.00, NaNs S.11111.{01,10,11}; largest finite 57344,
//         smallest normal 2^-14, smallest subnormal 2^-16.
// Storage is the 8-bit pattern. Conversion from double or float rounds to
// nearest, ties to even, once (working on the value, never through an
// intermediate format), with gradual underflow and signed zero kept.
// Overflow: the value is first rounded with an unbounded exponent; a result
// above the largest finite value then becomes
//   non-saturating (OFP8's default): NaN (E4M3, which has no infinity) or
//     ±infinity (E5M2), as IEEE 754 round-to-nearest prescribes;
//   saturating (OFP8's saturation mode): ±largest finite; ±infinity inputs
//     saturate too (as NVIDIA PTX `cvt ... .satfinite` does; from memory).
// NaN inputs give NaN in both modes (E4M3 0x7F/0xFF, E5M2 0x7E/0xFE, sign kept).
// So E4M3 values in (448, 464] round to 448 (464 is the tie between 448 and the
// unbounded successor 480, whose last fraction bit is odd), and E5M2 values at
// or above 61440 (the tie between 57344 and 65536, which is even) overflow.
// Decoding is exact in float and double.
#pragma once

#include <cstdint>

namespace headroom {

enum class Fp8Kind : unsigned char { e4m3, e5m2 };

/// OFP8 rev 1.0 parameters.
inline constexpr double kE4m3Max = 448.0;
inline constexpr double kE4m3MinNormal = 0x1p-6;
inline constexpr double kE4m3MinSubnormal = 0x1p-9;
inline constexpr double kE5m2Max = 57344.0;
inline constexpr double kE5m2MinNormal = 0x1p-14;
inline constexpr double kE5m2MinSubnormal = 0x1p-16;

/// Returns: the largest finite value of the kind (448 or 57344).
double fp8_max(Fp8Kind k);
/// Returns: the unit roundoff 2^-p (E4M3 p = 4: 2^-4; E5M2 p = 3: 2^-3).
double fp8_unit_roundoff(Fp8Kind k);

/// Returns: the pattern nearest to `x` (ties to even), rounded once; overflow
/// as described above for `saturating`. Error: exact rounding, |result − x| ≤
/// u·|x| (u = fp8_unit_roundoff) in the normal range, ≤ half the smallest
/// subnormal below it.
std::uint8_t double_to_fp8(double x, Fp8Kind k, bool saturating);
/// Returns: as double_to_fp8; float → double is exact, so still one rounding.
std::uint8_t float_to_fp8(float x, Fp8Kind k, bool saturating);
/// Returns: the value of pattern `bits`, exactly (NaN for NaN patterns,
/// ±infinity for E5M2's infinities).
double fp8_to_double(std::uint8_t bits, Fp8Kind k);
/// Returns: fp8_to_double as float (exact).
float fp8_to_float(std::uint8_t bits, Fp8Kind k);
/// Returns: `x` rounded to the nearest value of the kind, read back (one rounding).
double round_to_fp8(double x, Fp8Kind k, bool saturating);

}  // namespace headroom
