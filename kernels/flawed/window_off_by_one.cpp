// headroom flawed specimen — window_off_by_one: the sliding window's left edge one key too wide.
//
// Method: f32_textbook (max shift, exp, normalise, PV, float32), all masks,
// sliding windows (HR_FEATURE_WINDOW).
// DEFECT: the window's left side is tested as j >= i' − window_left − 1
// (a "<=" where "<" belongs, as when the window is stored as a key count and
// compared inclusively), so every row whose window starts past key 0 also
// sees key i' − window_left − 1, which the window hides. Rows whose window
// reaches key 0, and every case without a window, are exactly f32_textbook's.
// Expected fault: mask_leak.
#include <cstdint>

#include "../kernel_list.h"

namespace hr_kernels {
namespace {

std::int32_t run(const hr_core_problem* p) {
  hr_core_problem wide = *p;
  if ((wide.features & HR_FEATURE_WINDOW) && wide.window_left >= 0) wide.window_left += 1;  // the defect
  return f32_textbook.run_core(&wide);
}

}  // namespace

const hr_kernel window_off_by_one = [] {
  hr_kernel k = f32_textbook;
  k.name = "window_off_by_one";
  k.description = "float32 textbook attention whose sliding window admits one key too many on the left";
  k.run_core = run;
  k.features = HR_FEATURE_WINDOW;  // its one defect is the window's
  return k;
}();

}  // namespace hr_kernels
