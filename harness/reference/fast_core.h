// headroom — core attention on the fast path: prepared layouts, certified bounds, escalation.
#pragma once

#include <cstdint>
#include <vector>

#include "fast_row.h"
#include "headroom/reference.h"
#include "mp_core.h"

namespace headroom::detail {

/// A core problem laid out for the fast kernel: keys in lane blocks and
/// values in padded rows per (batch, kv head), and key norms. O((Tk)·D)
/// doubles per kv head, the size of the inputs themselves.
class FastCore {
 public:
  /// `kernels`: null for the best the CPU runs (fast_kernels()); tests pass
  /// fast_kernels_baseline() to compare the two builds.
  FastCore(const CoreProblem& p, const CoreInputs& in, const ReferenceOptions& opt, unsigned workers,
           const FastKernels* kernels = nullptr);

  /// One row's scratch, reused across rows.
  struct RowScratch {
    std::vector<std::int64_t> keys;
    std::vector<double> bias, raw_hi, raw_lo, w_hi, w_lo, acc, out, g, neg_vmax;
    std::vector<std::uint8_t> want;
  };
  /// Per-worker scratch: one RowScratch per row of a group.
  struct Scratch {
    RowScratch row[kMaxGroup];
  };

  /// Returns: the number of work items, groups of up to kMaxGroup
  /// consecutive query rows of one (batch, head).
  std::int64_t groups() const;

  /// Computes group `group` into `ref` on the fast path (rows of it that see
  /// the same keys go through the kernel together); the elements (and lse)
  /// whose certified bound misses the target are recomputed by `mp`.
  /// Returns: whether all its rows ended certified. Adds to `stats`.
  bool run_group(std::int64_t group, CoreReference& ref, Scratch& sc, MpCoreRows& mp, ReferenceStats& stats) const;

 private:
  void prepare_row(std::int64_t row, RowScratch& rs, FastRowArgs& a, FastRowOut& o) const;
  bool finish_row(std::int64_t row, RowScratch& rs, const FastRowOut& o, CoreReference& ref, MpCoreRows& mp,
                  ReferenceStats& stats) const;

  const CoreProblem& p_;
  const CoreInputs& in_;
  ReferenceOptions opt_;
  const FastKernels* kernels_;
  std::int64_t blocks_ = 0, dv_pad_ = 0;
  bool exact_products_ = false;
  double score_coef_ = 0;
  std::vector<double> kt_, vp_, k_norm_;  // per (b, g), concatenated
};

}  // namespace headroom::detail
