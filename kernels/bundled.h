/* headroom — the table of bundled kernels and flawed specimens.
 *
 * Each kernel file defines one `const hr_kernel` and its table row here. The
 * harness sees a kernel only through this table and kernel_abi.h. A flawed
 * specimen carries exactly one deliberate defect and the fault class that must
 * catch it (a run_status / fault class name, e.g. "mask_leak"), or "error" for
 * a defect whose only trace is an error far outside any budget.
 */
#ifndef HEADROOM_KERNELS_BUNDLED_H
#define HEADROOM_KERNELS_BUNDLED_H

#include <stddef.h>

#include "headroom/kernel_abi.h"

#ifdef __cplusplus
extern "C" {
#endif

typedef struct hr_bundled_kernel {
  const hr_kernel* kernel;
  int flawed;                 /* 1 for a specimen in kernels/flawed/ */
  const char* expected_fault; /* specimens: the fault class that must catch it; else NULL */
  const char* defect;         /* specimens: the deliberate defect, one line; else NULL */
} hr_bundled_kernel;

/* Returns: the table, and its length in *count. Static storage; never NULL. */
const hr_bundled_kernel* headroom_bundled_kernels(size_t* count);

#ifdef __cplusplus
}
#endif

#endif
