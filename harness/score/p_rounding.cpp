// headroom — what rounding the probabilities to 8 bits costs (scores.h,
// p_rounded_attention), and what its underflow may cost (condition_on_p_rounding).
//
// A model, not a certified reference: the attention of the received inputs in
// double with each normalised weight p_j rounded as a kernel declaring p_quant
// rounds it, p_j ← decode(fp8(p_j·p_scale)) / p_scale. Double arithmetic is
// ~2^-50 relative, far below the 2^-4 (E4M3) or 2^-3 (E5M2) being measured, so
// scoring the model against the certified reference of the same inputs gives
// what P rounding alone costs, in the same units as the kernel's own error.
#include <algorithm>
#include <cmath>
#include <limits>
#include <vector>

#include "headroom/fp8.h"
#include "headroom/scores.h"

namespace headroom {
namespace {

constexpr double kNegInf = -std::numeric_limits<double>::infinity();

Fp8Kind kind_of(Format f) { return f == Format::e5m2 ? Fp8Kind::e5m2 : Fp8Kind::e4m3; }

// The normalised weights p_j of row (b, h, i) in double, 0 where masked; false
// for a fully masked row (no weights).
bool row_weights(const CoreProblem& p, const CoreInputs& in, std::int64_t b, std::int64_t h, std::int64_t i,
                 std::vector<double>& w) {
  const CoreShape& s = p.shape;
  const std::int64_t g = kv_head_of(s, h);
  double m = kNegInf;
  for (std::int64_t j = 0; j < s.kv_len; ++j) {
    double& zj = w[static_cast<std::size_t>(j)];
    zj = kNegInf;
    if (!p.mask.visible(s, b, h, i, j)) continue;
    double dot = 0;
    for (std::int64_t d = 0; d < s.key_dim; ++d) dot += in.q.at(b, h, i, d) * in.k.at(b, g, j, d);
    zj = static_cast<double>(p.scale) * dot + p.mask.bias_at(b, h, i, j);
    m = std::fmax(m, zj);
  }
  if (!(m > kNegInf)) return false;
  double l = 0;
  for (double& zj : w) l += (zj = std::exp(zj - m));
  for (double& e : w) e /= l;
  return true;
}

}  // namespace

Tensor p_rounded_attention(const CoreProblem& p, const CoreInputs& in, Format p_format, float p_scale, bool saturating) {
  const CoreShape& s = p.shape;
  Tensor out({s.batch, s.q_heads, s.q_len, s.value_dim});
  std::vector<double> w(static_cast<std::size_t>(s.kv_len));
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i) {
        if (!row_weights(p, in, b, h, i, w)) continue;  // fully masked: not scored
        const std::int64_t g = kv_head_of(s, h);
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          const double pj = w[static_cast<std::size_t>(j)];
          if (pj == 0) continue;
          const double r = round_to_fp8(pj * p_scale, kind_of(p_format), saturating) / p_scale;
          for (std::int64_t d = 0; d < s.value_dim; ++d) out.at(b, h, i, d) += r * in.v.at(b, g, j, d);
        }
      }
  return out;
}

void condition_on_p_rounding(CaseScore& s, const Case& received, Format p_format, float p_scale) {
  s.row_p_floor.clear();
  if (received.level != Level::core) return;
  const CoreProblem& p = received.core;
  const CoreInputs& in = received.core_inputs;
  const CoreShape& sh = p.shape;
  const double smallest = p_format == Format::e5m2 ? kE5m2MinSubnormal : kE4m3MinSubnormal;
  const double eta = smallest / 2 / static_cast<double>(p_scale);
  std::vector<double> w(static_cast<std::size_t>(sh.kv_len));
  s.row_p_floor.reserve(static_cast<std::size_t>(sh.batch * sh.q_heads * sh.q_len));
  for (std::int64_t b = 0; b < sh.batch; ++b)
    for (std::int64_t h = 0; h < sh.q_heads; ++h)
      for (std::int64_t i = 0; i < sh.q_len; ++i) {
        double worst = 0;
        if (row_weights(p, in, b, h, i, w)) {
          const std::int64_t g = kv_head_of(sh, h);
          double visible = 0;
          for (std::int64_t j = 0; j < sh.kv_len; ++j) visible += p.mask.visible(sh, b, h, i, j) ? 1 : 0;
          for (std::int64_t d = 0; d < sh.value_dim; ++d) {
            double abs_sum = 0, magnitude = 0;
            for (std::int64_t j = 0; j < sh.kv_len; ++j) {
              if (!p.mask.visible(sh, b, h, i, j)) continue;
              const double v = std::fabs(in.v.at(b, g, j, d));
              abs_sum += v;
              magnitude += w[static_cast<std::size_t>(j)] * v;
            }
            if (magnitude > 0) worst = std::max(worst, eta * (abs_sum / magnitude + visible) / s.unit_roundoff);
          }
        }
        s.row_p_floor.push_back(worst);
      }
}

}  // namespace headroom
