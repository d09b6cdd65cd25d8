// headroom — the fast path's row kernel: double-double attention of one query row.
//
// The kernel (fast_row.inc) is compiled twice — for AVX2+FMA and for the
// baseline instruction set — and chosen at run time; both perform the same
// IEEE 754 operations in the same order, so they return the same bits. It
// computes values and the raw error quantities; fast_core.cpp turns those
// into certified bounds (the derivations are split the same way: what
// happens inside an operation sequence is argued in fast_row.inc, how the
// pieces combine in fast_core.cpp).
#pragma once

#include <cmath>
#include <cstdint>

namespace headroom::detail {

/// Lanes per vector in the kernel's data layout (4 doubles: one AVX2 register).
inline constexpr std::int64_t kLanes = 4;
/// Visible keys between renormalisations of the accumulators (see fast_row.inc).
inline constexpr std::int64_t kRenormEvery = 8;
/// Rows taken together by the kernel when they see the same keys.
inline constexpr int kMaxGroup = 4;
/// Keys whose shifted score t_j = z_j − m is below this are "negligible":
/// weight 0, charged as at most e^-650 < 2^-937 each.
inline constexpr double kNegligibleT = -650.0;

/// Relative error of the kernel's double-double exp, 16u² = 2^-102 (derived in fast_row.inc).
inline constexpr double kFastExpRelErr = 16 * 0x1p-106;

/// Constants of the double-double exp, from MPFR (fast_tables.cpp).
struct FastTables {
  double pow2_hi[128], pow2_lo[128];  ///< 2^(i/128) as normalised double-doubles, relative error ≤ u²(1+u)
  double ln2_128[3];                  ///< ln 2 / 128 as a triple-double, relative error ≤ 2^-159
  double inv_ln2_128;                 ///< RN(128 / ln 2); only steers the reduction
  double fact_hi[10], fact_lo[10];    ///< 1/k! as normalised double-doubles (k = 0..9)
};

/// Returns: the tables, computed once (thread-safe).
const FastTables& fast_tables();

struct FastRowArgs {
  const double* q = nullptr;      ///< Dk values
  const double* kt = nullptr;     ///< keys in blocks of kLanes: kt[(blk·Dk + c)·kLanes + l] = K[blk·kLanes + l][c], zero-padded
  const double* vp = nullptr;     ///< values [Tk][dv_pad], zero-padded columns
  const double* k_norm = nullptr; ///< [Tk] upper bounds of ‖k_j‖₂
  const std::int64_t* keys = nullptr;  ///< visible keys, increasing, n of them (n ≥ 1)
  const double* bias = nullptr;   ///< n biases or null
  std::int64_t n = 0, dk = 0, dv = 0, dv_pad = 0;
  double scale = 1.0;
  /// The scores' extraction grid (fast_row.inc, score_blocks): a power of two with
  /// Σ_c |q_c·k_jc| ≤ sigma/2 for every visible key; above 2^1000 the row is not finished.
  double sigma = 1.0;
  double score_err = 0;  ///< every dot product errs by ≤ score_err (the kernel adds the rest of E_z,j)
  double q_norm = 0;     ///< upper bound of ‖q‖₂
  // Double-double inputs (block level; null at core level): q + q_lo, keys kt + kt_lo (same
  // layout), values vp + vp_lo, each normalised (|lo| ≤ u|hi|). Radii: the exact inputs lie
  // within q_rad (an upper bound of ‖δq‖₂) and k_rad[j] (of ‖δk_j‖₂) of them.
  /// weighted() only: every w_hi·v product exact in double and w_lo = 0: triple-double
  /// sums (fast_row.inc, weighted_sums_exact), acc ≥ 5·dv_pad with L3 after GL.
  bool exact_sums = false;
  /// With exact_sums: the sums run on the grids σ_c = acc[5·dv_pad + c] (fast_row.inc,
  /// weighted_sums_exact_grid), acc ≥ 6·dv_pad, n ≤ 2^30; acc then holds H, L2, GH, GL, H2.
  bool exact_grid = false;
  /// weighted() only, without exact_sums: the double-double weighted sums run on the
  /// grids σ_c = acc[5·dv_pad + c] (fast_row.inc, weighted_sums_grid, whose conditions
  /// the caller meets: Σ_j |w_hi,j·v_jc| ≤ σ_c/2, 2^-900 ≤ σ_c ≤ 2^1000, n ≤ 2^30),
  /// acc ≥ 6·dv_pad; acc then holds H, L, GH, GL, Lc (H + RN(L + Lc) the sum).
  bool weighted_grid = false;
  const double* q_lo = nullptr;
  const double* kt_lo = nullptr;
  const double* vp_lo = nullptr;
  double q_rad = 0;
  const double* k_rad = nullptr;
  /// Attention rows (null for projections): [dv_pad] upper bounds of max_j |v_jd| over
  /// the keys (high parts), zero-padded; the weighted sums then run on a grid
  /// (fast_row.inc, weighted_sums_grid) unless no_grid, and acc ≥ 6·dv_pad.
  const double* v_max = nullptr;
  bool no_grid = false;
  /// group() only: stop after the weights (w_hi, w_lo, Ŝ, r_max, negligible);
  /// no weighted sums, outputs or lse are computed, and o.ok says only that the
  /// weights and Ŝ are finite (the backward, which needs no forward output).
  bool weights_only = false;
  const FastTables* tables = nullptr;
  // Scratch, caller-owned: raw_hi/raw_lo ≥ Tk rounded up to kLanes, w_hi/w_lo ≥ n rounded up
  // to kLanes, acc ≥ 4·dv_pad.
  double *raw_hi = nullptr, *raw_lo = nullptr, *w_hi = nullptr, *w_lo = nullptr, *acc = nullptr;
};

struct FastRowOut {
  double* out = nullptr;  ///< dv values: RN(o_ref), o_ref = q1 + q2 the double-double quotient
  double* out_lo = nullptr;  ///< dv values or null: o_ref − out exactly
  double* g = nullptr;    ///< dv values: Ĝ_d ≈ Σ_j w_hi,j |v_jd| (relative error ≤ 2^-49.5)
  double s_hi = 0, s_lo = 0;  ///< Ŝ = Σ_j ŵ_j, normalised
  double r_max = 0;       ///< max over keys of the exponent uncertainty r_j (before the final inflation)
  std::int64_t negligible = 0;  ///< keys with t_j < kNegligibleT (weight 0)
  double* neg_vmax = nullptr;   ///< dv values: max |v_jd| over negligible keys (written when negligible > 0)
  double lse = 0;         ///< RN(lse_ref)
  double lse_err = 0;     ///< |lse_ref − (m + log Ŝ)| (before the final inflation)
  bool ok = false;        ///< false: a non-finite value or a reduction out of range; escalate the row
  /// The weighted sums ran on the grid σ_d = acc[5·dv_pad + d] (weighted_sums_grid):
  /// H + L errs by the driver's grid_error·σ_d, not e_acc·Ḡ.
  bool grid = false;
};

/// The kernel entry points, one set per instruction set. group(rows, outs,
/// count) computes `count` ≤ kMaxGroup rows whose visible key lists are equal
/// (each row's results are those it would get alone).
/// weighted(rows, count): for `count` ≤ kMaxGroup rows sharing keys and
/// values, acc = the weighted sums H, L, GH, GL from zero (fast_row.inc,
/// weighted_group_kernel): a double-double matrix–vector product.
struct FastKernels {
  void (*group)(const FastRowArgs* rows, FastRowOut* outs, int count);
  void (*weighted)(const FastRowArgs* rows, int count);
  const char* name;
};

/// Returns: σ2/σ = 2^(⌈log2 n⌉ − 51) of weighted_sums_exact_grid's second grid (n ≥ 1).
inline double exact_grid_ratio(std::int64_t n) {
  int e = 0;
  while ((std::int64_t{1} << e) < n) ++e;
  return std::ldexp(1.0, e - 51);
}

/// Returns: the AVX2+FMA kernels when the CPU has both, else the baseline ones.
const FastKernels& fast_kernels();
/// Returns: the baseline kernels (for tests: they must agree bit for bit).
const FastKernels& fast_kernels_baseline();

namespace fast_avx2 {
/// Returns: whether this build has the AVX2 kernels (x86 and a GCC-compatible compiler).
bool available();
void group(const FastRowArgs* rows, FastRowOut* outs, int count);
void weighted(const FastRowArgs* rows, int count);
}  // namespace fast_avx2

namespace fast_baseline {
void group(const FastRowArgs* rows, FastRowOut* outs, int count);
void weighted(const FastRowArgs* rows, int count);
}  // namespace fast_baseline

}  // namespace headroom::detail
