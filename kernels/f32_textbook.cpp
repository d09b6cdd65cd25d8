// headroom kernels — f32_textbook: softmax attention as the textbook writes it, in float32.
//
// Method (Vaswani et al. 2017, eq. 1, with the usual max shift): for each query
// row, materialise the scaled scores z_j = s·(q·k_j) + bias_j of the visible
// keys, subtract their maximum m so every exponent is ≤ 0 and exp cannot
// overflow, exponentiate, and return Σ_j p_j v_j / Σ_j p_j with the log-sum-exp
// m + log Σ_j p_j. Everything in float32, sums in key order. Masked keys are
// never read, so whatever lies in masked K/V rows cannot reach the output.
// A row with no visible key gets zeros and log-sum-exp −inf.
//
// The sums are taken 64 keys at a time, each block's then added to the total
// (blocked summation, Higham 2002 §4.2): one running sum stagnates on a long
// row dominated by one key — once l ≈ 1, weights below half its ulp round away,
// all in one direction — and the default budget fails that from Tk ≈ 4096 on
// the attention_sink family (docs/reports.md, "Error growth").
#include <cmath>
#include <vector>

#include "common.h"
#include "score_features.h"
#include "kernel_list.h"

namespace hr_kernels {
namespace {

constexpr std::int64_t kBlock = 64;  // keys per block of the blocked sums

std::int32_t run(const hr_core_problem* p) {
  const MaskView mask(*p);
  const ScoreFeatures score(*p);
  if (!formats_are(*p, HR_FORMAT_FLOAT32, HR_FORMAT_FLOAT32) || !mask.known()) return HR_UNSUPPORTED;
  std::vector<float> q(p->key_dim), k(p->key_dim), v(p->value_dim), z(p->kv_len), acc(p->value_dim),
      part(p->value_dim);
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
        m = score.with_sink(h, m);
        float l = score.sink_weight(h, m);  // the sink's term, no value row
        std::fill(acc.begin(), acc.end(), 0.0f);
        for (std::int64_t j0 = 0; j0 < p->kv_len; j0 += kBlock) {
          float part_l = 0.0f;
          std::fill(part.begin(), part.end(), 0.0f);
          for (std::int64_t j = j0; j < std::min(j0 + kBlock, p->kv_len); ++j) {
            const float e = std::exp(z[j] - m);
            if (e == 0.0f) continue;  // masked (or underflowed): V row not read
            part_l += e;
            load_row(p->v, b, g, j, p->value_dim, v.data());
            for (std::int64_t d = 0; d < p->value_dim; ++d) part[d] += e * v[d];
          }
          l += part_l;
          for (std::int64_t d = 0; d < p->value_dim; ++d) acc[d] += part[d];
        }
        write_row(*p, b, h, i, acc.data(), m, l);
      }
    }
  }
  return HR_OK;
}

}  // namespace

const hr_kernel f32_textbook = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "f32_textbook",
    .description = "float32, scores materialised per row, max shift, exp, normalise, PV in key order, 64 keys a block",
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
    // MaskView(*p) applies the sliding window, ScoreFeatures the soft cap and sinks
    .features = HR_FEATURE_WINDOW | HR_FEATURE_SOFTCAP | HR_FEATURE_SINKS,
};

}  // namespace hr_kernels
