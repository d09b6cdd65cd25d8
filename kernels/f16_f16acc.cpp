// headroom kernels — f16_f16acc: binary16 storage, binary16 accumulation of PV.
//
// Method: QKᵀ is accumulated in float32 on the binary16 inputs (as tensor-core
// kernels do) and scaled, z_j = s·(q·k_j) + bias_j, so scores cannot overflow
// binary16's 65504. The softmax statistics (maximum, exp, normaliser) are
// float32, as half-precision kernels keep them, in a first pass. PV is where
// binary16 shows: in a second pass each normalised weight p_j = e_j / l is
// rounded to binary16 and every multiply and add of PV is done in float32 on
// binary16 values and rounded straight back to binary16, which makes each one
// correctly rounded binary16 arithmetic (24 ≥ 2·11 + 2, Figueroa 1995). The
// accumulator holds a convex combination of V rows, so it cannot overflow
// where the output does not; accumulating the unnormalised weights e_j ≤ 1
// did, to −inf, on format_edges rows at Tk 8192 whose output was −661
// (`headroom qualify --kernel f16_f16acc --family format_edges --shape
// 1,8,1,4,8192,128,128`). Masked keys are never read; a fully masked row gets
// zeros and log-sum-exp −inf.
//
// Error: a binary16 sum of n terms is off by up to γ_n·Σ|terms| (Higham 2002,
// §3.1), u = 2^-11; so the PV error is ≲ Tk·u·Σ_j p_j|v_j| in the worst case,
// about √Tk·u typically (Higham & Mary 2019).
#include <cmath>
#include <vector>

#include "common.h"
#include "kernel_list.h"

namespace hr_kernels {
namespace {

std::int32_t run(const hr_core_problem* p) {
  const MaskView mask(*p);
  if (!formats_are(*p, HR_FORMAT_BINARY16, HR_FORMAT_BINARY16) || !mask.known()) return HR_UNSUPPORTED;
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
          float s = 0.0f;
          for (std::int64_t d = 0; d < p->key_dim; ++d) s += q[d] * k[d];
          z[j] = p->scale * s + mask.bias(b, h, i, j);
          m = std::max(m, z[j]);
        }
        if (!(m > kNegInf)) {
          write_masked_row(*p, b, h, i);
          continue;
        }
        // Pass 1: the normaliser, in float32, 64 keys a block (one running sum
        // stagnates on long rows dominated by one key).
        float l = 0.0f;
        for (std::int64_t j0 = 0; j0 < p->kv_len; j0 += 64) {
          float part = 0.0f;
          for (std::int64_t j = j0; j < std::min<std::int64_t>(j0 + 64, p->kv_len); ++j) {
            z[j] = std::exp(z[j] - m);  // z now holds the weights e_j
            part += z[j];
          }
          l += part;
        }
        // Pass 2: PV in binary16 on the normalised weights.
        std::fill(acc.begin(), acc.end(), 0.0f);
        for (std::int64_t j = 0; j < p->kv_len; ++j) {
          if (z[j] == 0.0f) continue;  // masked (or underflowed): V row not read
          const float p16 = round_binary16(z[j] / l);
          load_row(p->v, b, g, j, p->value_dim, v.data());
          for (std::int64_t d = 0; d < p->value_dim; ++d) acc[d] = round_binary16(acc[d] + round_binary16(p16 * v[d]));
        }
        for (std::int64_t d = 0; d < p->value_dim; ++d) store(p->o, b, h, i, d, acc[d]);
        if (float* out = lse_at(*p, b, h, i)) *out = m + std::log(l);
      }
    }
  }
  return HR_OK;
}

}  // namespace

const hr_kernel f16_f16acc = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "f16_f16acc",
    .description = "binary16 storage, float32 QK^T and softmax, PV accumulated in binary16",
    .level = HR_LEVEL_CORE,
    .input_format = HR_FORMAT_BINARY16,
    .output_format = HR_FORMAT_BINARY16,
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
    .features = HR_FEATURE_WINDOW,  // MaskView(*p) applies the sliding window
};

}  // namespace hr_kernels
