// headroom kernels (flawed) — e4m3_block_scale_shifted: e4m3_blockwise reading
// each key's scale one token ahead.
//
// Defect: the K scale of key j is looked up for token j + 1 (clamped at the
// end), so the last key of every 64-token block is dequantised with the next
// block's scale. Harmless while neighbouring blocks have similar scales; a
// block holding one large value makes its predecessor's last score wrong by
// the ratio of the two scales. Expected verdict: error (max scaled error far
// over budget on blocks with one large value).
#include "../fp8_attention.h"
#include "../kernel_list.h"

namespace hr_kernels {
namespace {

constexpr Fp8Config kConfig{.normalised = true, .p_scale = 480.0f, .saturating = true, .k_scale_next_token = true};

std::int32_t run(const hr_core_problem* p) { return run_fp8_attention(p, e4m3_block_scale_shifted, kConfig); }

}  // namespace

const hr_kernel e4m3_block_scale_shifted = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "e4m3_block_scale_shifted",
    .description = "FLAWED e4m3_blockwise: the last key of each block uses the next block's K scale",
    .level = HR_LEVEL_CORE,
    .input_format = HR_FORMAT_E4M3,
    .output_format = HR_FORMAT_FLOAT32,
    .q_quant = {HR_QUANT_PER_BLOCK, 0},
    .k_quant = {HR_QUANT_PER_BLOCK, 0},
    .v_quant = {HR_QUANT_PER_BLOCK, 0},
    .mask_kinds = kAllMasks,
    .masked_row = HR_MASKED_ROW_ZEROS,
    .returns_lse = 1,
    .layouts = kStridedLayouts,
    .max_kv_len = 0,
    .run_core = run,
    .run_block = nullptr,
    .q_block = 64,
    .k_block = 64,
    .v_block = 64,
    .fp8_saturating = 1,
    .p_quant = HR_PQUANT_E4M3,
    .p_scale = kConfig.p_scale,
};

}  // namespace hr_kernels
