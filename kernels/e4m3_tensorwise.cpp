// headroom kernels — e4m3_tensorwise: E4M3 Q, K, V with one scale per tensor,
// P rounded to E4M3 in online-softmax tiles (fp8_attention.h).
//
// The FP8 forward as FlashAttention-3 runs it with per-tensor scaling (Shah et
// al. 2024, §3.3 and Table 3's "per-tensor" row): the unnormalised weights
// P̃_j = exp(z_j − m) ≤ 1 of each 64-key tile are rounded to E4M3 after
// multiplying by p_scale = 448, which maps [0, 1] onto the whole E4M3 range
// (the static P scale of SageAttention2, Zhang et al. 2025; from memory), so
// they never overflow; the conversion is declared saturating all the same.
#include "fp8_attention.h"
#include "kernel_list.h"

namespace hr_kernels {
namespace {

constexpr Fp8Config kConfig{.normalised = false, .p_scale = 448.0f, .saturating = true};

std::int32_t run(const hr_core_problem* p) { return run_fp8_attention(p, e4m3_tensorwise, kConfig); }

}  // namespace

const hr_kernel e4m3_tensorwise = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "e4m3_tensorwise",
    .description = "E4M3 Q/K/V per-tensor scales, float32 scores and softmax, P rounded to E4M3 (x448) per 64-key tile, float32 PV",
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
