// headroom — what rounding the probabilities to 8 bits costs (scores.h,
// p_rounded_attention), and what its underflow may cost (condition_on_p_rounding).
//
// The underflow bound (OFP8 rev 1.0 limits, fp8.h). A kernel rounds w = p_j·p_scale
// (normalised weights) or w = P̃_j·p_scale with P̃_j = p_j·ℓ/c ≥ p_j (online
// tiles: ℓ ≥ 1 the normaliser, c ≤ 1 the later rescaling), and the key then
// enters the row as r(w)·c/(p_scale·ℓ). Rounding to nearest gives
// |r(w) − w| ≤ u_P·w when w is normal (w ≥ N, N = 2^-6 E4M3, 2^-14 E5M2), and
// ≤ min(η, w) below N (η half the least subnormal: a weight under η rounds to
// 0, losing w; above it the subnormal spacing 2η bounds the error). In p units
// that is ≤ min(η/p_scale, p_j) =: a_j, and only for p_j·p_scale < N (w ≥
// p_j·p_scale). At p_j·p_scale ≥ N the relative bound covers any absolute
// error ≤ η/p_scale as well (η = u_P·N: the least normal binade has the
// subnormal spacing), so a weight computed slightly off that edge is covered
// either way. Element d of the row then moves by at most Σ_j a_j|v_jd| from the
// rounded numerators, plus (Σ_j a_j)·Σ_j p_j|v_jd| for a kernel normalising by
// the sum of its rounded weights. The former allowance charged η/p_scale to
// every visible key (and n_r·η/p_scale to the normaliser), normal weights
// included: on a row whose exact output is tiny beside Σ_j|v_jd| it allowed
// far more than any such kernel can lose; this one never exceeds 2·2^24 + the
// relative part, what flushing every small weight costs.
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
  // Weights p_j with p_j·p_scale at or above this are normal: their whole error
  // is the relative u_P in the fixed limit (scores.h).
  const double normal_from = (p_format == Format::e5m2 ? kE5m2MinNormal : kE4m3MinNormal) / static_cast<double>(p_scale);
  std::vector<double> w(static_cast<std::size_t>(sh.kv_len)), a_of(w.size());
  s.row_p_floor.reserve(static_cast<std::size_t>(sh.batch * sh.q_heads * sh.q_len));
  for (std::int64_t b = 0; b < sh.batch; ++b)
    for (std::int64_t h = 0; h < sh.q_heads; ++h)
      for (std::int64_t i = 0; i < sh.q_len; ++i) {
        double worst = 0;
        if (row_weights(p, in, b, h, i, w)) {
          const std::int64_t g = kv_head_of(sh, h);
          // a_j = min(η/p_scale, p_j) for the weights below the normal range, 0 for the others.
          double a_sum = 0;
          for (std::int64_t j = 0; j < sh.kv_len; ++j) {
            const double pj = w[static_cast<std::size_t>(j)];
            const double a = p.mask.visible(sh, b, h, i, j) && pj < normal_from ? std::min(eta, pj) : 0.0;
            a_sum += a;
            a_of[static_cast<std::size_t>(j)] = a;
          }
          for (std::int64_t d = 0; d < sh.value_dim; ++d) {
            double lost = 0, magnitude = 0;
            for (std::int64_t j = 0; j < sh.kv_len; ++j) {
              if (!p.mask.visible(sh, b, h, i, j)) continue;
              const double v = std::fabs(in.v.at(b, g, j, d));
              lost += a_of[static_cast<std::size_t>(j)] * v;
              magnitude += w[static_cast<std::size_t>(j)] * v;
            }
            if (magnitude > 0) worst = std::max(worst, (lost / magnitude + a_sum) / s.unit_roundoff);
          }
        }
        s.row_p_floor.push_back(worst);
      }
}

}  // namespace headroom
