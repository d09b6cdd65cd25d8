// headroom flawed specimen — no_max_shift: softmax without the max shift.
//
// Method: f32_textbook, float32 throughout, all masks, zeros on fully masked
// rows — except for the one deliberate defect.
// DEFECT: p_j = exp(z_j) is taken on the raw scores instead of exp(z_j − max z).
// Mathematically the same softmax; in float32 exp overflows to +inf once
// z_j > ln(FLT_MAX) ≈ 88.72, and the row becomes inf/inf = NaN (and a row
// whose scores are all below ≈ −103.97 underflows to 0/0). Expected fault:
// non_finite on large-logit cases whose exact answer is perfectly finite.
#include <cmath>
#include <vector>

#include "../common.h"
#include "../kernel_list.h"

namespace hr_kernels {
namespace {

std::int32_t run(const hr_core_problem* p) {
  const MaskView mask(p->mask, p->q_len, p->kv_len);
  if (!formats_are(*p, HR_FORMAT_FLOAT32, HR_FORMAT_FLOAT32) || !mask.known()) return HR_UNSUPPORTED;
  std::vector<float> q(p->key_dim), k(p->key_dim), v(p->value_dim), acc(p->value_dim);
  for (std::int64_t b = 0; b < p->batch; ++b) {
    for (std::int64_t h = 0; h < p->q_heads; ++h) {
      const std::int64_t g = kv_head(h, p->q_heads, p->kv_heads);
      for (std::int64_t i = 0; i < p->q_len; ++i) {
        load_row(p->q, b, h, i, p->key_dim, q.data());
        bool any = false;
        float l = 0.0f;
        std::fill(acc.begin(), acc.end(), 0.0f);
        for (std::int64_t j = 0; j < p->kv_len; ++j) {
          if (!mask.visible(b, h, i, j)) continue;
          any = true;
          load_row(p->k, b, g, j, p->key_dim, k.data());
          const float z = p->scale * dot(q.data(), k.data(), p->key_dim) + mask.bias(b, h, i, j);
          const float e = std::exp(z);  // the defect: no "− max z"
          l += e;
          load_row(p->v, b, g, j, p->value_dim, v.data());
          for (std::int64_t d = 0; d < p->value_dim; ++d) acc[d] += e * v[d];
        }
        if (!any) {
          write_masked_row(*p, b, h, i);
          continue;
        }
        write_row(*p, b, h, i, acc.data(), 0.0f, l);
      }
    }
  }
  return HR_OK;
}

}  // namespace

const hr_kernel no_max_shift = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "no_max_shift",
    .description = "float32 textbook softmax attention that exponentiates the raw scores (no max shift)",
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
};

}  // namespace hr_kernels
