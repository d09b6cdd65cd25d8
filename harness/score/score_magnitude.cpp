// headroom — the score magnitude of each output row, for conditioning-aware budgets (scores.h).
//
// Softmax is ill-conditioned in its arguments: an absolute error δ in every
// score z_j moves p_j by a relative e^{±2δ} − 1 ≈ ±2δ, so the output moves by up
// to 2δ·Σ_j p_j|v_j|. A kernel forming z_j = s·Σ_d q_d k_jd + bias_j in
// arithmetic of unit roundoff u_s makes δ ≤ γ_m(u_s)·(|s|·Σ_d |q_d||k_jd| + |bias_j|)
// with m = Dk + 1 roundings (Higham 2002, §3.1, for the dot product; one more
// for the scale and the bias). Large logits or a large offset shared by every
// key (softmax-invariant, yet rounded) thus cost accuracy however well the rest
// is done; the budget (budget.h) adds that term per row.
#include <algorithm>
#include <cmath>

#include "headroom/scores.h"

namespace headroom {
namespace {

// Z for query row i of head h in batch b, given |q| of that row and |K| of its head.
double row_magnitude(const CoreProblem& p, std::int64_t b, std::int64_t h, std::int64_t i,
                     const std::vector<double>& q_abs, const Tensor& k_abs, std::int64_t g) {
  const auto& s = p.shape;
  double z = 0;
  for (std::int64_t j = 0; j < s.kv_len; ++j) {
    if (!p.mask.visible(s, b, h, i, j)) continue;
    double dot = 0;
    for (std::int64_t d = 0; d < s.key_dim; ++d) dot += q_abs[static_cast<std::size_t>(d)] * k_abs.at(b, g, j, d);
    const double bias = p.mask.kind == MaskKind::bias ? std::fabs(p.mask.bias_at(b, h, i, j)) : 0.0;
    z = std::max(z, std::fabs(static_cast<double>(p.scale)) * dot + bias);
  }
  // A sink logit enters exp(σ − m) like a score (a soft cap only shrinks the
  // scores, and c·tanh(x/c) is 1-Lipschitz, so |x| still bounds its error).
  if (p.has_sinks()) z = std::max(z, std::fabs(static_cast<double>(p.sinks[static_cast<std::size_t>(h)])));
  return z;
}

Tensor absolute(const Tensor& t) {
  Tensor a = t;
  for (double& x : a.values) x = std::fabs(x);
  return a;
}

// |X|·|W| + |b| into [B, heads, T, dim]: the magnitude of a projection's terms.
Tensor projected_abs(const Tensor& x, const Tensor& w, const Tensor& bias, std::int64_t batch, std::int64_t len,
                     std::int64_t model_dim, std::int64_t heads, std::int64_t dim) {
  Tensor out({batch, heads, len, dim});
  const std::int64_t cols = heads * dim;
  for (std::int64_t b = 0; b < batch; ++b)
    for (std::int64_t t = 0; t < len; ++t)
      for (std::int64_t c = 0; c < cols; ++c) {
        double acc = bias.values.empty() ? 0.0 : std::fabs(bias.values[static_cast<std::size_t>(c)]);
        for (std::int64_t m = 0; m < model_dim; ++m)
          acc += std::fabs(x.at(b, t, m)) * std::fabs(w.values[static_cast<std::size_t>(m * cols + c)]);
        out.at(b, c / dim, t, c % dim) = acc;
      }
  return out;
}

}  // namespace

void condition_on_scores(CaseScore& s, const Case& c) {
  s.row_score_magnitude.clear();
  if (c.level == Level::core) {
    const CoreProblem& p = c.core;
    const auto& sh = p.shape;
    const Tensor k_abs = absolute(c.core_inputs.k);
    std::vector<double> q_abs(static_cast<std::size_t>(sh.key_dim));
    s.row_score_magnitude.reserve(static_cast<std::size_t>(sh.batch * sh.q_heads * sh.q_len));
    for (std::int64_t b = 0; b < sh.batch; ++b)
      for (std::int64_t h = 0; h < sh.q_heads; ++h)
        for (std::int64_t i = 0; i < sh.q_len; ++i) {
          for (std::int64_t d = 0; d < sh.key_dim; ++d)
            q_abs[static_cast<std::size_t>(d)] = std::fabs(c.core_inputs.q.at(b, h, i, d));
          s.row_score_magnitude.push_back(row_magnitude(p, b, h, i, q_abs, k_abs, kv_head_of(sh, h)));
        }
    s.score_terms = sh.key_dim + 1;
    return;
  }
  const BlockShape& bs = c.block.shape;
  const BlockInputs& in = c.block_inputs;
  const CoreProblem p{bs.core(), c.block.scale, c.block.mask};
  const Tensor q_abs = projected_abs(in.x_q, in.w_q, in.b_q, bs.batch, bs.q_len, bs.model_dim, bs.q_heads, bs.key_dim);
  const Tensor k_abs = projected_abs(in.x_kv, in.w_k, in.b_k, bs.batch, bs.kv_len, bs.model_dim, bs.kv_heads, bs.key_dim);
  std::vector<double> row(static_cast<std::size_t>(bs.key_dim));
  s.row_score_magnitude.assign(static_cast<std::size_t>(bs.batch * bs.q_len), 0.0);
  for (std::int64_t b = 0; b < bs.batch; ++b)
    for (std::int64_t h = 0; h < bs.q_heads; ++h)
      for (std::int64_t i = 0; i < bs.q_len; ++i) {
        for (std::int64_t d = 0; d < bs.key_dim; ++d) row[static_cast<std::size_t>(d)] = q_abs.at(b, h, i, d);
        double& z = s.row_score_magnitude[static_cast<std::size_t>(b * bs.q_len + i)];
        z = std::max(z, row_magnitude(p, b, h, i, row, k_abs, kv_head_of(p.shape, h)));
      }
  s.score_terms = bs.key_dim + bs.model_dim + 1;
}

}  // namespace headroom
