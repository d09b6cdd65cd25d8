// headroom flawed specimen — lse_bf16_buffer: the log-sum-exp kept in a bfloat16 buffer.
//
// Method: f32_textbook (max shift, exp, normalise, PV, float32), all masks,
// sliding windows, soft caps and sinks (kernel_abi.h version 2).
// DEFECT: the row statistics go through a bfloat16 buffer before they reach
// the float32 log-sum-exp output, as in a stack that stores its softmax
// statistics in the activations' format: L is off by up to 2^-9·|L| (8
// significant bits), while O is exactly f32_textbook's. A backward pass
// recomputing P = exp(z − L) from it, or a split-KV merge weighting partials
// by it, inherits that error.
// Expected fault: error (its log-sum-exp error against the plain kernel's is
// outside max_ratio_to_plain; no fault class covers it).
#include <cstdint>

#include "../common.h"
#include "../kernel_list.h"

namespace hr_kernels {
namespace {

std::int32_t run(const hr_core_problem* p) {
  const std::int32_t status = f32_textbook.run_core(p);
  if (status != HR_OK || p->lse == nullptr) return status;
  const std::int64_t rows = p->batch * p->q_heads * p->q_len;
  for (std::int64_t r = 0; r < rows; ++r) p->lse[r] = round_bfloat16(p->lse[r]);  // the defect
  return HR_OK;
}

}  // namespace

const hr_kernel lse_bf16_buffer = [] {
  hr_kernel k = f32_textbook;
  k.name = "lse_bf16_buffer";
  k.description = "float32 textbook attention whose log-sum-exp passes through a bfloat16 buffer";
  k.run_core = run;
  return k;
}();

}  // namespace hr_kernels
