// headroom — families shaping the score matrix: large_logits, near_ties, dominant_key,
// attention_sink, repeated_maxima, common_offset. Documented in families.h.
#include <algorithm>
#include <cmath>
#include <numeric>

#include "recipe.h"

namespace headroom::generate_internal {
namespace {

void shape_and_knobs(Draw& d, int size, Recipe& r, int knob0_max, int knob1_max) {
  r.shape = sample_core_shape(d, size);
  r.knobs[0] = d.uniform_int(0, knob0_max);
  r.knobs[1] = d.uniform_int(0, knob1_max);
}

// ---- large_logits ----
// exp(z) overflows float32 for z > ln(2^128) ≈ 88.72 and binary16 for
// z > ln(65504) ≈ 11.09 (IEEE 754-2019 Table 3.5 maxima).

void large_sample(Draw& d, int size, Recipe& r) { shape_and_knobs(d, size, r, 16, 0); }

void large_realize(const Recipe& r, Case& c) {
  const CoreShape& s = r.shape;
  const double target = 100.0 * std::exp2(r.knobs[0] / 4.0);  // L in [100, 1600]
  c.core.scale = softmax_scale(s.key_dim);
  const double scale = c.core.scale;
  // q, k ~ m·N(0,1) give s·q·k a standard deviation s·m²·sqrt(Dk) ≈ m².
  c.core_inputs = gaussian_inputs(r, std::sqrt(target / 2.0));
  Tensor& q = c.core_inputs.q;
  Tensor& k = c.core_inputs.k;
  const std::int64_t group = s.q_heads / s.kv_heads;
  // Key 0 of each kv head is the last query of its first head, rescaled so that
  // their scaled score is the target: s·q·(q·L/(s|q|²)) = L.
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t g = 0; g < s.kv_heads; ++g) {
      const std::int64_t h = g * group, i = s.q_len - 1;
      double norm2 = 0;
      for (std::int64_t d = 0; d < s.key_dim; ++d) norm2 += q.at(b, h, i, d) * q.at(b, h, i, d);
      if (norm2 == 0) continue;
      for (std::int64_t d = 0; d < s.key_dim; ++d)
        k.at(b, g, 0, d) = to_float32(q.at(b, h, i, d) * target / (scale * norm2));
    }
}

// ---- near_ties ----

void ties_sample(Draw& d, int size, Recipe& r) { shape_and_knobs(d, size, r, 2, 0); }

void ties_realize(const Recipe& r, Case& c) {
  const CoreShape& s = r.shape;
  const Noise n = r.noise();
  c.core.scale = softmax_scale(s.key_dim);
  CoreInputs& in = c.core_inputs;
  in.v = gaussian_inputs(r, 1.0).v;
  in.q = Tensor({s.batch, s.q_heads, s.q_len, s.key_dim});
  in.k = Tensor({s.batch, s.kv_heads, s.kv_len, s.key_dim});
  const std::int64_t group = s.q_heads / s.kv_heads;
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t g = 0; g < s.kv_heads; ++g) {
      std::vector<float> base(static_cast<std::size_t>(s.key_dim));
      for (std::int64_t d = 0; d < s.key_dim; ++d)
        base[static_cast<std::size_t>(d)] = static_cast<float>(n.normal(Stream::k, b, g, -1, d));
      // The component of least magnitude: moving it by one of its ulps moves a
      // score s·β·(k·k) by at most 2^-23·k_d²/|k|² ≤ 2^-23/Dk of itself, so with
      // Dk ≥ 2 (one direction) or Dk ≥ 4 (both) every pair of scores of a row
      // stays within 2^-24·|z| < one float32 ulp of the largest.
      const auto dmin = static_cast<std::int64_t>(
          std::min_element(base.begin(), base.end(), [](float a, float b) { return std::fabs(a) < std::fabs(b); }) -
          base.begin());
      const int mode = s.key_dim == 1 ? 0 : (s.key_dim < 4 ? std::min(r.knobs[0], 1) : r.knobs[0]);
      for (std::int64_t j = 0; j < s.kv_len; ++j) {
        const std::uint64_t h = n.bits(Stream::plan, b, g, j);
        const int eps = mode == 0 ? 0 : mode == 1 ? static_cast<int>(h % 2) : static_cast<int>(h % 3) - 1;
        for (std::int64_t d = 0; d < s.key_dim; ++d) {
          float v = base[static_cast<std::size_t>(d)];
          if (d == dmin && eps != 0) v = std::nextafter(v, eps > 0 ? INFINITY : -INFINITY);
          in.k.at(b, g, j, d) = v;
        }
      }
      // Queries ± 2^e times the base key, e in [−2, 2]: exact in float32.
      for (std::int64_t h = g * group; h < (g + 1) * group; ++h)
        for (std::int64_t i = 0; i < s.q_len; ++i) {
          const std::uint64_t bits = n.bits(Stream::q, b, h, i);
          const double beta = std::ldexp((bits & 1) ? -1.0 : 1.0, static_cast<int>((bits >> 1) % 5) - 2);
          for (std::int64_t d = 0; d < s.key_dim; ++d) in.q.at(b, h, i, d) = beta * base[static_cast<std::size_t>(d)];
        }
    }
}

