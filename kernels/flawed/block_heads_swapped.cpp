// headroom flawed specimen — block_heads_swapped: heads concatenated in reverse order.
//
// Method: block_f32 — float32 projections, per-head textbook attention (grouped
// K/V heads when Hkv < Hq), concatenation, output projection, all masks.
// DEFECT: head h is written to feature columns of head Hq − 1 − h of the
// concatenation instead of its own [h·Dv, (h+1)·Dv), so W_o multiplies each
// head's output with another head's rows. Nothing overflows and nothing is
// NaN; for Hq ≥ 2 and generic weights the output is simply wrong, by an
// amount of the order of the output itself — far outside any rounding budget.
// (With Hq = 1, or weights symmetric under the swap, it is invisible.)
// Expected fault: error.
#include "../block_parts.h"
#include "../common.h"
#include "../kernel_list.h"

namespace hr_kernels {
namespace {

std::int32_t run(const hr_block_problem* p) {
  if (!block_inputs_float32(*p)) return HR_UNSUPPORTED;
  const auto q = project_heads(p->x_q, p->w_q, p->b_q, p->batch, p->q_len, p->model_dim, p->q_heads, p->key_dim);
  const auto k = project_heads(p->x_kv, p->w_k, p->b_k, p->batch, p->kv_len, p->model_dim, p->kv_heads, p->key_dim);
  const auto v = project_heads(p->x_kv, p->w_v, p->b_v, p->batch, p->kv_len, p->model_dim, p->kv_heads, p->value_dim);
  const auto o = attend_heads(*p, q, k, v);  // [B, Hq, Tq, Dv]
  const std::int64_t width = p->q_heads * p->value_dim;
  std::vector<float> concat(p->batch * p->q_len * width);
  for (std::int64_t b = 0; b < p->batch; ++b) {
    for (std::int64_t h = 0; h < p->q_heads; ++h) {
      const std::int64_t slot = p->q_heads - 1 - h;  // the defect: should be h
      for (std::int64_t t = 0; t < p->q_len; ++t) {
        for (std::int64_t e = 0; e < p->value_dim; ++e) {
          concat[(b * p->q_len + t) * width + slot * p->value_dim + e] =
              o[((b * p->q_heads + h) * p->q_len + t) * p->value_dim + e];
        }
      }
    }
  }
  output_projection(*p, concat);
  return HR_OK;
}

}  // namespace

const hr_kernel block_heads_swapped = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "block_heads_swapped",
    .description = "float32 multi-head block that concatenates the heads in reverse order",
    .level = HR_LEVEL_BLOCK,
    .input_format = HR_FORMAT_FLOAT32,
    .output_format = HR_FORMAT_FLOAT32,
    .q_quant = {},
    .k_quant = {},
    .v_quant = {},
    .mask_kinds = kAllMasks,
    .masked_row = HR_MASKED_ROW_ZEROS,
    .returns_lse = 0,
    .layouts = HR_LAYOUT_BHTD,
    .max_kv_len = 0,
    .run_core = nullptr,
    .run_block = run,
};

}  // namespace hr_kernels
