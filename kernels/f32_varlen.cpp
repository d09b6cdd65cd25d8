// headroom kernels — f32_varlen: packed variable-length prefill in float32 (varlen_prefill.h).
#include <algorithm>
#include <cmath>
#include <vector>

#include "common.h"
#include "kernel_list.h"
#include "score_features.h"
#include "varlen_prefill.h"

namespace hr_kernels {
namespace {

constexpr std::int64_t kKeyTile = 64;

struct Sequence {
  std::int64_t tensor_b, q0, tq, k0, tk, mask_b;
};

Sequence sequence_of(const hr_core_problem& p, std::int64_t n, std::int64_t key_overrun) {
  if ((p.features & HR_FEATURE_VARLEN) == 0 || p.cu_q_lens == nullptr) return {n, 0, p.q_len, 0, p.kv_len, n};
  const std::int64_t total_kv = p.cu_kv_lens[p.batch];
  const std::int64_t k0 = p.cu_kv_lens[n];
  const std::int64_t k1 = std::min(p.cu_kv_lens[n + 1] + key_overrun, total_kv);
  return {0, p.cu_q_lens[n], p.cu_q_lens[n + 1] - p.cu_q_lens[n], k0, k1 - k0, 0};
}

// Where the log-sum-exp of row i of sequence q goes: [B, Hq, Tq] dense,
// [1, Hq, total] packed (kernel_abi.h).
float* lse_of(const hr_core_problem& p, const Sequence& q, std::int64_t h, std::int64_t i) {
  if (p.lse == nullptr) return nullptr;
  if ((p.features & HR_FEATURE_VARLEN) == 0 || p.cu_q_lens == nullptr) return lse_at(p, q.tensor_b, h, i);
  return p.lse + h * p.cu_q_lens[p.batch] + q.q0 + i;
}

std::int32_t run(const hr_core_problem* p) { return varlen_prefill(p, 0); }

}  // namespace

std::int32_t varlen_prefill(const hr_core_problem* p, std::int64_t key_overrun) {
  const ScoreFeatures score(*p);
  if (!formats_are(*p, HR_FORMAT_FLOAT32, HR_FORMAT_FLOAT32) || !MaskView(*p).known()) return HR_UNSUPPORTED;
  const std::int64_t dk = p->key_dim, dv = p->value_dim;
  std::vector<float> q(dk), k(dk), v(dv), z(kKeyTile), acc(dv), tile_acc(dv);
  for (std::int64_t n = 0; n < p->batch; ++n) {
    const Sequence s = sequence_of(*p, n, key_overrun);
    hr_core_problem local = *p;  // the sequence's own lengths for causal alignment and window
    local.q_len = s.tq;
    local.kv_len = s.tk;
    const MaskView mask(local);
    for (std::int64_t h = 0; h < p->q_heads; ++h) {
      const std::int64_t g = kv_head(h, p->q_heads, p->kv_heads);
      for (std::int64_t i = 0; i < s.tq; ++i) {
        load_row(p->q, s.tensor_b, h, s.q0 + i, dk, q.data());
        float m = kNegInf, l = 0.0f;
        std::fill(acc.begin(), acc.end(), 0.0f);
        const std::int64_t begin = mask.key_begin(s.mask_b, i), end = mask.key_end(s.mask_b, i);
        for (std::int64_t j0 = begin; j0 < end; j0 += kKeyTile) {
          const std::int64_t cols = std::min(kKeyTile, end - j0);
          float tile_max = kNegInf;
          for (std::int64_t c = 0; c < cols; ++c) {
            const std::int64_t j = j0 + c;
            z[c] = kNegInf;
            if (!mask.visible(s.mask_b, h, i, j)) continue;
            load_row(p->k, s.tensor_b, g, s.k0 + j, dk, k.data());
            z[c] = score.cap(p->scale * dot(q.data(), k.data(), dk)) + mask.bias(s.mask_b, h, i, j);
            tile_max = std::max(tile_max, z[c]);
          }
          const float m_new = std::max(m, tile_max);
          if (!(m_new > kNegInf)) continue;
          // The tile's row sum and P·V first, then folded into the running
          // ones (Dao et al. 2022, alg. 1): a weight is never added alone to
          // an l near 1, where weights below half its ulp would round away.
          const float alpha = std::exp(m - m_new);  // 0 on the first visible tile
          float tile_l = 0.0f;
          std::fill(tile_acc.begin(), tile_acc.end(), 0.0f);
          for (std::int64_t c = 0; c < cols; ++c) {
            const float e = std::exp(z[c] - m_new);
            if (e == 0.0f) continue;  // masked: its V row is not read
            tile_l += e;
            load_row(p->v, s.tensor_b, g, s.k0 + j0 + c, dv, v.data());
            for (std::int64_t d = 0; d < dv; ++d) tile_acc[d] += e * v[d];
          }
          l = l * alpha + tile_l;
          for (std::int64_t d = 0; d < dv; ++d) acc[d] = acc[d] * alpha + tile_acc[d];
          m = m_new;
        }
        float* lse = lse_of(*p, s, h, i);
        if (!(m > kNegInf)) {
          for (std::int64_t d = 0; d < dv; ++d) store(p->o, s.tensor_b, h, s.q0 + i, d, 0.0f);
          if (lse != nullptr) *lse = kNegInf;
          continue;
        }
        const float alpha = score.fold_sink(h, m, l);
        for (std::int64_t d = 0; d < dv; ++d) store(p->o, s.tensor_b, h, s.q0 + i, d, acc[d] * alpha / l);
        if (lse != nullptr) *lse = m + std::log(l);
      }
    }
  }
  return HR_OK;
}

const hr_kernel f32_varlen = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "f32_varlen",
    .description = "float32 packed variable-length prefill: per sequence, online softmax over 64-key tiles",
    .level = HR_LEVEL_CORE,
    .input_format = HR_FORMAT_FLOAT32,
    .output_format = HR_FORMAT_FLOAT32,
    .q_quant = {},
    .k_quant = {},
    .v_quant = {},
    .mask_kinds = kAllMasks,
    .masked_row = HR_MASKED_ROW_ZEROS,
    .returns_lse = 1,
    .layouts = kStridedLayouts,
    .max_kv_len = 0,
    .run_core = run,
    .run_block = nullptr,
    .features = HR_FEATURE_VARLEN | HR_FEATURE_WINDOW | HR_FEATURE_SOFTCAP | HR_FEATURE_SINKS,
};

}  // namespace hr_kernels
