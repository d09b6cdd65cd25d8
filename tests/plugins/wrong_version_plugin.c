/* A plug-in built against a future kernel_abi.h: headroom must refuse it by version. */
#include <stddef.h>

#include "headroom/kernel_abi.h"

static int32_t run_core(const hr_core_problem* p) {
  (void)p;
  return HR_OK;
}

static const hr_kernel kFuture = {
    HEADROOM_ABI_VERSION + 1, "future_kernel", "declares an ABI version this headroom does not speak",
    HR_LEVEL_CORE, HR_FORMAT_FLOAT32, HR_FORMAT_FLOAT32, {0, 0}, {0, 0}, {0, 0},
    HR_MASK_NONE, HR_MASKED_ROW_ZEROS, 0, HR_LAYOUT_BHTD, 0, run_core, NULL,
};

const hr_kernel* headroom_kernel_entry(void) { return &kFuture; }
