// headroom kernels (flawed) — e4m3_overflow_nan: e4m3_blockwise whose E4M3
// conversion of the weights does not saturate.
//
// Defect: declares fp8_saturating = 1 but converts p_j·480 with OFP8's
// non-saturating rule, so a weight above 464/480 (one key holding more than
// ~96.7% of a row) becomes E4M3's NaN instead of 448, and the row's output
// is NaN. Expected fault: non_finite (dominant-key and attention-sink rows).
#include "../fp8_attention.h"
#include "../kernel_list.h"

namespace hr_kernels {
namespace {

constexpr Fp8Config kConfig{.normalised = true, .p_scale = 480.0f, .saturating = false};

std::int32_t run(const hr_core_problem* p) { return run_fp8_attention(p, e4m3_overflow_nan, kConfig); }

}  // namespace

const hr_kernel e4m3_overflow_nan = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "e4m3_overflow_nan",
    .description = "FLAWED e4m3_blockwise: P conversion overflows to NaN instead of saturating to 448",
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
