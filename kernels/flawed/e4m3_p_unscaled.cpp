// headroom kernels (flawed) — e4m3_p_unscaled: e4m3_tensorwise rounding P to
// E4M3 without its scale.
//
// Defect: declares p_scale = 448 but rounds the weights P̃_j ≤ 1 to E4M3 as
// they are, so every weight below 2^-10 (half E4M3's smallest subnormal 2^-9)
// flushes to zero and those below 2^-6 keep only a few bits, where ×448 would
// have kept them normal. Rows whose weight is spread over many keys a few
// logits below the maximum lose most of it. Expected verdict: error (max scaled
// error over budget on rows with many small weights).
#include "../fp8_attention.h"
#include "../kernel_list.h"

namespace hr_kernels {
namespace {

constexpr Fp8Config kConfig{.normalised = false, .p_scale = 448.0f, .saturating = true, .p_scale_forgotten = true};

std::int32_t run(const hr_core_problem* p) { return run_fp8_attention(p, e4m3_p_unscaled, kConfig); }

}  // namespace

const hr_kernel e4m3_p_unscaled = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "e4m3_p_unscaled",
    .description = "FLAWED e4m3_tensorwise: P rounded to E4M3 without its x448 scale",
    .level = HR_LEVEL_CORE,
    .input_format = HR_FORMAT_E4M3,
    .output_format = HR_FORMAT_FLOAT32,
    .q_quant = {HR_QUANT_PER_TENSOR, 0},
    .k_quant = {HR_QUANT_PER_TENSOR, 0},
    .v_quant = {HR_QUANT_PER_TENSOR, 0},
    .mask_kinds = kAllMasks,
    .masked_row = HR_MASKED_ROW_ZEROS,
    .returns_lse = 1,
    .layouts = kStridedLayouts,
    .max_kv_len = 0,
    .run_core = run,
    .run_block = nullptr,
    .fp8_saturating = 1,
    .p_quant = HR_PQUANT_E4M3,
    .p_scale = kConfig.p_scale,
};

}  // namespace hr_kernels
