// headroom kernels — e4m3_blockwise: E4M3 Q, K, V with one scale per block of
// 64 tokens, normalised P rounded to E4M3 with saturation (fp8_attention.h).
//
// Block scales as in FlashAttention-3's block quantisation (Shah et al. 2024,
// §3.3: one scale per block of rows, so an outlier spoils only its block).
// The weights rounded are the normalised p_j (Σ p_j = 1) times p_scale = 480:
// one top-binade step above E4M3's 448, so a row where one key holds more than
// 464/480 ≈ 96.7% of the weight overflows and the saturating conversion
// (fp8_saturating = 1, OFP8's saturation mode) clips it to 448/480. That clip
// costs at most 32/480 ≈ 0.067 of the key's weight, about one E4M3 rounding
// (2^-4 = 0.0625): the kernel exercises saturation on purpose, at the price of
// one rounding's worth on such rows, and gains 480/448 in resolution for
// the small weights.
#include "fp8_attention.h"
#include "kernel_list.h"

namespace hr_kernels {
namespace {

constexpr Fp8Config kConfig{.normalised = true, .p_scale = 480.0f, .saturating = true};

std::int32_t run(const hr_core_problem* p) { return run_fp8_attention(p, e4m3_blockwise, kConfig); }

}  // namespace

const hr_kernel e4m3_blockwise = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "e4m3_blockwise",
    .description = "E4M3 Q/K/V per-block scales (64 tokens), float32 scores and softmax, normalised P to E4M3 (x480, saturating), float32 PV",
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
