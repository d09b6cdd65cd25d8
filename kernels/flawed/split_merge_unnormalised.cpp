// headroom flawed specimen — split_merge_unnormalised: split-KV partials merged without renormalisation.
//
// Method: f32_paged_split (paged K/V, 32-key splits reduced in float32, each
// split's output o_s and log-sum-exp lse_s written as partials, all exact).
// DEFECT: the merge returns Σ_s e^{lse_s − M} o_s with M = max_s lse_s and
// never divides by Σ_s e^{lse_s − M}: the output is right when one split
// holds every visible key, and too large by that sum otherwise, while every
// partial and the merged log-sum-exp are right.
// Expected fault: split_merge (the partials are within budget, the merge of
// them is not what the kernel returned).
#include <cstdint>

#include "../kernel_list.h"
#include "../paged_split.h"

namespace hr_kernels {
namespace {

std::int32_t run(const hr_core_problem* p) { return run_paged_split(p, PagedSplitDefect::merge_unnormalised); }

}  // namespace

const hr_kernel split_merge_unnormalised = [] {
  hr_kernel k = f32_paged_split;
  k.name = "split_merge_unnormalised";
  k.description = "float32 paged split-KV decode whose merge weights the partials by e^(lse_s - max) without dividing by their sum";
  k.run_core = run;
  return k;
}();

}  // namespace hr_kernels
