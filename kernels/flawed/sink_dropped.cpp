// headroom flawed specimen — sink_dropped: the sink logit left out of the softmax normaliser.
//
// Method: f32_textbook (max shift, exp, normalise, PV, float32), all masks,
// sliding windows, soft caps and sinks (kernel_abi.h version 2).
// DEFECT: it declares HR_FEATURE_SINKS but normalises by Σ_j exp(z_j − m)
// alone, as if the problem had no sink: every output row is too large by the
// factor (Σ_j e^{z_j} + e^{σ_h}) / Σ_j e^{z_j} and its log-sum-exp too small by
// the log of it. With a sink that dominates, the true output is near zero and
// this kernel returns an ordinary weighted mean. Cases without sinks are
// exactly f32_textbook's.
// Expected fault: error (outside the accuracy budget; no fault class covers it).
#include <cstdint>

#include "../kernel_list.h"

namespace hr_kernels {
namespace {

std::int32_t run(const hr_core_problem* p) {
  hr_core_problem plain = *p;
  plain.features &= ~HR_FEATURE_SINKS;  // the defect
  return f32_textbook.run_core(&plain);
}

}  // namespace

const hr_kernel sink_dropped = [] {
  hr_kernel k = f32_textbook;
  k.name = "sink_dropped";
  k.description = "float32 textbook attention that declares sink logits and leaves them out of the normaliser";
  k.run_core = run;
  return k;
}();

}  // namespace hr_kernels
