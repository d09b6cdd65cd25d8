// headroom — gradient_cancellation: near-one-hot rows whose D_i cancels against dP (families.h).
//
// The backward (docs/backward.md) computes dS_ij = P_ij (dP_ij − D_i) with
// D_i = Σ_j P_ij dP_ij. Where one key j* takes nearly all of row i's weight,
// D_i − dP_ij* = Σ_{j≠j*} P_ij (dP_ij − dP_ij*) is a sliver of either term:
// dS_ij* is the difference of two nearly equal numbers, and a backward that
// forms D_i from a slightly wrong O (or rounds it early) gets it wrong in its
// leading digits. With dO aligned with V_j* that cancellation happens at full
// size: |D_i| ≈ Σ_d |dO_id||V_j*d| rather than near 0 by chance.
#include <cmath>

#include "headroom/upstream_gradient.h"
#include "recipe.h"

namespace headroom::generate_internal {
namespace {

MaskKind cancel_mask(Draw& d) {
  return d.pick({MaskKind::none, MaskKind::causal_top_left, MaskKind::causal_bottom_right, MaskKind::key_padding,
                 MaskKind::dense, MaskKind::bias});
}

// knob 0: the dO kind (0 aligned with V_j*, 1..4 the kinds of upstream_gradient.h);
// knob 1: the lead's margin above ln Tk, 8 + knob.
void cancel_sample(Draw& d, int size, Recipe& r) {
  r.shape = sample_core_shape(d, size);
  // Groups of 8 query heads per key/value head (grouped-query attention as
  // shipped; sample_core_shape stops at 4): dK and dV sum over 8 heads.
  if (size >= 30 && d.chance(2)) r.shape.q_heads = 8 * r.shape.kv_heads;
  r.knobs[0] = d.uniform_int(0, 4);
  r.knobs[1] = d.uniform_int(0, 8);
}

void cancel_realize(const Recipe& r, Case& c) {
  const CoreShape& s = r.shape;
  const Noise n = r.noise();
  c.core.scale = softmax_scale(s.key_dim);
  c.core_inputs = gaussian_inputs(r, 1.0);
  CoreInputs& in = c.core_inputs;
  const Mask& mask = c.core.mask;
  const std::int64_t group = s.q_heads / s.kv_heads;
  // The lead key: key 0 under causal and key-padding masks (plain masks show it
  // to every row that sees any key), else drawn per (batch, kv head).
  const bool at_zero = mask.kind == MaskKind::causal_top_left || mask.kind == MaskKind::causal_bottom_right ||
                       mask.kind == MaskKind::key_padding;
  // Through channel ch every query holds a, the lead c0 and every other key 0,
  // so the lead's score exceeds the others' by s·a·c0 plus O(1) noise from the
  // other channels. The margin grows with ln Tk so the other keys' total
  // weight, about Tk·e^-margin, stays near e^-(8 + knob) on long rows.
  const std::int64_t ch = n.index(s.key_dim, Stream::plan, -1);
  constexpr double a = 4.0;
  const double margin = 8.0 + r.knobs[1] + std::log(static_cast<double>(s.kv_len));
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i) in.q.at(b, h, i, ch) = a;
  std::vector<std::int64_t> lead(static_cast<std::size_t>(s.batch * s.kv_heads));
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t g = 0; g < s.kv_heads; ++g) {
      const std::int64_t l = at_zero ? 0 : n.index(s.kv_len, Stream::plan, b, g);
      lead[static_cast<std::size_t>(b * s.kv_heads + g)] = l;
      // A bias mask can favour another key by up to its spread (linear
      // position biases reach −Tk/2): the lead's margin covers the largest gap.
      double lift = 0;
      if (mask.kind == MaskKind::bias)
        for (std::int64_t h = g * group; h < (g + 1) * group; ++h)
          for (std::int64_t i = 0; i < s.q_len; ++i) {
            const double at_lead = mask.bias_at(b, h, i, l);
            if (!std::isfinite(at_lead)) continue;
            for (std::int64_t j = 0; j < s.kv_len; ++j) {
              const double gap = mask.bias_at(b, h, i, j) - at_lead;
              if (std::isfinite(gap)) lift = std::max(lift, gap);
            }
          }
      const double c0 = to_float32((margin + lift) / (static_cast<double>(c.core.scale) * a));
      for (std::int64_t j = 0; j < s.kv_len; ++j) in.k.at(b, g, j, ch) = j == l ? c0 : 0.0;
      // The lead's value: entries ±[1, 2), so |V_j*|² ≥ Dv is not small by chance.
      for (std::int64_t d = 0; d < s.value_dim; ++d)
        in.v.at(b, g, l, d) = to_float32(((n.bits(Stream::v, b, g, l, d, 1) & 1) ? -1.0 : 1.0) *
                                         n.uniform(1.0, 2.0, Stream::v, b, g, l, d));
    }
  if (r.knobs[0] == 0) {
    // dO_i = ±V_j* + 2^-4·N(0, 1): D_i ≈ dP_ij* ≈ ±|V_j*|², both large.
    c.d_o = tensor4({s.batch, s.q_heads, s.q_len, s.value_dim}, [&](auto b, auto h, auto i, auto d) {
      const std::int64_t l = lead[static_cast<std::size_t>(b * s.kv_heads + h / group)];
      const double sign = (n.bits(Stream::d_o, b, h, i, -1) & 1) ? -1.0 : 1.0;
      return sign * in.v.at(b, h / group, l, d) + 0x1p-4 * n.normal(Stream::d_o, b, h, i, d);
    });
  } else {
    c.d_o = upstream_gradient(s, kUpstreamKinds[r.knobs[0] - 1], r.value_seed);
  }
}

}  // namespace

std::vector<FamilyImpl> gradient_families() {
  return {{.name = "gradient_cancellation", .choose_mask = cancel_mask, .sample = cancel_sample,
           .realize = cancel_realize}};
}

}  // namespace headroom::generate_internal
