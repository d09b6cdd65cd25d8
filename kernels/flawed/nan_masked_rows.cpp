// headroom flawed specimen — nan_masked_rows: NaN on fully masked rows while declaring zeros.
//
// Method: f32_textbook (max shift, exp, normalise, PV, float32), all masks,
// masked keys never read.
// DEFECT: the guard for a row with no visible key is missing. Such a row ends
// with acc = 0 and l = 0 and writes 0/0 = NaN in every element, although the
// kernel declares HR_MASKED_ROW_ZEROS. (Its log-sum-exp, −inf + log 0, is −inf,
// as declared.) Rows with at least one visible key are exactly f32_textbook's.
// Expected fault: convention.
#include <cmath>
#include <vector>

#include "../common.h"
#include "../kernel_list.h"

namespace hr_kernels {
namespace {

std::int32_t run(const hr_core_problem* p) {
  const MaskView mask(p->mask, p->q_len, p->kv_len);
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
          if (!mask.visible(b, h, i, j)) continue;
          load_row(p->k, b, g, j, p->key_dim, k.data());
          z[j] = p->scale * dot(q.data(), k.data(), p->key_dim) + mask.bias(b, h, i, j);
          m = std::max(m, z[j]);
        }
        // The defect: no "if no key is visible, write zeros" here.
        float l = 0.0f;
        std::fill(acc.begin(), acc.end(), 0.0f);
        for (std::int64_t j = 0; j < p->kv_len; ++j) {
          if (z[j] == kNegInf) continue;  // masked: V row not read
          const float e = std::exp(z[j] - m);
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

const hr_kernel nan_masked_rows = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "nan_masked_rows",
    .description = "float32 textbook attention without the fully-masked-row guard (writes 0/0)",
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
