// headroom kernels — block_f32: the whole multi-head attention block in float32.
//
// Method (Vaswani et al. 2017, §3.2.2): project Q = X_q W_q + b_q,
// K = X_kv W_k + b_k, V = X_kv W_v + b_v and split them into heads (head h
// owns columns [h·D, (h+1)·D)); attend each head with f32_textbook (grouped
// K/V heads when Hkv < Hq); concatenate the heads in order along the feature
// axis; Y = concat W_o + b_o. All sums float32 in index order. A fully masked
// query row attends to nothing: its heads are zeros, so its Y row is b_o.
#include "block_parts.h"
#include "common.h"
#include "kernel_list.h"

namespace hr_kernels {
namespace {

std::int32_t run(const hr_block_problem* p) {
  if (!block_inputs_float32(*p)) return HR_UNSUPPORTED;
  const auto q = project_heads(p->x_q, p->w_q, p->b_q, p->batch, p->q_len, p->model_dim, p->q_heads, p->key_dim);
  const auto k = project_heads(p->x_kv, p->w_k, p->b_k, p->batch, p->kv_len, p->model_dim, p->kv_heads, p->key_dim);
  const auto v = project_heads(p->x_kv, p->w_v, p->b_v, p->batch, p->kv_len, p->model_dim, p->kv_heads, p->value_dim);
  const auto o = attend_heads(*p, q, k, v);  // [B, Hq, Tq, Dv]
  // concat[b, t, h·Dv + e] = O[b, h, t, e]: head h in feature columns [h·Dv, (h+1)·Dv).
  const std::int64_t width = p->q_heads * p->value_dim;
  std::vector<float> concat(p->batch * p->q_len * width);
  for (std::int64_t b = 0; b < p->batch; ++b) {
    for (std::int64_t h = 0; h < p->q_heads; ++h) {
      for (std::int64_t t = 0; t < p->q_len; ++t) {
        for (std::int64_t e = 0; e < p->value_dim; ++e) {
          concat[(b * p->q_len + t) * width + h * p->value_dim + e] =
              o[((b * p->q_heads + h) * p->q_len + t) * p->value_dim + e];
        }
      }
    }
  }
  output_projection(*p, concat);
  return HR_OK;
}

}  // namespace

const hr_kernel block_f32 = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "block_f32",
    .description = "float32 multi-head block: projections, per-head textbook attention, concat, output projection",
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
