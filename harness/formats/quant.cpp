// headroom — int8 quantisation: choosing scales that never overflow a code, and
// exact dequantisation.
//
// Codes are the exact round-to-nearest-even of x/s (decided by comparing x with
// the exact midpoints, not by trusting a rounded quotient), so every element's
// dequantisation error is at most s/2, exactly. Scales are float32 chosen by
// checking, in exact arithmetic, that the group's extreme values land on codes
// in range; when the first guess fails the scale grows by one float32 ulp.
#include "headroom/quant.h"

#include "headroom/fp8.h"

#include <algorithm>
#include <array>
#include <cmath>
#include <limits>
#include <stdexcept>
#include <string>
#include <tuple>
#include <utility>

namespace headroom {
namespace {

constexpr int kSymmetricMaxCode = 127;
constexpr int kCodeMin = -128;
constexpr int kCodeMax = 127;
// Attempts at growing a scale by one ulp before giving up. The derivations below
// show one step suffices; the bound only turns a bug into an error, not a hang.
constexpr int kScaleGrowthSteps = 64;

/// Returns: the integer nearest to x/s, ties to even, decided exactly.
/// Preconditions: s > 0 finite, |x/s| < 2^20 (so (2c ± 1)·s/2 is exact: ≤ 22 + 24 bits).
long nearest_code(double x, double s) {
  // In every use |x/s| ≤ 2^9, so the rounded quotient is within 2^-44 of x/s
  // and its nearest integer (lround breaks ties away from zero) is off by at
  // most one; the exact midpoint comparisons then correct it.
  long c = std::lround(x / s);
  const double upper_mid = static_cast<double>(2 * c + 1) * s * 0.5;  // (c + ½)·s, exact
  const double lower_mid = static_cast<double>(2 * c - 1) * s * 0.5;  // (c − ½)·s, exact
  if (x > upper_mid || (x == upper_mid && (c & 1) != 0)) return c + 1;
  if (x < lower_mid || (x == lower_mid && (c & 1) != 0)) return c - 1;
  return c;
}

/// Returns: the smallest-or-next float32 s with s ≥ v (v > 0), or throws when v
/// exceeds float32's range.
float float_at_least(double v, const char* what) {
  if (!(v <= static_cast<double>(std::numeric_limits<float>::max()))) {
    throw std::invalid_argument(std::string("quantize: ") + what +
                                " needs a scale beyond float32's range (values too large for int8 with float32 scales)");
  }
  float s = static_cast<float>(v);
  if (static_cast<double>(s) < v) s = std::nextafter(s, std::numeric_limits<float>::infinity());
  // v ≥ the smallest positive double can still round to float 0: step up.
  if (s == 0.0f) s = std::numeric_limits<float>::denorm_min();
  return s;
}

/// Returns: a float32 scale with |x| ≤ 127·s for all |x| ≤ max_abs, hence codes
/// in [−127, 127]. 127·s has at most 31 bits, so the check is exact in double.
float symmetric_scale(double max_abs) {
  if (max_abs == 0.0) return 1.0f;  // all-zero group: any scale gives code 0
  float s = float_at_least(max_abs / kSymmetricMaxCode, "a symmetric group");
  for (int step = 0; step < kScaleGrowthSteps; ++step) {
    if (static_cast<double>(s) * kSymmetricMaxCode >= max_abs) return s;
    s = std::nextafter(s, std::numeric_limits<float>::infinity());
  }
  throw std::logic_error("quantize: symmetric scale search did not converge");
}

/// Returns: a float32 scale and zero point putting every x in [lo, hi] on a
/// code in [−128, 127]. Preconditions: lo ≤ 0 ≤ hi, lo < hi.
///
/// z = −128 − rne(lo/s) maps lo onto −128 exactly; rne(lo/s) ∈ [−255, 0] when
/// (hi − lo)/s ≤ 255, so z ∈ [−128, 127]. hi then lands on
/// rne(hi/s) − rne(lo/s) − 128, at most 127 unless both quotients sit on ties
/// rounding apart with (hi − lo)/s = 255 exactly: growing s by one ulp moves
/// the nonzero end off its tie, so the loop ends after at most one extra step
/// beyond the first guess's own rounding.
std::pair<float, std::int32_t> asymmetric_scale(double lo, double hi) {
  const double span = hi - lo;  // may round; the exact check below decides
  if (!std::isfinite(span)) {
    throw std::invalid_argument("quantize: an asymmetric group's range max − min overflows double");
  }
  float s = float_at_least(span / (kCodeMax - kCodeMin), "an asymmetric group");
  for (int step = 0; step < kScaleGrowthSteps; ++step) {
    const double sd = s;
    const long lo_code = nearest_code(lo, sd);
    const long z = kCodeMin - lo_code;
    if (z >= kCodeMin && z <= kCodeMax && nearest_code(hi, sd) + z <= kCodeMax) {
      return {s, static_cast<std::int32_t>(z)};
    }
    s = std::nextafter(s, std::numeric_limits<float>::infinity());
  }
  throw std::logic_error("quantize: asymmetric scale search did not converge");
}

}  // namespace

std::int64_t blocks_of(std::int64_t tokens, std::int64_t block) { return block > 0 ? (tokens + block - 1) / block : 0; }

std::vector<std::int64_t> scale_shape_of(const std::vector<std::int64_t>& shape, Granularity g, std::int64_t block) {
  switch (g) {
    case Granularity::per_tensor: return {1};
    case Granularity::per_head: return {shape[1]};
    case Granularity::per_token: return {shape[0], shape[1], shape[2]};
    case Granularity::per_channel: return {shape[1], shape[3]};
    case Granularity::per_block: return {shape[0], shape[1], blocks_of(shape[2], block)};
  }
  throw std::invalid_argument("quantize: not a Granularity value");
}

namespace {

std::int64_t product(const std::vector<std::int64_t>& extents) {
  std::int64_t n = 1;
  for (std::int64_t e : extents) n *= e;
  return n;
}

}  // namespace

std::string_view granularity_name(Granularity g) {
  switch (g) {
    case Granularity::per_tensor: return "per_tensor";
    case Granularity::per_head: return "per_head";
    case Granularity::per_token: return "per_token";
    case Granularity::per_channel: return "per_channel";
    case Granularity::per_block: return "per_block";
  }
  throw std::invalid_argument("granularity_name: not a Granularity value");
}

std::optional<Granularity> parse_granularity(std::string_view name) {
  static constexpr std::array<std::pair<std::string_view, Granularity>, 5> kNames{{
      {"per_tensor", Granularity::per_tensor},
      {"per_head", Granularity::per_head},
      {"per_token", Granularity::per_token},
      {"per_channel", Granularity::per_channel},
      {"per_block", Granularity::per_block},
  }};
  for (const auto& [known, g] : kNames) {
    if (name == known) return g;
  }
  return std::nullopt;
}

std::string scheme_name(const QuantScheme& s) {
  std::string name = std::string(s.asymmetric ? "asymmetric " : "symmetric ") + std::string(granularity_name(s.granularity));
  if (s.granularity == Granularity::per_block) name += " of " + std::to_string(s.block);
  return name;
}

std::int64_t QuantizedTensor::group(std::int64_t b, std::int64_t h, std::int64_t t, std::int64_t d) const {
  switch (scheme.granularity) {
    case Granularity::per_tensor: return 0;
    case Granularity::per_head: return h;
    case Granularity::per_token: return (b * shape[1] + h) * shape[2] + t;  // kernel_abi.h: (b*H + h)*T + t
    case Granularity::per_channel: return h * shape[3] + d;                 // kernel_abi.h: h*D + d
    case Granularity::per_block:  // kernel_abi.h: (b*H + h)*ceil(T/blk) + t/blk
      return (b * shape[1] + h) * blocks_of(shape[2], scheme.block) + t / scheme.block;
  }
  throw std::invalid_argument("QuantizedTensor::group: not a Granularity value");
}

QuantizedTensor quantize(const Tensor& x, QuantScheme scheme) {
  check_scheme(scheme, "quantize");
  if (x.rank() != 4) {
    throw std::invalid_argument("quantize: the tensor has rank " + std::to_string(x.rank()) +
                                "; int8 schemes are defined on [B, H, T, D]");
  }
  if (static_cast<std::int64_t>(x.values.size()) != x.size()) {
    throw std::invalid_argument("quantize: the tensor holds " + std::to_string(x.values.size()) +
                                " values but its shape has " + std::to_string(x.size()));
  }
  QuantizedTensor q;
  q.shape = x.shape;
  q.scheme = scheme;
  q.scale_shape = scale_shape_of(x.shape, scheme.granularity, scheme.block);
  const auto groups = static_cast<std::size_t>(product(q.scale_shape));

  // Pass 1: each group's range. Symmetric needs max|x|; asymmetric needs min and
  // max, widened to include 0 so that 0 is exactly a code (z) and z fits int8.
  std::vector<double> lo(groups, 0.0), hi(groups, 0.0);
  const auto [nb, nh, nt, nd] = std::array{x.shape[0], x.shape[1], x.shape[2], x.shape[3]};
  for (std::int64_t b = 0; b < nb; ++b)
    for (std::int64_t h = 0; h < nh; ++h)
      for (std::int64_t t = 0; t < nt; ++t)
        for (std::int64_t d = 0; d < nd; ++d) {
          const double v = x.at(b, h, t, d);
          if (!std::isfinite(v)) {
            throw std::invalid_argument("quantize: element [" + std::to_string(b) + ", " + std::to_string(h) + ", " +
                                        std::to_string(t) + ", " + std::to_string(d) +
                                        "] is not finite; int8 cannot hold it");
          }
          const auto g = static_cast<std::size_t>(q.group(b, h, t, d));
          if (v < lo[g]) lo[g] = v;
          if (v > hi[g]) hi[g] = v;
        }

  // Pass 2: scales (and zero points).
  q.scales.resize(groups);
  if (scheme.asymmetric) q.zero_points.resize(groups);
  for (std::size_t g = 0; g < groups; ++g) {
    if (!scheme.asymmetric) {
      q.scales[g] = symmetric_scale(std::max(-lo[g], hi[g]));
    } else if (lo[g] == hi[g]) {  // both 0: an all-zero (or empty) group
      q.scales[g] = 1.0f;
      q.zero_points[g] = 0;
    } else {
      std::tie(q.scales[g], q.zero_points[g]) = asymmetric_scale(lo[g], hi[g]);
    }
  }

  // Pass 3: codes. By construction of the scales they are in range; a code out
  // of range would be a bug here, so it is reported, never clamped silently.
  const int code_min = scheme.asymmetric ? kCodeMin : -kSymmetricMaxCode;
  q.codes.resize(static_cast<std::size_t>(x.size()));
  for (std::int64_t b = 0; b < nb; ++b)
    for (std::int64_t h = 0; h < nh; ++h)
      for (std::int64_t t = 0; t < nt; ++t)
        for (std::int64_t d = 0; d < nd; ++d) {
          const auto g = static_cast<std::size_t>(q.group(b, h, t, d));
          const long z = scheme.asymmetric ? q.zero_points[g] : 0;
          const long c = nearest_code(x.at(b, h, t, d), q.scales[g]) + z;
          if (c < code_min || c > kCodeMax) throw std::logic_error("quantize: a code overflowed int8");
          q.codes[static_cast<std::size_t>(x.offset(b, h, t, d))] = static_cast<std::int8_t>(c);
        }
  return q;
}

void check_scheme(const QuantScheme& s, const char* who) {
  if (s.granularity == Granularity::per_block && s.block < 1) {
    throw std::invalid_argument(std::string(who) + ": per_block needs a block size of at least 1 token, not " +
                                std::to_string(s.block));
  }
  if (s.granularity != Granularity::per_block && s.block != 0) {
    throw std::invalid_argument(std::string(who) + ": a block size is given for " +
                                std::string(granularity_name(s.granularity)));
  }
}

Tensor dequantize(const QuantizedTensor& q) {
  if (q.shape.size() != 4) throw std::invalid_argument("dequantize: the shape is not [B, H, T, D]");
  check_scheme(q.scheme, "dequantize");
  const bool fp8 = is_fp8(q.format);
  if (!fp8 && q.format != Format::int8) throw std::invalid_argument("dequantize: codes of a format that is not quantised");
  if (fp8 && q.scheme.asymmetric) throw std::invalid_argument("dequantize: 8-bit float codes have no zero points");
  Tensor out(q.shape);
  if (q.codes.size() != out.values.size()) {
    throw std::invalid_argument("dequantize: " + std::to_string(q.codes.size()) + " codes for a shape of " +
                                std::to_string(out.values.size()) + " elements");
  }
  if (q.scale_shape != scale_shape_of(q.shape, q.scheme.granularity, q.scheme.block) ||
      q.scales.size() != static_cast<std::size_t>(product(q.scale_shape))) {
    throw std::invalid_argument("dequantize: the scales do not match " + scheme_name(q.scheme) + " on this shape");
  }
  if (q.zero_points.size() != (q.scheme.asymmetric ? q.scales.size() : 0)) {
    throw std::invalid_argument("dequantize: " + std::to_string(q.zero_points.size()) + " zero points for " +
                                scheme_name(q.scheme) + " with " + std::to_string(q.scales.size()) + " scales");
  }
  for (std::size_t g = 0; g < q.scales.size(); ++g) {
    if (!(q.scales[g] > 0.0f) || !std::isfinite(q.scales[g])) {
      throw std::invalid_argument("dequantize: scale " + std::to_string(g) + " is not positive and finite");
    }
    // |c − z| ≤ 255 keeps (c − z)·s within 8 + 24 bits: exact in double.
    if (q.scheme.asymmetric && (q.zero_points[g] < kCodeMin || q.zero_points[g] > kCodeMax)) {
      throw std::invalid_argument("dequantize: zero point " + std::to_string(g) + " = " +
                                  std::to_string(q.zero_points[g]) + " is outside int8");
    }
  }
  const auto [nb, nh, nt, nd] = std::array{q.shape[0], q.shape[1], q.shape[2], q.shape[3]};
  for (std::int64_t b = 0; b < nb; ++b)
    for (std::int64_t h = 0; h < nh; ++h)
      for (std::int64_t t = 0; t < nt; ++t)
        for (std::int64_t d = 0; d < nd; ++d) {
          const auto g = static_cast<std::size_t>(q.group(b, h, t, d));
          const auto i = static_cast<std::size_t>(out.offset(b, h, t, d));
          const int c = q.codes[i];
          if (fp8) {
            const double v = fp8_to_double(static_cast<std::uint8_t>(c), q.format == Format::e4m3 ? Fp8Kind::e4m3 : Fp8Kind::e5m2);
            if (!std::isfinite(v)) {
              throw std::invalid_argument("dequantize: " + std::string(format_name(q.format)) + " code " +
                                          std::to_string(static_cast<std::uint8_t>(c)) + " at element " +
                                          std::to_string(i) + " is not finite");
            }
            // ≤ 4 significant bits times a 24-bit scale: exact.
            out.values[i] = v * static_cast<double>(q.scales[g]);
            continue;
          }
          if (!q.scheme.asymmetric && c < -kSymmetricMaxCode) {
            throw std::invalid_argument("dequantize: code -128 at element " + std::to_string(i) +
                                        " in a symmetric scheme (codes are in [-127, 127])");
          }
          const int z = q.scheme.asymmetric ? q.zero_points[g] : 0;
          out.values[i] = static_cast<double>(c - z) * static_cast<double>(q.scales[g]);
        }
  return out;
}

}  // namespace headroom
