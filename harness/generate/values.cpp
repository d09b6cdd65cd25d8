// headroom — counter-based value streams (see values.h).
#include "values.h"

#include <cmath>
#include <numbers>

namespace headroom::generate_internal {

std::uint64_t mix64(std::uint64_t x) {
  x += 0x9e3779b97f4a7c15ULL;
  x = (x ^ (x >> 30)) * 0xbf58476d1ce4e5b9ULL;
  x = (x ^ (x >> 27)) * 0x94d049bb133111ebULL;
  return x ^ (x >> 31);
}

std::uint64_t element_bits(std::uint64_t seed, Stream s, std::int64_t i0, std::int64_t i1, std::int64_t i2,
                           std::int64_t i3, std::uint64_t draw) {
  // Each coordinate is folded in through the bijective mixer, so distinct
  // positions collide only as often as random 64-bit words do.
  std::uint64_t h = mix64(seed ^ mix64(static_cast<std::uint64_t>(s)));
  for (std::uint64_t c : {static_cast<std::uint64_t>(i0), static_cast<std::uint64_t>(i1),
                          static_cast<std::uint64_t>(i2), static_cast<std::uint64_t>(i3), draw})
    h = mix64(h ^ c);
  return h;
}

double round_to_bits(double x, int bits) {
  if (bits >= 53 || x == 0.0 || !std::isfinite(x)) return x;
  int e = 0;
  std::frexp(x, &e);  // |x| = m·2^e, m in [0.5, 1)
  // x·2^(bits−e) lies in [2^(bits−1), 2^bits): its integer part holds exactly
  // `bits` significant bits; nearbyint rounds ties to even in the default mode.
  return std::ldexp(std::nearbyint(std::ldexp(x, bits - e)), e - bits);
}

double to_float32(double x) { return static_cast<double>(static_cast<float>(x)); }

double Noise::unit(Stream s, std::int64_t i0, std::int64_t i1, std::int64_t i2, std::int64_t i3,
                   std::uint64_t draw) const {
  // The top 53 bits, offset by half a step: never 0 and never 1.
  return (static_cast<double>(bits(s, i0, i1, i2, i3, draw) >> 11) + 0.5) * 0x1p-53;
}

// Draw numbers: normals take 2·pair and 2·pair + 1, uniforms kUniformDraw,
// indices kIndexDraw + draw, so no two kinds of value share a hash.
constexpr std::uint64_t kUniformDraw = 1u << 20;
constexpr std::uint64_t kIndexDraw = 1u << 21;

double Noise::normal(Stream s, std::int64_t i0, std::int64_t i1, std::int64_t i2, std::int64_t i3,
                     std::uint64_t pair) const {
  // Box–Muller (Box & Muller 1958). u1 ≥ 2^-54 bounds |z| by sqrt(108·ln 2) < 8.7.
  const double u1 = unit(s, i0, i1, i2, i3, 2 * pair);
  const double u2 = unit(s, i0, i1, i2, i3, 2 * pair + 1);
  const double z = std::sqrt(-2.0 * std::log(u1)) * std::cos(2.0 * std::numbers::pi * u2);
  return round_to_bits(z, bits_);
}

double Noise::uniform(double lo, double hi, Stream s, std::int64_t i0, std::int64_t i1, std::int64_t i2,
                      std::int64_t i3) const {
  return round_to_bits(lo + (hi - lo) * unit(s, i0, i1, i2, i3, kUniformDraw), bits_);
}

std::int64_t Noise::index(std::int64_t n, Stream s, std::int64_t i0, std::int64_t i1, std::int64_t i2, std::int64_t i3,
                          std::uint64_t draw) const {
  // Modulo bias is below n/2^64: immaterial for the extents generators use.
  return static_cast<std::int64_t>(bits(s, i0, i1, i2, i3, kIndexDraw + draw) % static_cast<std::uint64_t>(n));
}

}  // namespace headroom::generate_internal
