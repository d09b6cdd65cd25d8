// headroom — the certified reference: exact attention of the values a kernel received.
//
// For every output element the reference returns o_ref (a multiprecision value,
// delivered rounded to the nearest double) and a certified bound with
//   |o_ref − o_exact| ≤ bound,   bound ≤ 2^target_log2 · Σ_j p_j |v_j|  (default 2^-80)
// where o_exact is the real-number result for the inputs exactly as given and the
// scale exactly as the float32 value passed. The double `out` adds at most
// 2^-53·|out| more: |out − o_exact| ≤ bound + 2^-53·|out|.
// Fully masked rows have no value: they are flagged, out/bound are NaN there.
// Rows are streamed one query at a time: O(Tk + Dv) multiprecision numbers per
// thread; no Tq×Tk matrix of them ever exists.
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

struct ReferenceOptions {
  int target_log2 = -80;  ///< certified bound target, relative to Σ_j p_j |v_j|
  ReferenceBackend backend = ReferenceBackend::mpfr;
  unsigned threads = 1;   ///< results are bit-identical for every thread count
};

struct CoreReference {
  Tensor out;        ///< [B, Hq, Tq, Dv] o_ref rounded to nearest double
  Tensor bound;      ///< [B, Hq, Tq, Dv] certified |o_ref − o_exact|
  Tensor magnitude;  ///< [B, Hq, Tq, Dv] Σ_j p_j |v_j| (relative error ≤ 2^-50), the scaled-error unit
  Tensor lse;        ///< [B, Hq, Tq] natural log of Σ_j exp(z_j), rounded to double; NaN when fully masked
  Tensor lse_bound;  ///< [B, Hq, Tq] certified |lse_ref − lse_exact|
  std::vector<std::uint8_t> fully_masked;  ///< [B·Hq·Tq] 1 where no key is visible
  bool certified = true;  ///< every bound met the target
};

/// Returns: the certified reference of a core problem.
/// Preconditions: validate(p, in) is empty; inputs finite.
CoreReference reference_core(const CoreProblem& p, const CoreInputs& in, const ReferenceOptions& opt = {});

struct BlockReference {
  Tensor out;        ///< [B, Tq, Dm]
  Tensor bound;      ///< [B, Tq, Dm] certified |y_ref − y_exact|
  Tensor magnitude;  ///< [B, Tq, Dm] Σ_c |concat_c| |W_o[c, m]| + |b_o[m]|, the scaled-error unit
  std::vector<std::uint8_t> fully_masked;  ///< [B·Hq·Tq]
  bool certified = true;
};

/// Returns: the certified reference of a block problem (projections, attention
/// per head, concatenation, output projection, all exact to the bound).
BlockReference reference_block(const BlockProblem& p, const BlockInputs& in, const ReferenceOptions& opt = {});

}  // namespace headroom
