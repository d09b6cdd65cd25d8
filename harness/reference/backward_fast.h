// headroom — the backward reference's fast path: one (batch, kv head) block in double-double, bounded.
#pragma once

#include <cstdint>
#include <vector>

#include "backward_kernels.h"
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
  /// `fk`, `bk`: null for the best kernels the CPU runs; tests pass the baseline ones.
  BackwardFast(const CoreProblem& p, const CoreInputs& in, const Tensor& d_o, const BackwardOptions& opt,
               unsigned workers, const FastKernels* fk = nullptr, const BackwardKernels* bk = nullptr);

  /// Per-worker scratch.
  struct Scratch {
    FastCore::RowScratch row;
    std::vector<double> dph, dpl, a, dp_sigma, dp_eps;  // per visible key of a row
    /// A row whose dK and dV terms wait to be added with those of the rows beside it.
    struct Slot {
      std::vector<std::int64_t> keys;
      std::vector<double> ph, pl, sh, sl, mh;  // per visible key: P̂, dŜ, m
      std::vector<double> q_pad, do_pad;       // [D padded]
    };
    Slot slot[kScatterRows];
    std::vector<double> k_pad, v_pad;                          // [Tk, D padded] inputs of the block
    std::vector<double> k_hi, k_lo, k_mag, v_hi, v_lo, v_mag;  // [Tk, D padded] of the block
    std::vector<double> k_err, v_err;  // [Tk, D padded]: error charged per term by rows above kCleanTau
    std::vector<double> v_norm;        // [Tk]: upper bounds of ‖V_j‖₂
    std::vector<std::uint8_t> v_zero;  // [Tk]: V_j is 0 throughout
    std::vector<double> q_hi, q_lo, q_mag, q_sigma;  // [D padded] of a row
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
  const BackwardKernels* kernels_;
  std::int64_t dk_pad_ = 0, dv_pad_ = 0;
  double dot_coef_ = 0;  // |dP̂ − dP| ≤ dot_coef_·A_ij (Dot2, the grid's fallback)
  double dp_coef_ = 0, dp_floor_ = 0;  // on the grid: |dP̂ − dP| ≤ dp_coef_·σ + dp_floor_
};

/// reference_backward with the given kernels (null: the best the CPU runs);
/// tests pass the baseline builds to compare them with the AVX2 ones.
BackwardReference reference_backward_with(const CoreProblem& p, const CoreInputs& in, const Tensor& d_o,
                                          const BackwardOptions& opt, const FastKernels* fk,
                                          const BackwardKernels* bk);

}  // namespace headroom::detail
