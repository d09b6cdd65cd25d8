// headroom — the 8-bit float family: fp8_scales. Documented in families.h.
//
// Six kinds (knob 0), each aimed at one way 8-bit float inputs with amax or
// delayed scales (quant.h, quantize_fp8, quantize_fp8_delayed) or 8-bit
// probabilities go wrong. Limits from
// the OCP 8-bit Floating Point Specification rev 1.0 (fp8.h): E4M3 largest
// finite 448, smallest normal 2^-6, smallest subnormal 2^-9; E5M2 57344.
#include <algorithm>
#include <cmath>

#include "recipe.h"

namespace headroom::generate_internal {
namespace {

enum Kind { kSaturation = 0, kOutlierTensor = 1, kBlockSpike = 2, kSubnormalBlock = 3, kSmallWeights = 4, kDelayedScale = 5 };

// kDelayedScale: K's and V's delayed scale 2^-5 (an earlier step's amax of
// 14 = 448·2^-5, a few × the N(0,1) entries), the first token of each
// (batch, kv head) far beyond it, so its codes saturate to ±448 (E4M3; ±57344·2^-5 = ±1792 is
// in range for E5M2, whose edges kSaturation reaches).
constexpr float kDelayedScaleKV = 0x1p-5f;
constexpr double kDelayedSpike = 1000.0;
// The query channel aligned with the spike: the clipped key still leads every
// other score by about 16·14·s − (a few σ), s = 1/√Dk, σ ≈ s·√(16² + Dk):
// ≥ 14 − 4 at Dk = 256, more at smaller Dk, so the spike holds more than
// 1 − 128·e^-9 ≈ 98% of each row (Tk ≤ 129 here), past 464/480 ≈ 96.7%.
constexpr double kDelayedQueryChannel = 16.0;

// The E4M3 and E5M2 maxima, the ties just above them (464 rounds to 448,
// 61440 overflows E5M2), and a step past each.
constexpr double kEdges[] = {448.0, 464.0, 465.0, 480.0, 57344.0, 61440.0, 61441.0};

void fp8_sample(Draw& d, int size, Recipe& r) {
  r.shape = sample_core_shape(d, size);
  r.knobs[0] = d.uniform_int(0, 5);
  r.knobs[1] = d.uniform_int(0, 1);
  // Block kinds need keys in more than one 64-token block; small weights need
  // many keys. Few queries keep the exact reference quick.
  if (r.knobs[0] == kBlockSpike || r.knobs[0] == kSubnormalBlock) r.shape.kv_len = d.uniform(65, 129);
  if (r.knobs[0] == kSmallWeights) r.shape.kv_len = d.uniform(100, 129);
  if (r.knobs[0] == kDelayedScale) r.shape.kv_len = std::min<std::int64_t>(r.shape.kv_len, 129);
  if (r.shape.kv_len > 64) r.shape.q_len = std::min<std::int64_t>(r.shape.q_len, 8);
}

void fp8_realize(const Recipe& r, Case& c) {
  const CoreShape& s = r.shape;
  const Noise n = r.noise();
  c.core.scale = softmax_scale(s.key_dim);
  c.core_inputs = gaussian_inputs(r, 1.0);
  CoreInputs& in = c.core_inputs;
  switch (r.knobs[0]) {
    case kSaturation:
      // V entries on the formats' overflow edges, both signs. V's delayed
      // scale 1 hands them to the conversion as they are (an amax scale would
      // map the largest to M whatever it is), so 464 ties to 448, 465 and
      // 480 saturate in E4M3, and 61440 and 61441 saturate in E5M2.
      c.core.fp8_delayed.v = 1.0f;
      for (std::int64_t b = 0; b < s.batch; ++b)
        for (std::int64_t g = 0; g < s.kv_heads; ++g)
          for (std::int64_t j = 0; j < s.kv_len; ++j) {
            if (n.index(4, Stream::plan, b, g, j) != 0) continue;
            const std::int64_t d = n.index(s.value_dim, Stream::plan, b, g, j, 1);
            const double e = kEdges[n.index(7, Stream::plan, b, g, j, 2)];
            in.v.at(b, g, j, d) = (n.bits(Stream::plan, b, g, j, 3) & 1) ? -e : e;
          }
      break;
    case kOutlierTensor: {  // one entry 10^3 or 10^4 × typical per (batch, kv head) in K and V
      const double big = r.knobs[1] == 0 ? 1e3 : 1e4;
      for (std::int64_t b = 0; b < s.batch; ++b)
        for (std::int64_t g = 0; g < s.kv_heads; ++g) {
          const std::int64_t j = n.index(s.kv_len, Stream::plan, b, g, 4);
          in.k.at(b, g, j, n.index(s.key_dim, Stream::plan, b, g, 5)) = to_float32(big * 0.5);
          in.v.at(b, g, j, n.index(s.value_dim, Stream::plan, b, g, 6)) = to_float32(-big);
        }
      break;
    }
    case kBlockSpike: {  // one token of a later 64-token block holds a 10^3× value
      for (std::int64_t b = 0; b < s.batch; ++b)
        for (std::int64_t g = 0; g < s.kv_heads; ++g) {
          const std::int64_t first = std::min<std::int64_t>(64, s.kv_len - 1);
          const std::int64_t j = first + n.index(s.kv_len - first, Stream::plan, b, g, 7);
          in.k.at(b, g, j, n.index(s.key_dim, Stream::plan, b, g, 8)) = 300.0;
          in.v.at(b, g, j, n.index(s.value_dim, Stream::plan, b, g, 9)) = 1000.0;
        }
      break;
    }
    case kSubnormalBlock: {
      // The first block of K and V 2^-13 or 2^-15 × typical. An amax scale maps
      // the tensor's largest entry (a few × typical) to 448, which puts the
      // block's entries in or below E4M3's subnormal range [2^-9, 2^-6).
      // Measured on `case make --family fp8_scales --seed S`, S = 1..120, K
      // scaled by 448/amax: the block's median entry 0.002 to 0.04, 30-76% of
      // its entries subnormal and 2-23% below half the least subnormal
      // (flushed). The former 2^-10 left them normal.
      // Per-tensor and per-head scales keep them subnormal; per-token and
      // per-block scales give the block its own scale and make them normal
      // again — by design, which is what such scales are for.
      const double shrink = r.knobs[1] == 0 ? 0x1p-13 : 0x1p-15;
      const std::int64_t end = std::min<std::int64_t>(64, std::max<std::int64_t>(1, s.kv_len / 2));
      for (std::int64_t b = 0; b < s.batch; ++b)
        for (std::int64_t g = 0; g < s.kv_heads; ++g)
          for (std::int64_t j = 0; j < end; ++j) {
            for (std::int64_t d = 0; d < s.key_dim; ++d) in.k.at(b, g, j, d) = to_float32(in.k.at(b, g, j, d) * shrink);
            for (std::int64_t d = 0; d < s.value_dim; ++d) in.v.at(b, g, j, d) = to_float32(in.v.at(b, g, j, d) * shrink);
          }
      break;
    }
    case kSmallWeights: {
      // Key 0 leads by 7 to 7.5 through its own channel (weights e^-7 ≈ 9e-4
      // each: below 2^-10, where unscaled E4M3 flushes to zero, yet normal once
      // multiplied by 448), its value 10^-3 of typical, so the many small
      // weights carry most of Σ p_j|v_j|.
      const std::int64_t ch = n.index(s.key_dim, Stream::plan, -1);
      const double margin = 7.0 + 0.5 * r.knobs[1];
      const double c0 = margin / (static_cast<double>(c.core.scale) * 4.0);
      for (std::int64_t b = 0; b < s.batch; ++b)
        for (std::int64_t h = 0; h < s.q_heads; ++h)
          for (std::int64_t i = 0; i < s.q_len; ++i) in.q.at(b, h, i, ch) = 4.0;
      for (std::int64_t b = 0; b < s.batch; ++b)
        for (std::int64_t g = 0; g < s.kv_heads; ++g)
          for (std::int64_t j = 0; j < s.kv_len; ++j) {
            in.k.at(b, g, j, ch) = j == 0 ? to_float32(c0) : 0.0;
            // Other channels of K scaled down so the lead stays about `margin`.
            for (std::int64_t d = 0; d < s.key_dim; ++d)
              if (d != ch) in.k.at(b, g, j, d) = to_float32(in.k.at(b, g, j, d) * 0.05);
            if (j == 0)
              for (std::int64_t d = 0; d < s.value_dim; ++d) in.v.at(b, g, j, d) = to_float32(in.v.at(b, g, j, d) * 1e-3);
          }
      break;
    }
    case kDelayedScale: {
      c.core.fp8_delayed.k = kDelayedScaleKV;
      c.core.fp8_delayed.v = kDelayedScaleKV;
      const std::int64_t ch = n.index(s.key_dim, Stream::plan, -2);
      for (std::int64_t b = 0; b < s.batch; ++b)
        for (std::int64_t h = 0; h < s.q_heads; ++h)
          for (std::int64_t i = 0; i < s.q_len; ++i) in.q.at(b, h, i, ch) = kDelayedQueryChannel;
      for (std::int64_t b = 0; b < s.batch; ++b)
        for (std::int64_t g = 0; g < s.kv_heads; ++g) {
          const std::int64_t j = 0;  // the first key: visible to every row under causal masks and key padding
          in.k.at(b, g, j, ch) = kDelayedSpike;
          const double sign = (n.bits(Stream::plan, b, g, 11) & 1) ? -1.0 : 1.0;
          in.v.at(b, g, j, n.index(s.value_dim, Stream::plan, b, g, 12)) = sign * kDelayedSpike;
        }
      break;
    }
    default: break;
  }
}

}  // namespace

std::vector<FamilyImpl> fp8_families() {
  return {{.name = "fp8_scales", .sample = fp8_sample, .realize = fp8_realize}};
}

}  // namespace headroom::generate_internal
