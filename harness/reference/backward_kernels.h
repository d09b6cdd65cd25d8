// headroom — the backward fast path's row kernels: dP on a grid, dQ on a grid, dK and dV cascades.
//
// The kernels (backward_row.inc) are compiled twice, inside fast_row_avx2.cpp
// and fast_row_baseline.cpp beside the forward's row kernel and with its Vec
// mechanism, and chosen at run time as fast_kernels() is; both builds perform
// the same IEEE 754 operations in the same order, so they return the same
// bits. The kernels compute values and raw magnitudes; backward_fast.cpp turns
// them into certified bounds (the operation-level error bounds are argued in
// backward_row.inc, how they combine in backward_fast.cpp).
#pragma once

#include <algorithm>
#include <cstdint>

#include "fast_row.h"

namespace headroom::detail {

/// Most rows whose dK and dV terms kv_scatter takes together: each group reads
/// and writes the block's dK/dV accumulators once (6 values per key and column),
/// so larger groups move less memory (tools/bench --backward-only 1024:128:
/// fast/plain 4.4-5.0 with groups of 16, 3.5-4.0 with 64, on the loaded machine).
inline constexpr int kScatterRows = 64;

/// Returns: the rows per group for a block of `tk` keys: kScatterRows, fewer on
/// long rows so the group's per-row arrays (6 values per visible key) stay
/// within 64 MiB, at least 16. The results do not depend on it.
inline int scatter_rows_for(std::int64_t tk) {
  const std::int64_t fit = (std::int64_t{64} << 20) / (48 * std::max<std::int64_t>(tk, 1));
  return static_cast<int>(std::clamp<std::int64_t>(fit, 16, kScatterRows));
}

/// One query row of a (batch, kv head) block. Row vectors are zero-padded to
/// kLanes (dk_pad, dv_pad); key-indexed arrays are [Tk][pad] of the block.
struct BackwardRowArgs {
  const double* q = nullptr;    ///< dk_pad values of the query row
  const double* d_o = nullptr;  ///< dv_pad values of the upstream gradient row
  const double* k = nullptr;    ///< [Tk][dk_pad] keys
  const double* v = nullptr;    ///< [Tk][dv_pad] values
  const std::int64_t* keys = nullptr;  ///< visible keys, n of them
  std::int64_t n = 0, dk_pad = 0, dv_pad = 0;
  /// dp(): per visible key the grid σ_x of the dot product dO·V_j, a power of
  /// two in [2^-900, 2^1000] with Σ_d |dO_d V_jd| ≤ σ_x/2.
  const double* dp_sigma = nullptr;
  /// dp() writes dph + dpl ≈ dO·V_j (normalised) and a = Σ_d |dO_d||V_jd| as computed.
  double *dph = nullptr, *dpl = nullptr, *a = nullptr;
  /// Per visible key: dŜ (ds_hi + ds_lo, normalised; 0 for a negligible key), its
  /// magnitude weight m (0 for a negligible key), P̂ (p_hi + p_lo), and for a
  /// charged row the per-term charges c_k = τ·m of dK (c_v = ρ·P̂_hi of dV).
  const double *ds_hi = nullptr, *ds_lo = nullptr, *m = nullptr, *p_hi = nullptr, *p_lo = nullptr;
  double tau = 0, rho = 0;
  bool charged = false;
  /// dq_grid(): the grids σ_d (dk_pad values), each a power of two in [2^-900, 2^1000] with
  /// Σ_j |ds_hi,j K_jd| ≤ σ_d/2; writes H, L (normalised) and M = Σ_j m_j|K_jd| into
  /// q_hi, q_lo, q_mag. dq_cascade(): the same sums by the cascade of weighted_sums.
  const double* q_sigma = nullptr;
  double *q_hi = nullptr, *q_lo = nullptr, *q_mag = nullptr;
  /// kv_scatter(): the block's dK and dV accumulators ([Tk][dk_pad], [Tk][dv_pad]),
  /// per-term charges of charged rows, and per key the count of terms since the
  /// last renormalisation (renormalised every kRenormEvery) and of rows seen.
  double *k_hi = nullptr, *k_lo = nullptr, *k_mag = nullptr, *k_err = nullptr;
  double *v_hi = nullptr, *v_lo = nullptr, *v_mag = nullptr, *v_err = nullptr;
  std::int64_t *k_fresh = nullptr, *k_rows = nullptr;
};

/// The backward kernel entry points, one set per instruction set.
struct BackwardKernels {
  void (*dp)(const BackwardRowArgs& a);
  void (*dq_grid)(const BackwardRowArgs& a);
  void (*dq_cascade)(const BackwardRowArgs& a);
  /// The dK and dV terms of `count` ≤ kScatterRows rows (in order) sharing
  /// the accumulators, key by key over keys [0, tk).
  void (*kv_scatter)(const BackwardRowArgs* rows, int count, std::int64_t tk);
  /// Renormalises `count` accumulators (hi, lo) = two_sum(hi, lo).
  void (*renormalise)(double* hi, double* lo, std::int64_t count);
  const char* name;
};

/// Returns: the AVX2+FMA kernels when the CPU has both, else the baseline ones.
const BackwardKernels& backward_kernels();
/// Returns: the baseline kernels (for tests: they must agree bit for bit).
const BackwardKernels& backward_kernels_baseline();

namespace fast_avx2 {
void backward_dp(const BackwardRowArgs& a);
void backward_dq_grid(const BackwardRowArgs& a);
void backward_dq_cascade(const BackwardRowArgs& a);
void backward_kv_scatter(const BackwardRowArgs* rows, int count, std::int64_t tk);
void backward_renormalise(double* hi, double* lo, std::int64_t count);
}  // namespace fast_avx2

namespace fast_baseline {
void backward_dp(const BackwardRowArgs& a);
void backward_dq_grid(const BackwardRowArgs& a);
void backward_dq_cascade(const BackwardRowArgs& a);
void backward_kv_scatter(const BackwardRowArgs* rows, int count, std::int64_t tk);
void backward_renormalise(double* hi, double* lo, std::int64_t count);
}  // namespace fast_baseline

}  // namespace headroom::detail
