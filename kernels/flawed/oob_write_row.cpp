// headroom flawed specimen — oob_write_row: clears one output row past the end.
//
// Method: f32_textbook (max shift, exp, normalise, PV, float32), all masks,
// zeros on fully masked rows. Before computing a (batch, head) it clears that
// head's rows of O, then fills them in.
// DEFECT: the clearing loop runs i = 0 .. Tq inclusive (`<=` for `<`), so it
// writes Dv zeros to row Tq, one row past the head. For every head but the
// last that row belongs to the next head (or batch) and is overwritten later,
// so the values come out right; for the last (b, h) of a contiguous O the Dv
// zeros land just past the END of the output buffer. Expected fault: oob_write
// (a canary after O).
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
      for (std::int64_t i = 0; i <= p->q_len; ++i) {  // the defect: i < q_len
        for (std::int64_t d = 0; d < p->value_dim; ++d) store(p->o, b, h, i, d, 0.0f);
      }
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

const hr_kernel oob_write_row = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "oob_write_row",
    .description = "float32 textbook attention whose per-head clearing loop writes one row past the head",
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
