// headroom kernels — f16_f32acc: binary16 storage, float32 accumulation.
//
// Method: kernels/half_f32acc.h — inputs and output as binary16 patterns, scores,
// softmax and PV accumulation in float32, probabilities rounded to binary16
// before the PV product as a 16-bit matrix unit takes them.
#include "half_f32acc.h"
#include "kernel_list.h"

namespace hr_kernels {
namespace {

std::int32_t run(const hr_core_problem* p) { return run_half_f32acc<round_binary16>(p, HR_FORMAT_BINARY16); }

}  // namespace

const hr_kernel f16_f32acc = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "f16_f32acc",
    .description = "binary16 storage, float32 scores and accumulation, P rounded to binary16 for PV",
    .level = HR_LEVEL_CORE,
    .input_format = HR_FORMAT_BINARY16,
    .output_format = HR_FORMAT_BINARY16,
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
    // MaskView(*p) applies the sliding window, ScoreFeatures the soft cap and sinks
    .features = HR_FEATURE_WINDOW | HR_FEATURE_SOFTCAP | HR_FEATURE_SINKS,
};

}  // namespace hr_kernels
