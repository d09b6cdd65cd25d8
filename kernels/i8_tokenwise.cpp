// headroom kernels — i8_tokenwise: int8 Q, K, V with per-token symmetric scales.
//
// Method: Q, K, V arrive as int8 codes c with one float32 scale per (b, h, t)
// (kernel_abi.h, HR_QUANT_PER_TOKEN), value = c·scale. QKᵀ is an int32 dot
// product of codes, exact since Dk·127² < 2^31 for Dk < 133 000; the score is
// z_j = (s·sq_i·sk_j)·dot + bias in float32, then a float32 softmax. PV runs
// on 8-bit codes too: the V scale of each token is folded into its probability
// (p̃_j = p_j·sv_j), the row of p̃ is quantised to unsigned 8-bit codes
// a_j = round(p̃_j / sp) with sp = max_j p̃_j / 255, and Σ_j a_j·cv_j is an
// int32 sum, exact while Tk·255·127 < 2^31, hence max_kv_len = 65536. The
// output is float32: o = (sp·acc) / l. Masked keys are never read; a fully
// masked row gets zeros and log-sum-exp −inf.
//
// Error: quantising p̃ costs at most sp/2 per key, so
// |o − o*| ≤ (sp/2)·Σ_j|cv_j| / l, i.e. up to Tk/510 of the row's Σ_j p_j|v_j|
// in the worst case, a few times 1/510 for spread-out rows (the float32 parts
// are far smaller).
#include <cmath>
#include <vector>

#include "common.h"
#include "kernel_list.h"

namespace hr_kernels {
namespace {

constexpr std::int64_t kMaxKvLen = 65536;    // 65536·255·127 < 2^31
constexpr std::int64_t kMaxKeyDim = 133000;  // 133000·127² < 2^31

std::int8_t code(const hr_tensor& t, std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t d) {
  return static_cast<const std::int8_t*>(t.data)[offset(t.strides, b, h, i, d)];
}

// Per-token scale index on [B, H, T, D]: (b·H + h)·T + t (kernel_abi.h, hr_granularity).
float token_scale(const hr_tensor& t, std::int64_t b, std::int64_t h, std::int64_t i) {
  return t.scales[(b * t.extents[1] + h) * t.extents[2] + i];
}

std::int32_t run(const hr_core_problem* p) {
  const MaskView mask(*p);
  const bool symmetric = p->q.zero_points == nullptr && p->k.zero_points == nullptr && p->v.zero_points == nullptr;
  if (!formats_are(*p, HR_FORMAT_INT8, HR_FORMAT_FLOAT32) || !mask.known() || !symmetric || p->kv_len > kMaxKvLen ||
      p->key_dim > kMaxKeyDim) {
    return HR_UNSUPPORTED;
  }
  const std::int64_t dk = p->key_dim, dv = p->value_dim;
  std::vector<float> z(p->kv_len), pv(p->kv_len), out(dv);
  std::vector<std::int32_t> acc(dv);
  for (std::int64_t b = 0; b < p->batch; ++b) {
    for (std::int64_t h = 0; h < p->q_heads; ++h) {
      const std::int64_t g = kv_head(h, p->q_heads, p->kv_heads);
      for (std::int64_t i = 0; i < p->q_len; ++i) {
        const float sq = p->scale * token_scale(p->q, b, h, i);
        float m = kNegInf;
        for (std::int64_t j = 0; j < p->kv_len; ++j) {
          z[j] = kNegInf;
          if (!mask.visible(b, h, i, j)) continue;
          std::int32_t dot32 = 0;
          for (std::int64_t d = 0; d < dk; ++d) dot32 += std::int32_t{code(p->q, b, h, i, d)} * code(p->k, b, g, j, d);
          z[j] = sq * token_scale(p->k, b, g, j) * static_cast<float>(dot32) + mask.bias(b, h, i, j);
          m = std::max(m, z[j]);
        }
        if (!(m > kNegInf)) {
          write_masked_row(*p, b, h, i);
          continue;
        }
        float l = 0.0f, pv_max = 0.0f;
        for (std::int64_t j = 0; j < p->kv_len; ++j) {
          const float e = std::exp(z[j] - m);
          l += e;
          pv[j] = e == 0.0f ? 0.0f : e * token_scale(p->v, b, g, j);
          pv_max = std::max(pv_max, pv[j]);
        }
        const float sp = pv_max / 255.0f;
        std::fill(acc.begin(), acc.end(), 0);
        for (std::int64_t j = 0; j < p->kv_len; ++j) {
          const auto a = static_cast<std::int32_t>(std::lrint(pv[j] / sp));
          if (a == 0) continue;  // includes every masked key: its V codes are not read
          for (std::int64_t d = 0; d < dv; ++d) acc[d] += a * code(p->v, b, g, j, d);
        }
        for (std::int64_t d = 0; d < dv; ++d) out[d] = sp * static_cast<float>(acc[d]);
        write_row(*p, b, h, i, out.data(), m, l);
      }
    }
  }
  return HR_OK;
}

}  // namespace

const hr_kernel i8_tokenwise = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "i8_tokenwise",
    .description = "int8 Q/K/V per-token scales, int32 QK^T, float32 softmax, 8-bit P, int32 PV, float32 out",
    .level = HR_LEVEL_CORE,
    .input_format = HR_FORMAT_INT8,
    .output_format = HR_FORMAT_FLOAT32,
    .q_quant = {HR_QUANT_PER_TOKEN, 0},
    .k_quant = {HR_QUANT_PER_TOKEN, 0},
    .v_quant = {HR_QUANT_PER_TOKEN, 0},
    .mask_kinds = kAllMasks,
    .masked_row = HR_MASKED_ROW_ZEROS,
    .returns_lse = 1,
    .layouts = kStridedLayouts,
    .max_kv_len = kMaxKvLen,
    .run_core = run,
    .run_block = nullptr,
    .features = HR_FEATURE_WINDOW,  // MaskView(*p) applies the sliding window
};

}  // namespace hr_kernels
