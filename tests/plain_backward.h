// headroom tests — a plain double-precision attention backward from the published formulas.
//
// Dao et al. 2022, Alg. 4: P from a max-shifted softmax of the received
// values, D_i = Σ_j P_ij dP_ij, dS = P ∘ (dP − D); grouped-query dK, dV sum
// over the group. Enough to show gradients come back in the right places;
// their accuracy against the certified reference is the score stage's.
#pragma once

#include <algorithm>
#include <cmath>
#include <vector>

#include "headroom/case.h"

namespace headroom::testing {

struct Grads {
  Tensor d_q, d_k, d_v;
  Tensor d_s;  ///< [B, Hq, Tq, Tk]: dS = d(bias) per query head
};
inline Grads plain_backward(const Case& c) {
  const CoreShape& s = c.core.shape;
  const CoreInputs& in = c.core_inputs;
  Grads g{Tensor({s.batch, s.q_heads, s.q_len, s.key_dim}), Tensor({s.batch, s.kv_heads, s.kv_len, s.key_dim}),
          Tensor({s.batch, s.kv_heads, s.kv_len, s.value_dim}), Tensor({s.batch, s.q_heads, s.q_len, s.kv_len})};
  const double sc = c.core.scale;
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < s.q_heads; ++h) {
      const std::int64_t kv = kv_head_of(s, h);
      for (std::int64_t i = 0; i < s.q_len; ++i) {
        std::vector<double> z(static_cast<std::size_t>(s.kv_len), -INFINITY);
        double m = -INFINITY;
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          if (!c.core.mask.visible(s, b, h, i, j)) continue;
          double dot = 0;
          for (std::int64_t d = 0; d < s.key_dim; ++d) dot += in.q.at(b, h, i, d) * in.k.at(b, kv, j, d);
          z[static_cast<std::size_t>(j)] = sc * dot + c.core.mask.bias_at(b, h, i, j);
          m = std::max(m, z[static_cast<std::size_t>(j)]);
        }
        if (m == -INFINITY) continue;
        double sum = 0;
        for (double& x : z) sum += (x = std::exp(x - m));
        std::vector<double> dp(z.size());
        double delta = 0;
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          const auto ju = static_cast<std::size_t>(j);
          z[ju] /= sum;
          for (std::int64_t d = 0; d < s.value_dim; ++d) dp[ju] += c.d_o.at(b, h, i, d) * in.v.at(b, kv, j, d);
          delta += z[ju] * dp[ju];
        }
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          const auto ju = static_cast<std::size_t>(j);
          const double ds = z[ju] * (dp[ju] - delta);
          g.d_s.at(b, h, i, j) = ds;
          for (std::int64_t d = 0; d < s.value_dim; ++d) g.d_v.at(b, kv, j, d) += z[ju] * c.d_o.at(b, h, i, d);
          for (std::int64_t d = 0; d < s.key_dim; ++d) {
            g.d_q.at(b, h, i, d) += sc * ds * in.k.at(b, kv, j, d);
            g.d_k.at(b, kv, j, d) += sc * ds * in.q.at(b, h, i, d);
          }
        }
      }
    }
  return g;
}

}  // namespace headroom::testing
