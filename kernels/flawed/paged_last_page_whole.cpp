// headroom flawed specimen — paged_last_page_whole: a sequence's last, partial page read whole.
//
// Method: f32_paged_split without partials (paged K/V through the block table,
// 32-key splits merged by log-sum-exp in float32).
// DEFECT: it takes each sequence's length as its page count times the page
// size, so the rows of the last page past the sequence's end (stale keys of
// the cache) are attended, and causal bottom-right alignment moves to the end
// of that page. Sequences ending on a page boundary are right.
// Expected fault: mask_leak (poisoned rows past a sequence's length change
// its output; the detail names the page and the row).
#include <cstdint>
#include <vector>

#include "../kernel_list.h"
#include "../paged_split.h"

namespace hr_kernels {
namespace {

std::int32_t run(const hr_core_problem* p) {
  if ((p->features & HR_FEATURE_PAGED_KV) == 0) return run_paged_split(p, PagedSplitDefect::none);
  std::vector<std::int64_t> whole(static_cast<std::size_t>(p->batch));
  const std::int64_t ps = p->paged.page_size;
  for (std::int64_t b = 0; b < p->batch; ++b) whole[static_cast<std::size_t>(b)] = (p->paged.seq_lens[b] + ps - 1) / ps * ps;  // the defect
  hr_core_problem rounded = *p;
  rounded.paged.seq_lens = whole.data();
  return run_paged_split(&rounded, PagedSplitDefect::none);
}

}  // namespace

const hr_kernel paged_last_page_whole = [] {
  hr_kernel k = f32_paged_split;
  k.name = "paged_last_page_whole";
  k.description = "float32 paged decode that reads the last page of each sequence whole, past the sequence's length";
  k.run_core = run;
  k.features = HR_FEATURE_PAGED_KV;
  k.split_kv_len = 0;
  return k;
}();

}  // namespace hr_kernels
