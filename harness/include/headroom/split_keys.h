// headroom — the problem one split of a split-KV kernel solves: the same queries
// over the keys [lo, hi) of each sequence only.
//
// A kernel declaring HR_FEATURE_SPLIT_PARTIALS (kernel_abi.h version 2) writes,
// for split s, the attention of each query row over the keys
// [s·split_kv_len, (s+1)·split_kv_len) that row may see, as if no other key
// existed; a sink logit joins only at the merge, so a partial carries none.
// This is that problem, exactly: the reference judges a partial on it.
#pragma once

#include <cstdint>

#include "headroom/problem.h"

namespace headroom {

struct SplitProblem {
  CoreProblem problem;
  CoreInputs inputs;
};

/// Returns: the problem of keys [lo, hi) of `p` with inputs `in`: Tk = hi − lo,
/// K and V those keys of each sequence, the same queries, scale and soft cap;
/// the visibility of every (b, h, i, j) that of `p` (mask, window, sequence
/// lengths) as a dense mask — or, for a bias mask, the bias with −inf where
/// `p` hides the key — over one head unless the original mask differs per
/// head; no window, no sequence lengths, no paging, no sinks.
/// Preconditions: validate(p, in) empty, 0 ≤ lo < hi ≤ p.shape.kv_len.
SplitProblem split_keys(const CoreProblem& p, const CoreInputs& in, std::int64_t lo, std::int64_t hi);

}  // namespace headroom
