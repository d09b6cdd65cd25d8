/* A plug-in built against a future kernel_abi.h: headroom must refuse it by version. */
#include <stddef.h>

#include "headroom/kernel_abi.h"

static int32_t run_core(const hr_core_problem* p) {
  (void)p;
  return HR_OK;
}

static const hr_kernel kFuture = {
    .abi_version = HEADROOM_ABI_VERSION + 1,
    .name = "future_kernel",
    .description = "declares an ABI version this headroom does not speak",
    .level = HR_LEVEL_CORE,
    .input_format = HR_FORMAT_FLOAT32,
    .output_format = HR_FORMAT_FLOAT32,
    .mask_kinds = HR_MASK_NONE,
    .masked_row = HR_MASKED_ROW_ZEROS,
    .layouts = HR_LAYOUT_BHTD,
    .run_core = run_core,
};

const hr_kernel* headroom_kernel_entry(void) { return &kFuture; }
