// headroom — E4M3 and E5M2 (fp8.h) against what the compiler provides.
//
// No compiler or Debian package here provides the 8-bit floats themselves
// (looked at, Debian bookworm: GCC 12 and clang 14/16 have no 8-bit float type;
// python3-numpy 1.24.2 has no float8 dtype; python3-torch 1.13.1 has none either —
// `/usr/bin/python3 -c "import torch; print(hasattr(torch, 'float8_e4m3fn'))"`
// prints False, its float8 dtypes came with PyTorch 2.1, from memory;
// libdnnl2 is oneDNN 2.6.3, whose f8 types came in 3.x, from memory;
// `apt-cache search` for float8, fp8, e4m3 and ml-dtypes finds nothing). So
// this file checks the conversions against two things the compiler does
// provide, sharing no code path with fp8.cpp:
//  * GCC's _Float16 (IEEE 754-2019 binary16): an E5M2 pattern is the high
//    byte of the binary16 pattern of the same value (OFP8 rev 1.0 §4.2: E5M2
//    keeps binary16's exponent, bias 15, and its infinities and NaNs), so every
//    E5M2 code must decode to the _Float16 whose bits are code << 8.
//  * float32 addition, correctly rounded to nearest-even by the machine: for
//    |x| in [2^e, 2^(e+1)) (e at least the format's emin), (|x| + C) − C with
//    C = 2^(e − t + 23) rounds |x| to a multiple of 2^(e − t) — t fraction
//    bits — ties to even, once, and the subtraction is exact (the classic
//    add-a-constant rounding; the sum stays in C's binade). Values that round
//    past the largest finite value overflow (IEEE 754 §4.3.1 with an unbounded
//    exponent): NaN for E4M3 and infinity for E5M2 when not saturating, the
//    largest finite value when saturating (OFP8 rev 1.0 §5).
// Every finite binary16 value is converted: they include every halfway point
// between neighbouring E4M3 or E5M2 values (5 and 4 significant bits; the
// subnormal halfway points are multiples of 2^-10 and 2^-17) and the binary16
// neighbours on both sides of each.
#include <gtest/gtest.h>

#include <algorithm>
#include <bit>
#include <cfenv>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <string>

#include "headroom/fp8.h"

namespace headroom {
namespace {

struct Layout {
  Fp8Kind kind;
  const char* name;
  int t;       // fraction bits
  int emin;    // exponent of the smallest normal
  double max;  // largest finite value
};

constexpr Layout kE4m3{Fp8Kind::e4m3, "E4M3", 3, -6, 448.0};
constexpr Layout kE5m2{Fp8Kind::e5m2, "E5M2", 2, -14, 57344.0};

// x rounded to the format by float32 addition (see the banner); ±max, NaN or
// ±infinity past the largest finite value.
double compiler_rounded(float x, const Layout& f, bool saturating) {
  const float a = std::fabs(x);
  if (a == 0.0f) return x;
  const int e = std::max(std::ilogb(a), f.emin);
  const volatile float c = std::ldexp(1.0f, e - f.t + 23);  // volatile: the sum must be rounded, not folded
  const volatile float sum = a + c;
  const float r = sum - c;
  if (r > f.max) {
    if (saturating) return std::copysign(f.max, x);
    return f.kind == Fp8Kind::e4m3 ? std::nan("") : std::copysign(INFINITY, x);
  }
  return std::copysign(static_cast<double>(r), x);
}

bool same(double a, double b) {
  if (std::isnan(a) || std::isnan(b)) return std::isnan(a) && std::isnan(b);
  return a == b && std::signbit(a) == std::signbit(b);
}

TEST(Fp8VsCompiler, E5m2PatternsAreTheHighByteOfFloat16) {
  long mismatched = 0;
  for (unsigned code = 0; code < 256; ++code) {
    const double want = static_cast<double>(std::bit_cast<_Float16>(static_cast<std::uint16_t>(code << 8)));
    const double got = fp8_to_double(static_cast<std::uint8_t>(code), Fp8Kind::e5m2);
    if (!same(got, want)) {
      ++mismatched;
      ADD_FAILURE() << "FAIL E5M2 decode code=0x" << std::hex << code << " got=" << got << " want=" << want;
    }
  }
  std::printf("E5M2 decode vs _Float16: 256 codes, %ld mismatched\n", mismatched);
}

TEST(Fp8VsCompiler, EveryFloat16ValueRoundsAsFloat32AdditionRounds) {
  ASSERT_EQ(std::fegetround(), FE_TONEAREST);
  for (const Layout& f : {kE4m3, kE5m2})
    for (bool saturating : {false, true}) {
      long checked = 0, mismatched = 0;
      for (unsigned bits = 0; bits < 0x10000; ++bits) {
        const _Float16 h = std::bit_cast<_Float16>(static_cast<std::uint16_t>(bits));
        const float x = static_cast<float>(h);
        if (!std::isfinite(x)) continue;
        const double want = compiler_rounded(x, f, saturating);
        const double from_float = fp8_to_double(float_to_fp8(x, f.kind, saturating), f.kind);
        const double from_double = fp8_to_double(double_to_fp8(static_cast<double>(x), f.kind, saturating), f.kind);
        ++checked;
        if (same(from_float, want) && same(from_double, want)) continue;
        if (++mismatched <= 5)
          ADD_FAILURE() << "FAIL " << f.name << (saturating ? " saturating" : "") << " x=" << std::hexfloat << x
                        << " float path=" << from_float << " double path=" << from_double << " want=" << want;
      }
      std::printf("%s %s vs float32 addition: %ld binary16 values, %ld mismatched\n", f.name,
                  saturating ? "saturating" : "non-saturating", checked, mismatched);
      EXPECT_EQ(mismatched, 0);
      EXPECT_EQ(checked, 63488);  // 2^16 patterns less 2·1024 with the all-ones exponent
    }
}

}  // namespace
}  // namespace headroom
