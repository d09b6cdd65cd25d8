// headroom — E4M3 and E5M2 (fp8.h) against a reference written from the OCP
// 8-bit Floating Point Specification (OFP8), revision 1.0, 2023.
//
// The reference shares no code path with the harness: it lists every finite
// value of a format from the definition (sign, exponent field E, fraction M:
// normal (1 + M/2^t)·2^(E − bias), subnormal (M/2^t)·2^(1 − bias), E4M3's
// S.1111.111 NaN and E5M2's all-ones exponent excluded) with std::pow, and
// rounds by brute force: the nearest listed value, a tie going to the one whose
// last fraction bit is 0 (IEEE 754-2019 §4.3.1 roundTiesToEven). Overflow is
// decided as IEEE 754 §4.3.1 says for an unbounded exponent: the successor of
// the largest finite value (E4M3 480 = 1.111·2^8, odd; E5M2 65536 = 1.00·2^16,
// even) takes part in the rounding, and a value rounding to it (or beyond it)
// overflows.
//
// Outside check: no Debian package provides these formats (apt-cache search
// ml-dtypes finds nothing; python3-torch is 1.13, which has no float8 dtypes;
// GCC 12 and clang 16 have no 8-bit float type). What the compiler does provide
// — _Float16, whose high byte is E5M2, and correctly rounded float32 addition —
// is used in tests/external/formats_fp8_vs_compiler_test.cpp.
#include <gtest/gtest.h>

#include <cmath>
#include <cstdint>
#include <cstdio>
#include <limits>
#include <string>
#include <vector>

#include "headroom/fp8.h"

