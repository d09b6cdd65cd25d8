// headroom flawed specimen — softcap_after_mask: the soft cap applied after the mask, reviving masked keys.
//
// Method: f32_textbook (max shift, exp, normalise, PV, float32), all masks,
// sliding windows, soft caps and sinks (kernel_abi.h version 2).
// DEFECT: the mask is applied first (masked scores set to −inf, the bias
// added) and the cap c·tanh(z/c) after it, to every score. tanh(−inf) = −1, so
// each masked key gets the finite score −c and the weight exp(−c − m) > 0: its
// V row is read and weighted, and a fully masked row averages the masked
// values instead of taking the declared convention (kernel_abi.h asks for
// the cap before the bias and the mask). Without a soft cap every case is
// exactly f32_textbook's.
// Expected fault: mask_leak.
#include <cmath>
#include <vector>

#include "../common.h"
#include "../kernel_list.h"
#include "../score_features.h"

namespace hr_kernels {
namespace {

std::int32_t run(const hr_core_problem* p) {
  const MaskView mask(*p);
  const ScoreFeatures score(*p);
  if (!formats_are(*p, HR_FORMAT_FLOAT32, HR_FORMAT_FLOAT32) || !mask.known()) return HR_UNSUPPORTED;
  std::vector<float> q(p->key_dim), k(p->key_dim), v(p->value_dim), z(p->kv_len), acc(p->value_dim);
  for (std::int64_t b = 0; b < p->batch; ++b) {
    for (std::int64_t h = 0; h < p->q_heads; ++h) {
      const std::int64_t g = kv_head(h, p->q_heads, p->kv_heads);
      for (std::int64_t i = 0; i < p->q_len; ++i) {
        load_row(p->q, b, h, i, p->key_dim, q.data());
        float m = kNegInf;
        for (std::int64_t j = 0; j < p->kv_len; ++j) {
          z[j] = kNegInf;
          if (mask.visible(b, h, i, j)) {
            load_row(p->k, b, g, j, p->key_dim, k.data());
            z[j] = p->scale * dot(q.data(), k.data(), p->key_dim) + mask.bias(b, h, i, j);
          }
          z[j] = score.cap(z[j]);  // the defect: after the mask, so −inf becomes −c
          m = std::max(m, z[j]);
        }
        if (!(m > kNegInf)) {
          write_masked_row(*p, b, h, i);
          continue;
        }
        m = score.with_sink(h, m);
        float l = score.sink_weight(h, m);
        std::fill(acc.begin(), acc.end(), 0.0f);
        for (std::int64_t j = 0; j < p->kv_len; ++j) {
          const float e = std::exp(z[j] - m);
          if (e == 0.0f) continue;
          l += e;
          load_row(p->v, b, g, j, p->value_dim, v.data());
          for (std::int64_t d = 0; d < p->value_dim; ++d) acc[d] += e * v[d];
        }
        write_row(*p, b, h, i, acc.data(), m, l);
      }
    }
  }
  return HR_OK;
}

}  // namespace

const hr_kernel softcap_after_mask = [] {
  hr_kernel k = f32_textbook;
  k.name = "softcap_after_mask";
  k.description = "float32 textbook attention that soft-caps the masked scores, so masked keys get weight exp(-c - m)";
  k.run_core = run;
  return k;
}();

}  // namespace hr_kernels
