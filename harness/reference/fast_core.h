// headroom — core attention on the fast path: prepared layouts, certified bounds, escalation.
#pragma once

#include <cstdint>
#include <vector>

#include "fast_row.h"
#include "headroom/reference.h"
#include "mp_core.h"

namespace headroom::detail {

/// Block level: the core inputs as double-doubles known to within radii. The
/// CoreInputs passed beside it hold the high parts; the exact inputs lie within
/// the radii of high + low. `out_lo`, when set, receives o_ref − out per
/// element ([rows·Dv], so the output is o_ref as a double-double).
struct WideCoreInputs {
  Tensor q_lo, k_lo, v_lo;    ///< low parts, shaped as q, k, v; |lo| ≤ u|hi|
  std::vector<double> q_rad;  ///< [B·Hq·Tq] upper bounds of ‖δq‖₂ per query row
  std::vector<double> k_rad;  ///< [B·Hkv·Tk] upper bounds of ‖δk_j‖₂
  std::vector<double> v_rad;  ///< [B·Hkv·Dv] upper bounds of max_j |δv_jd| over the kv head's keys
  double* out_lo = nullptr;
};

/// A core problem laid out for the fast kernel: keys in lane blocks and
/// values in padded rows per (batch, kv head), and key norms. O((Tk)·D)
/// doubles per kv head, the size of the inputs themselves; V is read in place
/// when Dv is a multiple of kLanes (then `in` must outlive the FastCore).
class FastCore {
 public:
  /// `kernels`: null for the best the CPU runs (fast_kernels()); tests pass
  /// fast_kernels_baseline() to compare the two builds.
  /// `wide`: block level (inputs as double-doubles with radii); then the
  /// elements are not judged against the target here — the block judges its
  /// outputs — and only rows the kernel cannot finish are recomputed.
  FastCore(const CoreProblem& p, const CoreInputs& in, const ReferenceOptions& opt, unsigned workers,
           const FastKernels* kernels = nullptr, const WideCoreInputs* wide = nullptr);

  /// One row's scratch, reused across rows.
  struct RowScratch {
    std::vector<std::int64_t> keys;
    std::vector<double> bias, raw_hi, raw_lo, w_hi, w_lo, acc, out, out_lo, g, neg_vmax;
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
  bool run_group(std::int64_t group, CoreReference& ref, Scratch& sc, RowRecompute& mp, ReferenceStats& stats) const;

  /// Runs the kernel on row `row` (= (b·Hq + h)·Tq + i) alone, its visible
  /// keys already in rs.keys and rs.bias (visible_keys, at least one), up to
  /// the weights (FastRowArgs::weights_only): afterwards rs.w_hi[idx] +
  /// rs.w_lo[idx] is the weight ŵ of key rs.keys[idx] (0 for a negligible key)
  /// and `o` holds Ŝ and the uncertainties (no outputs or lse); o.ok false
  /// means the weights could not be finished.
  void run_row_weights(std::int64_t row, RowScratch& rs, FastRowOut& o) const;

  /// The certified uncertainties of a finished row's weights, (a)–(c) of fast_core.cpp.
  struct WeightBounds {
    double phi = 0;    ///< exact weight w_j = ŵ_j(1 + φ_j), |φ_j| ≤ phi
    double eps_s = 0;  ///< |S − Ŝ| ≤ eps_s·s_low
    double s_low = 0, s_up = 0;  ///< Ŝ ∈ [s_low, s_up]
    double e_acc = 0;  ///< the cascaded sums' relative error bound (fast_row.inc)
    double neg = 0;    ///< bound of all negligible keys' exact weights together
  };
  /// `wide`: the row's inputs carry uncertainty (block level), which lengthens
  /// the cascaded sums' error. Returns: false when the bounds are out of their
  /// range (escalate the row).
  static bool weight_bounds(const FastRowOut& o, std::int64_t n, bool wide, WeightBounds& wb);

  /// |H + RN(L + Lc) − Σ_j ŵ_j v_jd| ≤ coef·σ_d + floor for n terms summed on the grid σ_d
  /// (fast_row.inc, weighted_sums_grid); the block's output projection and the
  /// backward's dQ sums (backward_row.inc) use it too.
  struct GridError {
    double coef = 0, floor = 0;
    double at(double sigma) const;  ///< the bound for grid σ_d, rounded up
  };
  static GridError grid_error(std::int64_t n);

 private:
  void prepare_row(std::int64_t row, RowScratch& rs, FastRowArgs& a, FastRowOut& o) const;
  /// Returns: whether a grid row should be run again with the cascaded sums.
  bool grid_too_coarse(const RowScratch& rs, const FastRowOut& o, std::int64_t dv_pad) const;
  bool finish_row(std::int64_t row, RowScratch& rs, const FastRowOut& o, CoreReference& ref, RowRecompute& mp,
                  ReferenceStats& stats) const;

  const CoreProblem& p_;
  const CoreInputs& in_;
  ReferenceOptions opt_;
  const FastKernels* kernels_;
  std::int64_t blocks_ = 0, dv_pad_ = 0;
  double score_coef_ = 0, score_floor_ = 0;  // score_err = score_coef_·σ + score_floor_
  std::vector<double> kt_, vp_, k_norm_, v_max_;  // per (b, g), concatenated
  const WideCoreInputs* wide_ = nullptr;
  std::vector<double> kt_lo_, vp_lo_;     // wide: the low parts in the same layouts
  const double* vp_at_ = nullptr;          // V in padded rows: vp_, or the input itself when Dv needs no padding
  const double* vp_lo_at_ = nullptr;       // wide: the same for the low parts
};

}  // namespace headroom::detail
