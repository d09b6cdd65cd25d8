// headroom kernels — the row loop shared by the 16-bit-storage, float32-accumulation
// kernels (f16_f32acc, bf16_f32acc); only the storage format differs.
//
// Method: as a half-precision tensor-core kernel does it. Q, K, V arrive as
// 16-bit patterns and widen exactly to float32; scores s·(q·k) + bias, their
// maximum, exp and the normaliser l = Σ_j p_j are float32. Before the PV
// product the probabilities are rounded to the storage format (the matrix unit
// takes 16-bit operands), and PV accumulates in float32; l keeps the unrounded
// p_j (as the FlashAttention-2 code does, from memory: the row sum is taken
// from the float32 scores tile before its conversion). The output is rounded once
// to the storage format. Masked keys are never read; a fully masked row gets
// zeros and log-sum-exp −inf.
//
// Error: each rounded p_j carries a relative error ≤ u (2^-11 binary16, 2^-8
// bfloat16), so |o − o*| ≲ (u + γ_n(float32) + small) · Σ_j p_j|v_j|, plus
// the final rounding u·|o|.
#pragma once

#include <cmath>
#include <vector>

#include "common.h"
#include "score_features.h"

namespace hr_kernels {

/// Runs the kernel above with storage format `format`; `round_p` rounds a
/// float32 probability to that format. Returns: HR_OK, or HR_UNSUPPORTED when
/// the problem's formats or mask kind are not the declared ones.
template <float (*round_p)(float)>
std::int32_t run_half_f32acc(const hr_core_problem* p, std::int32_t format) {
  const MaskView mask(*p);
  const ScoreFeatures score(*p);
  if (!formats_are(*p, format, format) || !mask.known()) return HR_UNSUPPORTED;
  std::vector<float> q(p->key_dim), k(p->key_dim), v(p->value_dim), z(p->kv_len), acc(p->value_dim);
  for (std::int64_t b = 0; b < p->batch; ++b) {
    for (std::int64_t h = 0; h < p->q_heads; ++h) {
      const std::int64_t g = kv_head(h, p->q_heads, p->kv_heads);
      for (std::int64_t i = 0; i < p->q_len; ++i) {
        load_row(p->q, b, h, i, p->key_dim, q.data());
        float m = kNegInf;
        for (std::int64_t j = 0; j < p->kv_len; ++j) {
          z[j] = kNegInf;
          if (!mask.visible(b, h, i, j)) continue;
          load_row(p->k, b, g, j, p->key_dim, k.data());
          z[j] = score.cap(p->scale * dot(q.data(), k.data(), p->key_dim)) + mask.bias(b, h, i, j);
          m = std::max(m, z[j]);
        }
        if (!(m > kNegInf)) {
          write_masked_row(*p, b, h, i);
          continue;
        }
        float l = 0.0f;
        std::fill(acc.begin(), acc.end(), 0.0f);
        for (std::int64_t j = 0; j < p->kv_len; ++j) {
          const float e = std::exp(z[j] - m);
          if (e == 0.0f) continue;
          l += e;
          const float e_rounded = round_p(e);
          load_row(p->v, b, g, j, p->value_dim, v.data());
          for (std::int64_t d = 0; d < p->value_dim; ++d) acc[d] += e_rounded * v[d];
        }
        // The sink joins in float32 after P is rounded, so the rounded
        // probabilities stay relative to the keys' own maximum: a dominant
        // sink would push them all below binary16's subnormals otherwise.
        const float alpha = score.fold_sink(h, m, l);
        for (float& a : acc) a *= alpha;
        write_row(*p, b, h, i, acc.data(), m, l);
      }
    }
  }
  return HR_OK;
}

}  // namespace hr_kernels
