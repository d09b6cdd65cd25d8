// headroom — the table of bundled kernels (bundled.h). One row per kernel file.
#include "bundled.h"

namespace {
const hr_bundled_kernel kTable[] = {
    {nullptr, 0, nullptr, nullptr},  // sentinel, not counted
};
}  // namespace

extern "C" const hr_bundled_kernel* headroom_bundled_kernels(size_t* count) {
  *count = sizeof(kTable) / sizeof(kTable[0]) - 1;
  return kTable;
}
