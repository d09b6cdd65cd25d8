/* A shared library that forgot to export headroom_kernel_entry (it misspells it). */
#include "headroom/kernel_abi.h"

const hr_kernel* headroom_kernel_entry_point(void) { return 0; }
