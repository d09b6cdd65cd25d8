// headroom flawed specimen — causal_flipped: declares bottom-right causal, applies top-left.
//
// Method: f32_textbook (max shift, exp, normalise, PV, float32) with masks
// none and causal; it declares only the bottom-right alignment, where key j
// is visible to query i iff j ≤ i + (Tk − Tq): the last query sees every key,
// as when new queries are appended to a key/value cache.
// DEFECT: the mask applied is the top-left alignment, j ≤ i. The two agree when
// Tq = Tk, so square tests pass; with Tq < Tk every row sees Tk − Tq keys too
// few, and with Tq > Tk the first Tq − Tk rows, which should be fully masked
// (zeros), see key 0 and more. Expected fault: convention (causal alignment).
#include <cmath>
#include <vector>

#include "../common.h"
#include "../kernel_list.h"

namespace hr_kernels {
namespace {

std::int32_t run(const hr_core_problem* p) {
  const std::uint32_t kind = p->mask.kind;
  if (!formats_are(*p, HR_FORMAT_FLOAT32, HR_FORMAT_FLOAT32) ||
      (kind != HR_MASK_NONE && kind != HR_MASK_CAUSAL_BOTTOM_RIGHT)) {
    return HR_UNSUPPORTED;
  }
  std::vector<float> q(p->key_dim), k(p->key_dim), v(p->value_dim), z(p->kv_len), acc(p->value_dim);
  for (std::int64_t b = 0; b < p->batch; ++b) {
    for (std::int64_t h = 0; h < p->q_heads; ++h) {
      const std::int64_t g = kv_head(h, p->q_heads, p->kv_heads);
      for (std::int64_t i = 0; i < p->q_len; ++i) {
        load_row(p->q, b, h, i, p->key_dim, q.data());
        // The defect: bottom-right would be i + 1 + (Tk − Tq).
        const std::int64_t end = kind == HR_MASK_NONE ? p->kv_len : std::min(i + 1, p->kv_len);
        float m = kNegInf;
        for (std::int64_t j = 0; j < end; ++j) {
          load_row(p->k, b, g, j, p->key_dim, k.data());
          z[j] = p->scale * dot(q.data(), k.data(), p->key_dim);
          m = std::max(m, z[j]);
        }
        if (end == 0) {
          write_masked_row(*p, b, h, i);
          continue;
        }
        float l = 0.0f;
        std::fill(acc.begin(), acc.end(), 0.0f);
        for (std::int64_t j = 0; j < end; ++j) {
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

const hr_kernel causal_flipped = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "causal_flipped",
    .description = "float32 textbook attention declaring bottom-right causal but masking top-left",
    .level = HR_LEVEL_CORE,
    .input_format = HR_FORMAT_FLOAT32,
    .output_format = HR_FORMAT_FLOAT32,
    .q_quant = {},
    .k_quant = {},
    .v_quant = {},
    .mask_kinds = HR_MASK_NONE | HR_MASK_CAUSAL_BOTTOM_RIGHT,
    .masked_row = HR_MASKED_ROW_ZEROS,
    .returns_lse = 1,
    .layouts = kStridedLayouts,
    .max_kv_len = 0,
    .run_core = run,
    .run_block = nullptr,
};

}  // namespace hr_kernels
