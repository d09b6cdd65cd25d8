// headroom — int8 quantisation schemes whose dequantised values are exact.
//
// A quantised tensor is int8 codes c plus float32 scales s (and, asymmetric,
// int32 zero points z) shared along a granularity. The dequantised value is
// (c − z) · s, computed exactly in double: |c − z| < 2^9 and s has 24 bits, so
// the product has at most 33 significant bits. The reference uses exactly these
// values: quantisation error is the input's, never the reference's.
//
// Granularity on a [B, H, T, D] tensor (the index of the scale shared):
//   per_tensor  one scale            scales shape [1]
//   per_head    one per head h       scales shape [H]
//   per_token   one per (b, h, t)    scales shape [B, H, T]
//   per_channel one per (h, d)       scales shape [H, D]
#pragma once

#include <cstdint>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "headroom/tensor.h"

namespace headroom {

enum class Granularity : unsigned char { per_tensor, per_head, per_token, per_channel };

struct QuantScheme {
  Granularity granularity = Granularity::per_tensor;
  bool asymmetric = false;  ///< false: z = 0 and codes in [−127, 127]; true: codes in [−128, 127]
  bool operator==(const QuantScheme&) const = default;
};

/// Returns: "per_tensor", "per_head", "per_token", "per_channel".
std::string_view granularity_name(Granularity g);
std::optional<Granularity> parse_granularity(std::string_view name);
/// Returns: e.g. "symmetric per_token" or "asymmetric per_channel".
std::string scheme_name(const QuantScheme& s);

struct QuantizedTensor {
  std::vector<std::int64_t> shape;          ///< [B, H, T, D]
  std::vector<std::int8_t> codes;           ///< row-major, size = product of shape
  std::vector<std::int64_t> scale_shape;    ///< as in the table above
  std::vector<float> scales;                ///< > 0, finite
  std::vector<std::int32_t> zero_points;    ///< empty when symmetric, else one per scale
  QuantScheme scheme;

  /// Returns: the index into scales/zero_points for element (b, h, t, d).
  std::int64_t group(std::int64_t b, std::int64_t h, std::int64_t t, std::int64_t d) const;
};

/// Returns: `x` (rank 4, finite) quantised with codes c = z + rne(x / s), the
/// integer nearest to x/s decided exactly (ties to even), so every element's
/// dequantisation error |x − (c − z)·s| is at most s/2.
/// Symmetric: s = max|x| / 127 over the group, rounded to float32 upward so
/// that 127·s ≥ max|x| and every code lies in [−127, 127].
/// Asymmetric: the group's range [min, max] is first widened to include 0 (so
/// 0 is exactly code z and z fits int8 without clamping), s = (max − min) / 255
/// rounded to float32 upward, z = −128 − rne(min / s); if an exact check finds
/// the max off the end (both ends on ties), s grows by one float32 ulp.
/// An all-zero (or empty) group gets s = 1, z = 0, codes 0.
/// Throws std::invalid_argument when `x` is not rank 4, holds a NaN or an
/// infinity, or needs a scale beyond float32's range.
QuantizedTensor quantize(const Tensor& x, QuantScheme scheme);

/// Returns: the exact dequantised values (c − z) · s (|c − z| ≤ 255 and s has
/// 24 bits, so each is exact in double). Throws std::invalid_argument when the
/// sizes disagree with the scheme, a scale is not positive and finite, a zero
/// point is outside int8, or a symmetric code is −128.
Tensor dequantize(const QuantizedTensor& q);

}  // namespace headroom
