// headroom — the certified reference: exact attention of the values a kernel received.
//
// For every output element the reference returns o_ref (a multiprecision or
// double-double value, delivered rounded to the nearest double) and a certified
// bound with
//   |o_ref − o_exact| ≤ bound,   bound ≤ 2^target_log2 · Σ_j p_j |v_j|  (default 2^-80)
// where o_exact is the real-number result for the inputs exactly as given and the
// scale exactly as the float32 value passed. The double `out` adds at most
// 2^-53·|out| more (plus 2^-1074 where out is subnormal):
//   |out − o_exact| ≤ bound + 2^-53·|out|.
// Where no precision up to 4096 bits meets the target (in practice: outputs
// below the double range, or inputs near overflow), the bound is still
// certified but larger, and `certified` is false: the reference says so
// rather than guess. Fully masked rows have no value: they are flagged,
// out/bound/magnitude/lse are NaN there.
// Rows are streamed one query at a time: O(Tk + Dv) multiprecision numbers per
// thread; no Tq×Tk matrix of them ever exists; memory O((Tq + Tk)·D) overall.
//
// Two methods give the same guarantee:
//   fast            double-double arithmetic with error-free transformations
//                   and an a-posteriori bound per element (fast_row.h); the
//                   elements whose bound misses the target, and the lse if
//                   it does, are recomputed on the multiprecision path. The
//                   block level's projections too (fast_block.cpp).
//   multiprecision  every row on the multiprecision path (mp_row.h): MPFR at a
//                   precision chosen per row and raised until the target is
//                   met — the straightforward baseline.
// The error derivations sit beside the code in harness/reference/.
// The backward pass (dQ, dK, dV, d(bias)) has its own certified reference with
// bounds stated the same way: headroom/reference_backward.h.
#pragma once

#include <cstdint>
#include <vector>

#include "headroom/problem.h"
#include "headroom/tensor.h"

namespace headroom {

enum class ReferenceBackend : unsigned char {
  mpfr,          ///< Boost.Multiprecision on MPFR (the default)
  cpp_bin_float  ///< Boost's own cpp_bin_float: an independent implementation, for cross-checks
};

enum class ReferenceMethod : unsigned char {
  fast,           ///< double-double fast path, escalating to multiprecision per element (the default)
  multiprecision  ///< every row in multiprecision (the naive baseline)
};

struct ReferenceOptions {
  int target_log2 = -80;  ///< certified bound target, relative to Σ_j p_j |v_j|; lse: absolute
  ReferenceBackend backend = ReferenceBackend::mpfr;  ///< the multiprecision path's arithmetic
  ReferenceMethod method = ReferenceMethod::fast;     ///< both levels (block: see reference_block)
  unsigned threads = 1;   ///< 0: one per hardware thread; results are bit-identical for every count
  /// Core level: the query rows to compute, [B·Hq·Tq] flattened (1 = compute). Empty: every row.
  /// A row left out (a sampled long case, sample_rows in judge.h) costs only its
  /// mask scan: out/bound/magnitude/lse are NaN there and `unsampled` marks it;
  /// a fully masked row is always recognised as such, sampled or not.
  std::vector<std::uint8_t> rows;
};

/// How the work was done (for benchmarks and tests; not part of the result).
struct ReferenceStats {
  std::int64_t rows = 0;                ///< query rows with a visible key
  std::int64_t escalated_rows = 0;      ///< rows of which something was recomputed in multiprecision
  std::int64_t escalated_elements = 0;  ///< output elements recomputed in multiprecision
  std::int64_t escalated_lse = 0;       ///< lse values recomputed in multiprecision
  long max_precision = 0;               ///< highest multiprecision precision used (bits; 0 if none)
  std::int64_t redone_batches = 0;      ///< block, method fast: batches redone whole in multiprecision
};

struct CoreReference {
  Tensor out;        ///< [B, Hq, Tq, Dv] o_ref rounded to nearest double
  Tensor bound;      ///< [B, Hq, Tq, Dv] certified |o_ref − o_exact|
  Tensor magnitude;  ///< [B, Hq, Tq, Dv] Σ_j p_j |v_j| (relative error ≤ 2^-49), the scaled-error unit
  Tensor lse;        ///< [B, Hq, Tq] natural log of Σ_j exp(z_j), rounded to double; NaN when fully masked
  Tensor lse_bound;  ///< [B, Hq, Tq] certified |lse_ref − lse_exact|
  std::vector<std::uint8_t> fully_masked;  ///< [B·Hq·Tq] 1 where no key is visible
  std::vector<std::uint8_t> unsampled;     ///< [B·Hq·Tq] 1 where a visible row was left out (opt.rows); NaN there
  bool certified = true;  ///< every bound met the target (elements relative to magnitude; lse absolute)
  ReferenceStats stats;
};

/// Returns: the certified reference of a core problem. Throws InputError when
/// validate(p, in) finds anything or an input is not finite.
CoreReference reference_core(const CoreProblem& p, const CoreInputs& in, const ReferenceOptions& opt = {});

struct BlockReference {
  Tensor out;        ///< [B, Tq, Dm]
  Tensor bound;      ///< [B, Tq, Dm] certified |y_ref − y_exact|
  Tensor magnitude;  ///< [B, Tq, Dm] Σ_c |concat_c| |W_o[c, m]| + |b_o[m]|, the scaled-error unit
  std::vector<std::uint8_t> fully_masked;  ///< [B·Hq·Tq]; a Y row is NaN when any head's row is masked
  bool certified = true;
  /// Method fast: rows = rows of Y formed, escalated_rows = rows of Y whose head
  /// outputs were recomputed in multiprecision to a tighter target,
  /// escalated_elements = head output elements recomputed in multiprecision,
  /// redone_batches = batches redone whole on the multiprecision path.
  ReferenceStats stats;
};

/// Returns: the certified reference of a block problem (projections, attention
/// per head, concatenation, output projection, all exact to the bound), to the
/// contract above with the block's magnitude: |y_ref − y_exact| ≤ bound ≤
/// 2^target_log2 · (Σ_c |concat_c||W_o[c, m]| + |b_o[m]|) where certified.
/// Method fast (with the mpfr backend): projections as double-doubles from
/// error-free products, each projected element carried with its certified
/// radius into the core fast path (which widens its bound by the propagated
/// input uncertainty), the output projection likewise (fast_block.cpp); a
/// row of Y that misses the target has its head outputs recomputed in MPFR,
/// and a batch that still misses is redone on the multiprecision path.
/// Method multiprecision, or the cpp_bin_float backend: every batch in
/// multiprecision throughout (the cross-check). Throws InputError as reference_core.
BlockReference reference_block(const BlockProblem& p, const BlockInputs& in, const ReferenceOptions& opt = {});

}  // namespace headroom
