// headroom — judging one case: run the kernel, compute the exact answer, score, detect faults.
//
// The per-case pipeline of DESIGN.md, in one place:
//   receive (round/quantise the source values to the kernel's input format)
//   → run (isolated) → certified reference of what the kernel received
//   → scores (scores.h) → faults (faults.h: non_finite, convention, mask_leak,
//     nondeterministic, isolation classes) → the reference of the ORIGINAL
//   source values (the input-quantisation split) → the ratio to the bundled
//   textbook kernel of the same format on the same case; for a kernel with a
//   backward entry, on core cases, its gradients (judge_backward.h).
// The budget verdict is applied afterwards (qualify.h), so a record can be
// re-judged against another budget without re-running anything.
#pragma once

#include <memory>
#include <optional>
#include <string>
#include <vector>

#include "headroom/attach.h"
#include "headroom/case.h"
#include "headroom/faults.h"
#include "headroom/record.h"
#include "headroom/reference.h"
#include "headroom/scores.h"

namespace headroom {

struct JudgeOptions {
  DetectorOptions detect;          ///< run options, determinism runs, leak probing, reference options
  AttachedKernel* plain = nullptr; ///< the textbook kernel of the same formats, for ratio_to_plain; may be null
  AttachedKernel* plain_backward = nullptr;  ///< the plain same-precision backward (judge_backward.h); may be null
  bool quantisation_split = true;  ///< also compute the reference on the source values when they differ
};

/// What one case came to. `record.within_budget` is left true: qualify.h applies the budget.
struct Judgement {
  CaseRecord record;
  std::optional<CaseScore> score;  ///< absent when the kernel did not run to completion
  std::optional<PlainRatio> ratio; ///< to the textbook kernel of the format, when it ran on the case
  CaseFaults faults;
  std::optional<std::string> unfit;  ///< set when the case does not fit the kernel's declaration: not run
};

/// Returns: the judgement of kernel `k` on case `c`. `replay` is the command
/// that reproduces the case (recorded as is). Never throws for kernel
/// misbehaviour; throws InputError for a case inconsistent in itself.
Judgement judge_case(AttachedKernel& k, const Case& c, const JudgeOptions& opt, const std::string& replay);
/// As above, for a case the caller will not read again but for its name,
/// shape, mask and provenance: its Q, K, V and block inputs may be moved into
/// what the kernel receives instead of copied (left empty), so one case's
/// tensors are held once. Verdicts and figures are the same either way.
Judgement judge_case(AttachedKernel& k, Case&& c, const JudgeOptions& opt, const std::string& replay);

/// Returns: whether kernels declared `a` and `b` receive a case identically
/// (same level, formats and int8 schemes), so one's inputs and reference serve both.
bool receives_alike(const KernelDeclaration& a, const KernelDeclaration& b);

/// Returns: the kernel ratios to plain are taken to: the bundled textbook
/// kernel that receives inputs as `d` does, else the first sound bundled kernel
/// that does; null when there is none.
std::unique_ptr<AttachedKernel> plain_kernel_for(const KernelDeclaration& d);

/// Key-row pairs (query rows × Tk) the certified reference computes per core
/// case before it samples: 2^20, about 0.3 s of reference time at D = 128 on
/// one core (measured with `headroom reference` at Tk = 16384, 128 rows).
inline constexpr std::int64_t kJudgedKeyRows = std::int64_t{1} << 20;

/// Returns: the query rows of a core case of shape `s` that the reference
/// judges, [B·Hq·Tq] flattened (1 = judged), or empty when every row is: when
/// B·Hq·Tq·Tk ≤ key_rows. Otherwise max(16, key_rows / Tk) rows (at most all),
/// spread evenly over the flattened (b, h, i) index and always holding the
/// last row, so every batch and head is reached when enough rows are judged
/// and the longest causal row is always among them. Deterministic: depends on
/// the shape alone. The kernel still computes every row, and every row is
/// still checked for non-finite output and the masked-row convention.
std::vector<std::uint8_t> sample_rows(const CoreShape& s, std::int64_t key_rows = kJudgedKeyRows);

/// Multiply-adds of one kernel call (B·Hq·Tq·Tk·(Dk + Dv)) that the mask-leak
/// probes of one case may spend in all: each probe is three full calls
/// (faults.h), so a production-sized case probes fewer masked-key sets.
inline constexpr std::int64_t kLeakProbeWork = std::int64_t{1} << 30;

/// Returns: the masked-key sets to probe for a core case of shape `s`:
/// `most` when B·Hq·Tq·Tk·(Dk+Dv)·3·most ≤ kLeakProbeWork, else fewer, at least 1.
int leak_patterns_for(const CoreShape& s, int most);

/// Returns: "B,Hq,Hkv,Tq,Tk,Dk,Dv" (core) or "B,Tq,Tk,Dm,Hq,Hkv,Dk,Dv" (block).
std::string shape_text(const Case& c);

/// Returns: the largest |z| = |s·q·k + bias| over visible (query, key) pairs of
/// the case's source values (double arithmetic: a plotting coordinate, not a score).
double logit_scale(const Case& c);

}  // namespace headroom
