// headroom — a backward kernel's gradients judged: per-tensor scores and the backward's faults.
//
// Two ways to judge a backward (docs/backward.md): fed the exact O and
// log-sum-exp (rounded to the formats the ABI passes them in) it shows the
// backward's own error; fed the kernel's own forward outputs it shows the
// error training sees, end to end. Both are scored the same way here.
//
// Faults, each counted, never averaged into a figure:
//   non_finite        a NaN/inf gradient where the reference is finite;
//   masked_key_leak   a dK or dV element of a key no query sees (its exact
//                     gradient is 0, certified with bound 0) that is not 0;
//   nondeterministic  two calls on the same inputs disagree in a bit, for a
//                     kernel not declaring HR_BACKWARD_NONDETERMINISTIC
//                     (same_gradients);
//   wrong_group_sum   grouped-query dK or dV off the reference while equal,
//                     within the kernel's own error, to one query head's share
//                     (group_share_error).
#pragma once

#include <cstdint>
#include <vector>

#include "headroom/attach.h"
#include "headroom/reference_backward.h"
#include "headroom/scores.h"

namespace headroom {

struct GradientScores {
  CaseScore d_q, d_k, d_v;
  /// d(bias) against the certified dS (bias_gradient, reference_backward.h),
  /// when the run returned one and the reference carries dS; else not judged.
  CaseScore d_bias;
  bool bias_judged = false;
  std::int64_t non_finite = 0;        ///< over the tensors judged
  std::int64_t masked_key_leaks = 0;  ///< dK, dV elements of keys no query sees that are not exactly 0
  std::vector<std::int64_t> first_masked_key_leak;  ///< (b, g, j, d) of the first, empty when none
  /// Returns: the largest max_scaled_error of the tensors judged.
  double max_scaled_error() const;
};

/// Returns: the scores of a backward run's dQ, dK, dV (and d(bias) when the
/// run has one and ref.d_s is filled: BackwardOptions::with_d_scores) against
/// `ref`, in output format f: d(bias) is float32 by the ABI but judged in the
/// kernel's output format's units like the other gradients. Preconditions:
/// run.status is ok; shapes as the reference's (std::invalid_argument otherwise).
GradientScores score_gradients(const BackwardRun& run, const BackwardReference& ref, Format f);

/// Returns: whether two runs gave bit-identical gradients (every tensor).
bool same_gradients(const BackwardRun& a, const BackwardRun& b);

/// Returns: the largest element-wise spread |a − b| over the tensors (d(bias) too when both have one and ref.d_s is filled),
/// in units of each element's natural magnitude times u_F (the scaled error of
/// one run against the other): the figure a nondeterministic kernel is judged on.
double gradient_spread(const BackwardRun& a, const BackwardRun& b, const BackwardReference& ref, Format f);

/// Returns: for a grouped-query case (Hq > Hkv), whether the run's dK and dV
/// are those of one query head of each group rather than the group's sum: the
/// largest scaled error against the certified per-head shares (the reference
/// of the same problem with every query head given its own copy of K and V)
/// is below 1/16 of that against the sum, and the latter above `threshold`.
/// false for Hkv = Hq. `received` is the case as the kernel received it.
bool wrong_group_sum(const BackwardRun& run, const Case& received, const GradientScores& s, double threshold, Format f);

}  // namespace headroom