// ---- dominant_key and attention_sink: one key leads every score ----
// Through channel ch: every query holds `a` there, the leading key c0 and every
// other key exactly 0, so the lead is s·a·c0 = margin plus the O(1) noise of
// the remaining channels.
void plant_leader(const Recipe& r, Case& c, double margin, bool at_zero, double leader_v, double others_v) {
  const CoreShape& s = r.shape;
  const Noise n = r.noise();
  c.core.scale = softmax_scale(s.key_dim);
  c.core_inputs = gaussian_inputs(r, 1.0);
  CoreInputs& in = c.core_inputs;
  const std::int64_t ch = n.index(s.key_dim, Stream::plan, -1);
  constexpr double a = 4.0;
  const double c0 = margin / (static_cast<double>(c.core.scale) * a);
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i) in.q.at(b, h, i, ch) = a;
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t g = 0; g < s.kv_heads; ++g) {
      const std::int64_t lead = at_zero ? 0 : n.index(s.kv_len, Stream::plan, b, g);
      for (std::int64_t j = 0; j < s.kv_len; ++j) {
        in.k.at(b, g, j, ch) = j == lead ? to_float32(c0) : 0.0;
        const double f = j == lead ? leader_v : others_v;
        for (std::int64_t d = 0; d < s.value_dim; ++d) in.v.at(b, g, j, d) = to_float32(f * in.v.at(b, g, j, d));
      }
    }
}

void dominant_sample(Draw& d, int size, Recipe& r) { shape_and_knobs(d, size, r, 8, 12); }

void dominant_realize(const Recipe& r, Case& c) {
  // Margin 12..20: weights e^-12..e^-20 around float32's unit roundoff 2^-24 ≈ 6e-8.
  plant_leader(r, c, 12.0 + r.knobs[0], false, 1.0, std::exp2(r.knobs[1]));
}

void sink_sample(Draw& d, int size, Recipe& r) { shape_and_knobs(d, size, r, 4, 4); }

void sink_realize(const Recipe& r, Case& c) {
  // Margin 16..20 and a sink value 10^-2..10^-3 of typical: the other keys'
  // share, about Tk·e^-margin/|v_0|, stays above float32 resolution.
  plant_leader(r, c, 16.0 + r.knobs[0], true, std::pow(10.0, -2.0 - r.knobs[1] / 4.0), 1.0);
}

// ---- repeated_maxima ----
// Non-lead channels are uniform in [−1, 1], so a non-copy key scores at most
// s·(Dk − 1) and the copies at least s·(a·c0 − (Dk − 1)); choosing
// s·a·c0 = margin + 2s(Dk − 1) makes the copies the row maximum by ≥ margin, exactly.

void repeated_sample(Draw& d, int size, Recipe& r) {
  shape_and_knobs(d, size, r, 6, 0);
  if (r.shape.kv_len < 2) r.shape.kv_len = 2;
}

