// headroom — the certified backward reference: exact gradients of attention for the values received.
//
// With S = s·QKᵀ + bias over the visible keys, P = softmax(S), O = PV and the
// upstream gradient dO (Dao et al. 2022, "FlashAttention", Alg. 4; the same
// formulas in kernel_abi.h):
//   dV_j = Σ_i P_ij dO_i          dP_ij = dO_i · V_j        D_i = Σ_j P_ij dP_ij
//   dS_ij = P_ij (dP_ij − D_i)    dQ_i = s Σ_j dS_ij K_j    dK_j = s Σ_i dS_ij Q_i
// with i ranging over every query row of every query head of the key/value
// head's group (grouped-query dK, dV sum over the group), and d(bias) = dS.
// D_i is the exact Σ_j P_ij dP_ij (= dO_i · O_i for the exact O), not a
// kernel's.
//
// Each element comes with a certified bound and its natural magnitude (the
// scaled-error unit), with A_ij = Σ_d |dO_id||V_jd| and A_i = Σ_j P_ij A_ij:
//   dV_jd:  |dV_ref − dV_exact| ≤ bound ≤ 2^target · Σ_i P_ij |dO_id|
//   dS_ij:  … ≤ 2^target · P_ij (A_ij + A_i)
//   dQ_id:  … ≤ 2^target · |s| Σ_j P_ij (A_ij + A_i) |K_jd|
//   dK_jd:  … ≤ 2^target · |s| Σ_i P_ij (A_ij + A_i) |Q_id|
// (default target 2^-80; the magnitudes are those of the terms of each sum,
// so the bound says how much of the cancellation in the sum the reference
// resolves). The double `out` adds at most 2^-53|out| as for the forward.
// Where a magnitude is 0 the exact value is 0 and the reference gives 0 with
// bound 0 (a key masked from every query has dK = dV = 0 exactly; a fully
// masked query row has dQ = 0). Where no precision up to 4096 bits meets the
// target the bound is still certified but larger and `certified` is false.
//
// Method fast: per (batch, kv head), rows in order, on the forward's fast
// path (its double-double weights) with double-double dot products and
// cascaded sums, bounded a posteriori (harness/reference/backward_fast.cpp);
// elements missing the target, and every element of a row the fast path
// cannot finish, are recomputed one by one in interval arithmetic on MPFR
// (backward_mp.cpp), precision raised until met. Method multiprecision:
// every element on that path. Results do not depend on the thread count.
#pragma once

#include <cstdint>
#include <vector>

#include "headroom/problem.h"
#include "headroom/reference.h"
#include "headroom/tensor.h"

namespace headroom {

/// One gradient tensor of the reference.
struct GradientReference {
  Tensor out;        ///< RN(g_ref)
  Tensor bound;      ///< certified |g_ref − g_exact|
  Tensor magnitude;  ///< the natural magnitude above (a certified lower end, within 2^-30 of it)
};

struct BackwardStats {
  std::int64_t rows = 0;                ///< query rows with a visible key
  std::int64_t escalated_elements = 0;  ///< gradient elements recomputed in multiprecision
  long max_precision = 0;               ///< highest precision used (bits; 0 if none)
  std::int64_t dp_dot2_rows = 0;     ///< fast path: rows whose dP left the grid for the cascaded dot product
  std::int64_t dq_cascade_rows = 0;  ///< fast path: rows whose dQ sums left the grid for the cascade
  std::int64_t charged_rows = 0;     ///< fast path: rows whose dK/dV terms were charged one by one (τ above kCleanTau)
};

struct BackwardReference {
  GradientReference d_q;  ///< [B, Hq, Tq, Dk]
  GradientReference d_k;  ///< [B, Hkv, Tk, Dk]
  GradientReference d_v;  ///< [B, Hkv, Tk, Dv]
  GradientReference d_s;  ///< [B, Hq, Tq, Tk] (= d(bias) per query head) when asked for; else empty
  std::vector<std::uint8_t> fully_masked;  ///< [B·Hq·Tq] 1 where a query row sees no key
  bool certified = true;
  BackwardStats stats;
};

struct BackwardOptions {
  ReferenceOptions base;       ///< target, method, threads (backend: MPFR always)
  bool with_d_scores = false;  ///< also return dS (for d(bias))
};

/// Returns: the certified gradients of core attention for upstream gradient
/// `d_o` [B, Hq, Tq, Dv]. Throws InputError when validate(p, in) finds
/// anything, d_o is misshapen, or an input is not finite.
BackwardReference reference_backward(const CoreProblem& p, const CoreInputs& in, const Tensor& d_o,
                                     const BackwardOptions& opt = {});

}  // namespace headroom

namespace headroom {

/// Returns: the certified d(bias) [B, mask_heads, Tq, Tk] of a bias mask from
/// ref.d_s (BackwardOptions::with_d_scores): dS itself when the bias has a
/// head per query head (mask_heads = Hq); with one bias shared by the heads
/// (mask_heads = 1), d(bias)_bij = Σ_h dS_bhij, the heads' values added in
/// double by Sum2 (Ogita, Rump & Oishi 2005, "Accurate sum and dot product",
/// Alg. 4.4; its error before the last rounding is at most γ_{n−1}² Σ|p_h|,
/// the proof of Prop. 4.5, from memory) with the bound Σ_h (bound_h +
/// 2^-52 |dS_h|) + γ_n² Σ_h |dS_h| and magnitude Σ_h magnitude_h (the
/// magnitudes of the summed terms). On a shared bias the heads' own
/// roundings to double make that bound up to about Hq·2^-52 of the magnitude
/// rather than 2^target: still 2^-27 of a float32 unit at Hq = 16.
/// Preconditions: ref.d_s is filled; mask_heads is 1 or Hq.
GradientReference bias_gradient(const BackwardReference& ref, std::int64_t mask_heads);

}  // namespace headroom
