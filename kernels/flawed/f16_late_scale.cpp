// headroom flawed specimen — f16_late_scale: binary16 scores overflow, scale applied after QKᵀ.
//
// Method: f16_f16acc — binary16 storage, every multiply and add of QKᵀ and
// PV rounded to binary16, float32 softmax statistics, all masks, zeros on
// fully masked rows — but for the one deliberate defect.
// DEFECT: the scale is applied after QKᵀ, z = fl16(s · fl16(q·k)), instead of
// being folded into Q before it. The raw dot product is 1/s times larger than
// the logit (√Dk = 8 for Dk = 64 with s = 1/√Dk), so it overflows binary16's
// 65504 to ±inf while the logit s·q·k, and f16_f16acc's scores, are still far
// inside the range: for s = 1/8, any |logit| > 8188 — or an intermediate
// partial sum past 65504. The row then holds inf − inf = NaN. Expected fault:
// non_finite.
#include <cmath>
#include <vector>

#include "../common.h"
#include "../kernel_list.h"

namespace hr_kernels {
namespace {

std::int32_t run(const hr_core_problem* p) {
  const MaskView mask(p->mask, p->q_len, p->kv_len);
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
          for (std::int64_t d = 0; d < p->key_dim; ++d) s = round_binary16(s + round_binary16(q[d] * k[d]));
          s = round_binary16(p->scale * s);  // the defect: scale after the binary16 dot product
          z[j] = round_binary16(s + mask.bias(b, h, i, j));
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
          const float e16 = round_binary16(e);
          load_row(p->v, b, g, j, p->value_dim, v.data());
          for (std::int64_t d = 0; d < p->value_dim; ++d) acc[d] = round_binary16(acc[d] + round_binary16(e16 * v[d]));
        }
        write_row(*p, b, h, i, acc.data(), m, l);
      }
    }
  }
  return HR_OK;
}

}  // namespace

const hr_kernel f16_late_scale = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "f16_late_scale",
    .description = "binary16 attention, binary16 QK^T and PV, scale applied after QK^T in binary16",
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
};

}  // namespace hr_kernels
