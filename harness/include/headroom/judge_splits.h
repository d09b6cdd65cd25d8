// headroom — judging the split-KV partials of a kernel that writes them
// (kernel_abi.h HR_FEATURE_SPLIT_PARTIALS; docs/kernel-abi-v2.md).
//
// Split s covers keys [s·L, (s+1)·L) of each sequence (L = split_kv_len). Each
// partial (output o_s and log-sum-exp lse_s) is judged against the certified
// attention over its own keys (split_keys.h), with the default budget's row
// limit for an accumulation of its keys; a row with no visible key in the split
// must be zeros with log-sum-exp −inf. When every partial is right, the merged
// output must be the log-sum-exp merge of the kernel's own partials,
//   O = Σ_s e^{lse_s − M} o_s / Σ_s e^{lse_s − M},  M = max_s lse_s,
// within the rounding of that merge: per element
//   (2δ + (S + 4)·u) · Σ_s w_s |o_s| + u·|O|,  w_s the normalised weights,
//   δ = 8·u·(max_s |lse_s| + 1)  (lse_s rounded to float32: u·|lse_s|, plus the
//   log's own rounding; e^{δ} − 1 ≈ δ moves the normalised weights by ≤ 2δ),
// u the output format's unit roundoff; the merged log-sum-exp, when returned,
// within δ + 4u of M + log Σ_s e^{lse_s − M}. A wrong partial is split_partial;
// a wrong merge of right partials is split_merge (faults.h).
#pragma once

#include <optional>

#include "headroom/attach.h"
#include "headroom/faults.h"
#include "headroom/reference.h"

namespace headroom {

struct SplitJudgement {
  std::optional<Fault> partial;  ///< split_partial: the first wrong partial found
  std::optional<Fault> merge;    ///< split_merge: only when every partial is right
  int splits = 0;                ///< partials judged
};

/// Returns: the judgement of run.o_partials / run.lse_partials for kernel
/// splits of `split_kv_len` keys on received case `rc`, references computed
/// with `opt` (its row sample, when set, limits the rows judged).
/// Preconditions: run.status ok, rc core level, split_kv_len ≥ 1, the partial
/// tensors shaped [S, B·Hq, Tq, Dv] and [S, B, Hq, Tq] with S = ceil(Tk / L).
SplitJudgement judge_splits(const KernelRun& run, const ReceivedCase& rc, std::int64_t split_kv_len, Format output_format,
                            const ReferenceOptions& opt);

}  // namespace headroom