void repeated_realize(const Recipe& r, Case& c) {
  const CoreShape& s = r.shape;
  const Noise n = r.noise();
  c.core.scale = softmax_scale(s.key_dim);
  const double scale = c.core.scale;
  CoreInputs& in = c.core_inputs;
  const std::int64_t ch = n.index(s.key_dim, Stream::plan, -1);
  constexpr double a = 1.0;
  const double margin = 2.0 + r.knobs[0];
  const double c0 = to_float32((margin + 2.0 * scale * static_cast<double>(s.key_dim - 1)) / (scale * a));
  in.q = tensor4({s.batch, s.q_heads, s.q_len, s.key_dim}, [&](auto b, auto h, auto i, auto d) {
    return d == ch ? a : n.uniform(-1.0, 1.0, Stream::q, b, h, i, d);
  });
  in.k = Tensor({s.batch, s.kv_heads, s.kv_len, s.key_dim});
  const std::int64_t copies =
      s.kv_len < 2 ? 1 : 2 + n.index(std::max<std::int64_t>(s.kv_len / 2 - 1, 1), Stream::plan, -2);
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t g = 0; g < s.kv_heads; ++g) {
      // The copies sit at the `copies` keys of smallest hash: spread, not adjacent.
      std::vector<std::int64_t> order(static_cast<std::size_t>(s.kv_len));
      std::iota(order.begin(), order.end(), 0);
      std::sort(order.begin(), order.end(), [&](std::int64_t x, std::int64_t y) {
        return n.bits(Stream::plan, b, g, x) < n.bits(Stream::plan, b, g, y);
      });
      std::vector<bool> is_copy(static_cast<std::size_t>(s.kv_len), false);
      for (std::int64_t m = 0; m < copies; ++m)
        is_copy[static_cast<std::size_t>(order[static_cast<std::size_t>(m)])] = true;
      for (std::int64_t j = 0; j < s.kv_len; ++j)
        for (std::int64_t d = 0; d < s.key_dim; ++d) {
          const bool copy = is_copy[static_cast<std::size_t>(j)];
          in.k.at(b, g, j, d) =
              d == ch ? (copy ? c0 : 0.0) : to_float32(n.uniform(-1.0, 1.0, Stream::k, b, g, copy ? -1 : j, d));
        }
    }
  // Same-sign values in even channels, so rounding bias adds up instead of cancelling.
  in.v = tensor4({s.batch, s.kv_heads, s.kv_len, s.value_dim}, [&](auto b, auto g, auto j, auto d) {
    return n.normal(Stream::v, b, g, j, d) + (d % 2 == 0 ? 1.0 : 0.0);
  });
}

// ---- common_offset ----

void offset_sample(Draw& d, int size, Recipe& r) { shape_and_knobs(d, size, r, 10, 0); }

void offset_realize(const Recipe& r, Case& c) {
  const CoreShape& s = r.shape;
  const Noise n = r.noise();
  c.core.scale = softmax_scale(s.key_dim);
  c.core_inputs = gaussian_inputs(r, 1.0);
  const double level = 16.0 * std::exp2(r.knobs[0] / 2.0);  // 16 .. 512
  Tensor& k = c.core_inputs.k;
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t g = 0; g < s.kv_heads; ++g)
      for (std::int64_t d = 0; d < s.key_dim; ++d) {
        const double sign = (n.bits(Stream::plan, b, g, d) & 1) ? -1.0 : 1.0;
        const double offset = sign * level * (1.0 + 0.5 * n.unit(Stream::plan, b, g, d, 1));
        for (std::int64_t j = 0; j < s.kv_len; ++j) k.at(b, g, j, d) = to_float32(k.at(b, g, j, d) + offset);
      }
}

}  // namespace

std::vector<FamilyImpl> score_families() {
  std::vector<FamilyImpl> out;
  out.push_back({.name = "large_logits", .sample = large_sample, .realize = large_realize});
  out.push_back({.name = "near_ties", .sample = ties_sample, .realize = ties_realize});
  out.push_back({.name = "dominant_key", .sample = dominant_sample, .realize = dominant_realize});
  out.push_back({.name = "attention_sink", .sample = sink_sample, .realize = sink_realize});
  out.push_back({.name = "repeated_maxima", .sample = repeated_sample, .realize = repeated_realize});
  out.push_back({.name = "common_offset", .sample = offset_sample, .realize = offset_realize});
  return out;
}

}  // namespace headroom::generate_internal
