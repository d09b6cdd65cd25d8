// headroom — what rounding the probabilities to 8 bits costs (scores.h, p_rounded_attention).
//
// A model, not a certified reference: the attention of the received inputs in
// double with each normalised weight p_j rounded as a kernel declaring p_quant
// rounds it, p_j ← decode(fp8(p_j·p_scale)) / p_scale. Double arithmetic is
// ~2^-50 relative, far below the 2^-4 (E4M3) or 2^-3 (E5M2) being measured, so
// scoring the model against the certified reference of the same inputs gives
// what P rounding alone costs, in the same units as the kernel's own error.
#include <cmath>
#include <limits>
#include <vector>

#include "headroom/fp8.h"
#include "headroom/scores.h"

namespace headroom {

Tensor p_rounded_attention(const CoreProblem& p, const CoreInputs& in, Format p_format, float p_scale, bool saturating) {
  const CoreShape& s = p.shape;
  const Fp8Kind kind = p_format == Format::e5m2 ? Fp8Kind::e5m2 : Fp8Kind::e4m3;
  Tensor out({s.batch, s.q_heads, s.q_len, s.value_dim});
  std::vector<double> z(static_cast<std::size_t>(s.kv_len));
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i) {
        const std::int64_t g = kv_head_of(s, h);
        double m = -std::numeric_limits<double>::infinity();
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          z[static_cast<std::size_t>(j)] = -std::numeric_limits<double>::infinity();
          if (!p.mask.visible(s, b, h, i, j)) continue;
          double dot = 0;
          for (std::int64_t d = 0; d < s.key_dim; ++d) dot += in.q.at(b, h, i, d) * in.k.at(b, g, j, d);
          const double zj = static_cast<double>(p.scale) * dot + p.mask.bias_at(b, h, i, j);
          z[static_cast<std::size_t>(j)] = zj;
          m = std::fmax(m, zj);
        }
        if (!(m > -std::numeric_limits<double>::infinity())) continue;  // fully masked: not scored
        double l = 0;
        for (double zj : z) l += std::exp(zj - m);
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          const double pj = std::exp(z[static_cast<std::size_t>(j)] - m) / l;
          if (pj == 0) continue;
          const double w = round_to_fp8(pj * p_scale, kind, saturating) / p_scale;
          for (std::int64_t d = 0; d < s.value_dim; ++d) out.at(b, h, i, d) += w * in.v.at(b, g, j, d);
        }
      }
  return out;
}

}  // namespace headroom
