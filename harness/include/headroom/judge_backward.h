// headroom — judging a kernel's backward on one case, and its gradients against the budget.
//
// For a kernel declaring a backward entry (kernel_abi.h run_backward), on a
// core case whose forward ran: the certified backward reference of what the
// kernel received (dO included: the case's own d_o.npy, else the generated
// upstream gradient of upstream_gradient.h), then two backward calls — fed the
// exact O and log-sum-exp (the certified forward rounded to the formats the
// ABI passes: O to the output format, lse to float32), and fed the kernel's
// own forward outputs (end to end) — each scored per gradient tensor
// (gradient_scores.h; d(bias) against the certified dS too when the kernel
// declares HR_BACKWARD_BIAS_GRAD and the mask is a bias). Faults: non_finite_gradient, masked_key_gradient,
// wrong_group_sum, nondeterministic (a further call fed the exact inputs
// differs in a bit; a kernel declaring HR_BACKWARD_NONDETERMINISTIC is judged
// on the spread instead, against the fed-exact gradient limit), and a call
// that crashes, times out or writes out of bounds as the forward's classes
// (detail "backward: ..."). Gradient elements whose exact value rounds beyond
// the output format's range are excluded from scores and from
// non_finite_gradient, and counted in a note. Each element's unit is widened
// by the underflow of the products its terms pass through, so a weight below
// the working format's normal range is not charged as the kernel's error
// (judge_backward.cpp, add_underflow_floor: η = 2^-150 per product in float32,
// 2^-1074 in float64, times the coefficients it reaches the element through).
// The ratio to the plain
// same-precision backward (JudgeOptions::plain_backward) is taken per tensor
// and way, the plain backward fed the same exact O/lse, or its own forward.
#pragma once

#include <cstdint>
#include <memory>
#include <vector>

#include "headroom/budget.h"
#include "headroom/judge.h"

namespace headroom {

/// Returns: `c` itself when it needs no dO (not core, or kernel `d` has no
/// backward entry, or c carries one), else a copy with dO = upstream_gradient_for(c).
Case with_upstream_gradient(const Case& c, const KernelDeclaration& d);

/// Judges the backward of `k` on `rc` (received with dO) into j.record.backward,
/// appending its faults to j.faults and notes to j.faults.notes.
/// Preconditions: k.declaration().backward; `first` is k's forward run on rc
/// with status ok and `ref` the reference of rc.
void judge_backward(AttachedKernel& k, const ReceivedCase& rc, const Case& source, const KernelRun& first,
                    const CoreReference& ref, const JudgeOptions& opt, Judgement& j);

/// Returns: the plain same-precision backward gradients are compared with: the
/// first sound bundled kernel with a backward entry receiving inputs as `d`
/// does; null when there is none or `d` has no backward.
std::unique_ptr<AttachedKernel> plain_backward_for(const KernelDeclaration& d);

/// Returns: why the gradients in rec.backward are outside `budget` (none when
/// within or not judged): each tensor's (d(bias) included when judged) max scaled error fed exact against
/// gradient_scaled_error_limit(n_g, fwd, 2) and end to end against
/// gradient_scaled_error_limit(n_g + n, fwd, 3) — n_g the gradient and n the
/// forward accumulation length of `shape` — and each ratio to the plain
/// backward against max_gradient_ratio_to_plain. Sets rec.limits' gradient
/// limits. Preconditions: `fwd` is the case's forward score.
std::vector<VerdictReason> judge_gradients(CaseRecord& rec, const CaseScore& fwd, const KernelBudget& budget,
                                           const CoreShape& shape);

}  // namespace headroom
