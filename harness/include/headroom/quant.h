// headroom — int8 and 8-bit float quantisation schemes whose dequantised values are exact.
//
// A quantised tensor is int8 codes c plus float32 scales s (and, asymmetric,
// int32 zero points z) shared along a granularity. The dequantised value is
// (c − z) · s, computed exactly in double: |c − z| < 2^9 and s has 24 bits, so
// the product has at most 33 significant bits. The reference uses exactly these
// values: quantisation error is the input's, never the reference's.
// 8-bit floats (E4M3, E5M2; fp8.h) are the same with codes that are OFP8
// patterns: value decode(c) · s, at most 4 + 24 significant bits, exact in
// double; symmetric only (no zero points).
//
// Granularity on a [B, H, T, D] tensor (the index of the scale shared):
//   per_tensor  one scale            scales shape [1]
//   per_head    one per head h       scales shape [H]
//   per_token   one per (b, h, t)    scales shape [B, H, T]
//   per_channel one per (h, d)       scales shape [H, D]
//   per_block   one per (b, h, block of `block` tokens)
//                                    scales shape [B, H, ceil(T / block)],
//                                    index (b·H + h)·ceil(T/block) + t/block
#pragma once

#include <cstdint>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "headroom/format.h"
#include "headroom/tensor.h"

namespace headroom {

enum class Granularity : unsigned char { per_tensor, per_head, per_token, per_channel, per_block };

struct QuantScheme {
  Granularity granularity = Granularity::per_tensor;
  bool asymmetric = false;  ///< false: z = 0 and codes in [−127, 127]; true: codes in [−128, 127]
  std::int64_t block = 0;   ///< per_block: tokens per block (> 0); 0 for every other granularity
  bool operator==(const QuantScheme&) const = default;
};

/// Returns: "per_tensor", "per_head", "per_token", "per_channel", "per_block".
std::string_view granularity_name(Granularity g);
std::optional<Granularity> parse_granularity(std::string_view name);
/// Returns: e.g. "symmetric per_token", "asymmetric per_channel" or
/// "symmetric per_block of 64".
std::string scheme_name(const QuantScheme& s);

/// Returns: ceil(tokens / block), the number of per_block groups along T (0 when block < 1).
std::int64_t blocks_of(std::int64_t tokens, std::int64_t block);
/// Returns: the shape of the scales of granularity `g` on a [B, H, T, D] `shape` (the table above).
std::vector<std::int64_t> scale_shape_of(const std::vector<std::int64_t>& shape, Granularity g, std::int64_t block);
/// Returns: nothing; throws std::invalid_argument (prefixed by `who`) for a
/// per_block scheme without a block size ≥ 1, or a block size on another granularity.
void check_scheme(const QuantScheme& s, const char* who);

struct QuantizedTensor {
  std::vector<std::int64_t> shape;          ///< [B, H, T, D]
  Format format = Format::int8;             ///< int8, e4m3 or e5m2: what the codes are
  std::vector<std::int8_t> codes;           ///< row-major, size = product of shape; for e4m3/e5m2
                                            ///< each byte is the 8-bit pattern (read it as uint8_t)
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

/// Returns: `x` (rank 4, finite) as 8-bit float codes of `format` (e4m3 or
/// e5m2) with symmetric scales: per group, s = max|x| / M (M = 448 for E4M3,
/// 57344 for E5M2), rounded to float32 upward and grown by one float32 ulp
/// until M·s ≥ max|x| is checked exactly, so no scaled value exceeds M and no
/// code overflows; codes c = the nearest pattern to x/s (ties to even; the
/// double quotient rounds once more, innocuous since 53 ≥ 2·4 + 2, Figueroa
/// 1995). An all-zero group gets s = 1. Error: |x − decode(c)·s| ≤ 2^-4·|x|
/// (E4M3; 2^-3 for E5M2) in the normal range, ≤ s·2^-10 (E4M3; s·2^-17 E5M2)
/// below it. This amax scale rule is common practice (per-tensor "amax"
/// scaling of Micikevicius et al. 2022, "FP8 Formats for Deep Learning", and of
/// NVIDIA Transformer Engine's recipes; block scales likewise per block, as in
/// FlashAttention-3 §3.3; from memory).
/// Throws std::invalid_argument when `x` is not rank 4, holds a non-finite
/// value, `format` is not e4m3/e5m2, the scheme is asymmetric or per_block
/// without a block size, or a scale leaves float32's range.
QuantizedTensor quantize_fp8(const Tensor& x, QuantScheme scheme, Format format);

/// Returns: `x` as quantize_fp8 does, but with every group's scale `delayed`
/// (a float32 > 0 fixed beforehand, as delayed scaling takes it from an
/// earlier step's amax: Micikevicius et al. 2022 §4.3 and NVIDIA Transformer
/// Engine's DelayedScaling recipe, from memory) instead of its amax scale, and
/// codes converted with `saturating` (fp8.h): an element with |x/s| beyond the
/// format's largest finite M becomes ±M when saturating, and NaN (E4M3) or
/// ±infinity (E5M2) otherwise.
/// Such non-finite codes are kept (dequantize refuses them).
/// Throws std::invalid_argument as quantize_fp8 does, and for a delayed scale
/// that is not finite and > 0.
QuantizedTensor quantize_fp8_delayed(const Tensor& x, QuantScheme scheme, Format format, float delayed, bool saturating);

/// Returns: the exact dequantised values (c − z) · s, or decode(c) · s for
/// e4m3/e5m2 codes (|c − z| ≤ 255, a decoded 8-bit float has ≤ 4 significant
/// bits, and s has 24 bits, so each is exact in double). Throws
/// std::invalid_argument when the sizes disagree with the scheme, a scale is
/// not positive and finite, a zero point is outside int8, a symmetric code is
/// −128, or an 8-bit float code is NaN or infinite.
Tensor dequantize(const QuantizedTensor& q);

}  // namespace headroom
