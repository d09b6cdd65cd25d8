// headroom — counter-based value streams: every generated number is a pure function of its position.
//
// A value is a hash of (seed, stream, i0, i1, i2, i3, draw), never the next
// output of a sequential generator, so shrinking a case (fewer tokens, a
// smaller head dim) keeps every surviving element bit-identical: the shrunk
// case is a true sub-problem of the one that failed.
#pragma once

#include <cstdint>
#include <vector>

#include "headroom/tensor.h"

namespace headroom::generate_internal {

/// Independent streams of one case; the numbering is part of case identity.
enum class Stream : std::uint64_t {
  q = 1,
  k,
  v,
  mask,
  x_q,
  x_kv,
  w_q,
  w_k,
  w_v,
  w_o,
  b_q,
  b_k,
  b_v,
  b_o,
  plan,
  d_o,
};

/// Returns: the splitmix64 finaliser of x (Steele, Lea & Flood 2014, "Fast
/// splittable pseudorandom number generators"): a bijection of 64-bit words.
std::uint64_t mix64(std::uint64_t x);

/// Returns: 64 uniformly distributed bits for the given position and draw.
std::uint64_t element_bits(std::uint64_t seed, Stream s, std::int64_t i0, std::int64_t i1, std::int64_t i2,
                           std::int64_t i3, std::uint64_t draw = 0);

/// Returns: `x` rounded to `bits` significant bits (ties to even); x itself
/// when bits ≥ 53, x is zero or not finite. Preconditions: bits ≥ 1.
double round_to_bits(double x, int bits);

/// Returns: `x` rounded once to float32 (round to nearest even), as a double.
double to_float32(double x);

/// A case's base noise: standard normal or uniform values, each simplified to
/// `bits` significant bits (24 = full float32; shrinking lowers it towards 1,
/// where every value is ± a power of two).
class Noise {
 public:
  Noise(std::uint64_t seed, int bits) : seed_(seed), bits_(bits) {}

  /// Returns: raw bits of the position (never simplified).
  std::uint64_t bits(Stream s, std::int64_t i0, std::int64_t i1 = 0, std::int64_t i2 = 0, std::int64_t i3 = 0,
                     std::uint64_t draw = 0) const {
    return element_bits(seed_, s, i0, i1, i2, i3, draw);
  }
  /// Returns: a uniform value in the open interval (0, 1), 53 random bits, never simplified.
  double unit(Stream s, std::int64_t i0, std::int64_t i1 = 0, std::int64_t i2 = 0, std::int64_t i3 = 0,
              std::uint64_t draw = 0) const;
  /// Returns: a N(0, 1) value (Box–Muller on two units, |value| < 8.7),
  /// simplified to the noise's bits; `pair` selects further independent values
  /// of the same position.
  double normal(Stream s, std::int64_t i0, std::int64_t i1 = 0, std::int64_t i2 = 0, std::int64_t i3 = 0,
                std::uint64_t pair = 0) const;
  /// Returns: a uniform value in [lo, hi), simplified to the noise's bits
  /// (so it may land on hi itself when bits are few).
  double uniform(double lo, double hi, Stream s, std::int64_t i0, std::int64_t i1 = 0, std::int64_t i2 = 0,
                 std::int64_t i3 = 0) const;
  /// Returns: an integer uniform in [0, n). Preconditions: n ≥ 1.
  std::int64_t index(std::int64_t n, Stream s, std::int64_t i0, std::int64_t i1 = 0, std::int64_t i2 = 0,
                     std::int64_t i3 = 0, std::uint64_t draw = 0) const;

  int simplification_bits() const { return bits_; }

 private:
  std::uint64_t seed_;
  int bits_;
};

/// Returns: a rank-4 tensor with element (a, b, c, d) = to_float32(f(a, b, c, d)).
template <class F>
Tensor tensor4(std::vector<std::int64_t> shape, F&& f) {
  Tensor t(shape);
  for (std::int64_t a = 0; a < shape[0]; ++a)
    for (std::int64_t b = 0; b < shape[1]; ++b)
      for (std::int64_t c = 0; c < shape[2]; ++c)
        for (std::int64_t d = 0; d < shape[3]; ++d) t.at(a, b, c, d) = to_float32(f(a, b, c, d));
  return t;
}

/// Returns: a rank-3 tensor with element (a, b, c) = to_float32(f(a, b, c)).
template <class F>
Tensor tensor3(std::vector<std::int64_t> shape, F&& f) {
  Tensor t(shape);
  for (std::int64_t a = 0; a < shape[0]; ++a)
    for (std::int64_t b = 0; b < shape[1]; ++b)
      for (std::int64_t c = 0; c < shape[2]; ++c) t.at(a, b, c) = to_float32(f(a, b, c));
  return t;
}

}  // namespace headroom::generate_internal