namespace headroom {
namespace {

struct Spec {
  Fp8Kind kind;
  const char* name;
  int t;     // fraction bits
  int bias;
  bool ieee_top;  // E5M2: all-ones exponent is inf/NaN; E4M3: only S.1111.111 is NaN
};

constexpr Spec kE4m3Spec{Fp8Kind::e4m3, "E4M3", 3, 7, false};
constexpr Spec kE5m2Spec{Fp8Kind::e5m2, "E5M2", 2, 15, true};

bool spec_is_nan(const Spec& s, unsigned code) {
  const unsigned mag = code & 0x7F;
  if (!s.ieee_top) return mag == 0x7F;
  return (mag >> s.t) == 0x1F && (mag & ((1u << s.t) - 1)) != 0;
}
bool spec_is_inf(const Spec& s, unsigned code) { return s.ieee_top && (code & 0x7F) == 0x7C; }

// The value of a code, from the definition.
double spec_value(const Spec& s, unsigned code) {
  const unsigned mag = code & 0x7F;
  const unsigned E = mag >> s.t;
  const unsigned M = mag & ((1u << s.t) - 1);
  const double sign = (code & 0x80) ? -1.0 : 1.0;
  const double frac = static_cast<double>(M) / std::pow(2.0, s.t);
  if (E == 0) return sign * frac * std::pow(2.0, 1 - s.bias);
  return sign * (1.0 + frac) * std::pow(2.0, static_cast<int>(E) - s.bias);
}

struct Candidate {
  double value;
  unsigned code;  // 0x100: the overflow successor
  bool even;
};

// Non-negative finite values plus the unbounded successor of the largest.
std::vector<Candidate> spec_candidates(const Spec& s) {
  std::vector<Candidate> out;
  double largest = 0;
  for (unsigned code = 0; code < 0x80; ++code) {
    if (spec_is_nan(s, code) || spec_is_inf(s, code)) continue;
    out.push_back({spec_value(s, code), code, (code & 1u) == 0});
    largest = std::max(largest, spec_value(s, code));
  }
  // Successor with an unbounded exponent: one ulp of the top binade above the largest.
  const double ulp = std::pow(2.0, std::floor(std::log2(largest)) - s.t);
  const double successor = largest + ulp;
  const double top_binade = std::pow(2.0, std::floor(std::log2(successor)));
  const auto fraction = static_cast<long>((successor / top_binade - 1.0) * std::pow(2.0, s.t));
  out.push_back({successor, 0x100, fraction % 2 == 0});
  return out;
}

// The reference conversion. Returns the code, or for overflow the format's
// answer in the mode asked.
unsigned spec_round(const Spec& s, const std::vector<Candidate>& cands, double x, bool saturating) {
  const unsigned sign = std::signbit(x) ? 0x80u : 0u;
  const unsigned overflow = saturating ? (s.ieee_top ? 0x7Bu : 0x7Eu) : (s.ieee_top ? 0x7Cu : 0x7Fu);
  if (std::isnan(x)) return sign | (s.ieee_top ? 0x7Eu : 0x7Fu);
  const double a = std::fabs(x);
  if (std::isinf(a) || a > cands.back().value) return sign | overflow;
  const Candidate* best = &cands[0];
  for (const Candidate& c : cands) {
    const double d = std::fabs(a - c.value), db = std::fabs(a - best->value);
    if (d < db || (d == db && c.even && !best->even)) best = &c;
  }
  if (best->code == 0x100) return sign | overflow;
  return sign | best->code;
}

struct Tally {
  long checked = 0, mismatched = 0;
  std::string first;
  void add(bool ok, double x, unsigned got, unsigned want, const char* what) {
    ++checked;
    if (ok) return;
    if (++mismatched <= 5) {
      char line[160];
      std::snprintf(line, sizeof line, "FAIL %s x=%a got=0x%02X want=0x%02X\n", what, x, got, want);
      first += line;
    }
  }
};

class Fp8Exhaustive : public ::testing::TestWithParam<Spec> {};

// All 256 codes decode to the definition's value (NaN codes to NaN, E5M2's
// infinities to infinity), and every non-NaN code encodes back to itself in
// both modes.
TEST_P(Fp8Exhaustive, EveryCodeBothWays) {
  const Spec s = GetParam();
  Tally t;
  for (unsigned code = 0; code < 256; ++code) {
    const double got = fp8_to_double(static_cast<std::uint8_t>(code), s.kind);
    if (spec_is_nan(s, code)) {
      t.add(std::isnan(got) && std::signbit(got) == ((code & 0x80) != 0), got, code, code, "decode-nan");
      continue;
    }
    const double want = spec_is_inf(s, code) ? ((code & 0x80) ? -INFINITY : INFINITY) : spec_value(s, code);
    t.add(got == want && std::signbit(got) == std::signbit(want), want, code, code, "decode");
    t.add(static_cast<double>(fp8_to_float(static_cast<std::uint8_t>(code), s.kind)) == want, want, code, code, "decode-float");
    if (spec_is_inf(s, code)) continue;  // saturating maps inf to max: checked below
    for (bool sat : {false, true}) {
      const unsigned back = double_to_fp8(want, s.kind, sat);
      t.add(back == code, want, back, code, sat ? "encode-sat" : "encode");
      const unsigned back_f = float_to_fp8(static_cast<float>(want), s.kind, sat);
      t.add(back_f == code, want, back_f, code, "encode-float");
    }
  }
  std::printf("[%s] codes checked both ways: %ld conversions, %ld mismatches\n", s.name, t.checked, t.mismatched);
  EXPECT_EQ(t.mismatched, 0) << t.first;
}

// Every halfway point between neighbouring values (including 0 and the
// smallest subnormal, and the largest finite value and its unbounded
// successor), and the float32 values one ulp either side of each, both signs,
// both modes; and the doubles one ulp either side, which a conversion through
// float32 would round twice.
TEST_P(Fp8Exhaustive, EveryHalfwayPointAndItsNeighbours) {
  const Spec s = GetParam();
  const std::vector<Candidate> cands = spec_candidates(s);
  Tally t;
  long halfway = 0;
  for (std::size_t i = 0; i + 1 < cands.size(); ++i) {
    const double mid = (cands[i].value + cands[i + 1].value) / 2;  // exact: a few bits
    ++halfway;
    const float midf = static_cast<float>(mid);
    ASSERT_EQ(static_cast<double>(midf), mid);
    const float floats[] = {midf, std::nextafter(midf, 0.0f), std::nextafter(midf, INFINITY)};
    const double doubles[] = {std::nextafter(mid, 0.0), std::nextafter(mid, INFINITY)};
    for (double sign : {1.0, -1.0}) {
      for (bool sat : {false, true}) {
        for (float f : floats) {
          const float x = static_cast<float>(sign) * f;
          const unsigned want = spec_round(s, cands, x, sat);
          const unsigned got = float_to_fp8(x, s.kind, sat);
          t.add(got == want, x, got, want, sat ? "float-sat" : "float");
          const unsigned got_d = double_to_fp8(static_cast<double>(x), s.kind, sat);
          t.add(got_d == want, x, got_d, want, sat ? "double-sat" : "double");
        }
        for (double d : doubles) {
          const double x = sign * d;
          const unsigned want = spec_round(s, cands, x, sat);
          const unsigned got = double_to_fp8(x, s.kind, sat);
          t.add(got == want, x, got, want, sat ? "double-ulp-sat" : "double-ulp");
        }
      }
    }
  }
  std::printf("[%s] %ld halfway points, %ld conversions, %ld mismatches\n", s.name, halfway, t.checked, t.mismatched);
  EXPECT_EQ(t.mismatched, 0) << t.first;
  EXPECT_EQ(halfway, s.kind == Fp8Kind::e4m3 ? 127 : 124);
}

// Non-finite inputs and far-out values, from the specification's text.
TEST_P(Fp8Exhaustive, SpecialsAndFarValues) {
  const Spec s = GetParam();
  const std::vector<Candidate> cands = spec_candidates(s);
  const double inputs[] = {0.0, -0.0, INFINITY, -INFINITY, std::numeric_limits<double>::quiet_NaN(),
                           -std::numeric_limits<double>::quiet_NaN(), 1e300, -1e300, 1e-300, -1e-300,
                           std::numeric_limits<double>::denorm_min(), 5e5, 1e5, 7e4, 6e4, 500, 470, 460};
  Tally t;
  for (double x : inputs)
    for (bool sat : {false, true}) {
      const unsigned want = spec_round(s, cands, x, sat);
      const unsigned got = double_to_fp8(x, s.kind, sat);
      t.add(got == want, x, got, want, sat ? "sat" : "plain");
    }
  EXPECT_EQ(t.mismatched, 0) << t.first;
}

INSTANTIATE_TEST_SUITE_P(Ofp8, Fp8Exhaustive, ::testing::Values(kE4m3Spec, kE5m2Spec),
                         [](const auto& info) { return std::string(info.param.name); });

// OFP8 rev 1.0 Table 1 figures, stated in the specification's own numbers.
TEST(Fp8, SpecificationTable) {
  EXPECT_EQ(fp8_to_double(0x7E, Fp8Kind::e4m3), 448.0);
  EXPECT_EQ(fp8_to_double(0x08, Fp8Kind::e4m3), 0x1p-6);
  EXPECT_EQ(fp8_to_double(0x01, Fp8Kind::e4m3), 0x1p-9);
  EXPECT_EQ(fp8_to_double(0x07, Fp8Kind::e4m3), 0.875 * 0x1p-6);
  EXPECT_TRUE(std::isnan(fp8_to_double(0x7F, Fp8Kind::e4m3)));
  EXPECT_EQ(fp8_to_double(0x7B, Fp8Kind::e5m2), 57344.0);
  EXPECT_EQ(fp8_to_double(0x04, Fp8Kind::e5m2), 0x1p-14);
  EXPECT_EQ(fp8_to_double(0x01, Fp8Kind::e5m2), 0x1p-16);
  EXPECT_EQ(fp8_to_double(0x7C, Fp8Kind::e5m2), INFINITY);
  EXPECT_EQ(fp8_to_double(0xFC, Fp8Kind::e5m2), -INFINITY);
  EXPECT_EQ(kE4m3Max, 448.0);
  EXPECT_EQ(kE5m2Max, 57344.0);
  // The overflow thresholds derived in fp8.h.
  EXPECT_EQ(double_to_fp8(464.0, Fp8Kind::e4m3, false), 0x7E);
  EXPECT_EQ(double_to_fp8(std::nextafter(464.0, 1e9), Fp8Kind::e4m3, false), 0x7F);
  EXPECT_EQ(double_to_fp8(std::nextafter(464.0, 1e9), Fp8Kind::e4m3, true), 0x7E);
  EXPECT_EQ(double_to_fp8(-1e6, Fp8Kind::e4m3, true), 0xFE);
  EXPECT_EQ(double_to_fp8(61440.0, Fp8Kind::e5m2, false), 0x7C);
  EXPECT_EQ(double_to_fp8(std::nextafter(61440.0, 0.0), Fp8Kind::e5m2, false), 0x7B);
  EXPECT_EQ(double_to_fp8(61440.0, Fp8Kind::e5m2, true), 0x7B);
  EXPECT_EQ(double_to_fp8(INFINITY, Fp8Kind::e5m2, true), 0x7B);
  EXPECT_EQ(double_to_fp8(-INFINITY, Fp8Kind::e5m2, false), 0xFC);
  EXPECT_EQ(fp8_unit_roundoff(Fp8Kind::e4m3), 0x1p-4);
  EXPECT_EQ(fp8_unit_roundoff(Fp8Kind::e5m2), 0x1p-3);
}

}  // namespace
}  // namespace headroom
