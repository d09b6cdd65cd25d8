// headroom — the backward reference's fast path: one (batch, kv head) block in double-double, bounded.
#pragma once

#include <cstdint>
#include <vector>

#include "backward_mp.h"
#include "fast_core.h"
#include "headroom/reference_backward.h"

namespace headroom::detail {

/// An element the fast path could not certify, for MpBackward::element.
struct PendingElement {
  GradKind kind;
  std::int64_t b, head, t, d;
};

/// The fast path of reference_backward (derivations in backward_fast.cpp).
/// Work items are (batch, kv head) blocks: every query row of the group in
/// order, so each dK and dV element sums its terms in one fixed order.
class BackwardFast {
 public:
  BackwardFast(const CoreProblem& p, const CoreInputs& in, const Tensor& d_o, const BackwardOptions& opt,
               unsigned workers);

  /// Per-worker scratch.
  struct Scratch {
    FastCore::RowScratch row;
    std::vector<double> ph, pl, dph, dpl, a, sh, sl, mh;  // per visible key of a row
    std::vector<double> k_hi, k_lo, k_mag, v_hi, v_lo, v_mag;  // [Tk, D] of the block
    std::vector<double> k_err, v_err;  // [Tk, D]: error charged per term by rows above kCleanTau
    std::vector<double> q_hi, q_lo, q_mag;                     // [Dk] of a row
    std::vector<std::int64_t> k_rows, k_neg, k_fresh;          // per key: rows, negligible rows, terms since renormalising
  };

  /// Returns: the number of blocks, B·Hkv.
  std::int64_t blocks() const;

  /// Computes block `block` (= b·Hkv + g) into `ref`; appends to `pending`
  /// the elements whose bound misses the target (every element of the block
  /// when a row cannot be finished on this path). Adds to `stats`.
  void run_block(std::int64_t block, BackwardReference& ref, Scratch& sc, std::vector<PendingElement>& pending,
                 BackwardStats& stats) const;

 private:
  const CoreProblem& p_;
  const CoreInputs& in_;
  const Tensor& d_o_;
  BackwardOptions opt_;
  FastCore fast_;
  double dot_coef_ = 0;  // |dP̂ − dP| ≤ dot_coef_·A_ij (Dot2, as fast_row.inc's scores)
};

}  // namespace headroom::detail
