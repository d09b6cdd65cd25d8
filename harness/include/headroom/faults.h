// headroom — fault classes and the detectors that find them through the attach API.
//
// A fault is a defect that no error budget excuses: it is counted per class and
// never averaged into an error statistic (scores.h excludes the elements it
// touches). Classes and their JSON names (DESIGN.md, "Scores"):
//   non_finite        NaN/Inf output where the reference is finite
//   mask_leak         a masked key or value changes the output (poisoned re-runs)
//   oob_read          the kernel read past an input (guard page; RunStatus)
//   oob_write         the kernel wrote outside an output (canary; RunStatus)
//   convention        fully masked rows not as declared, or the causal alignment
//                     opposite to the declared one
//   nondeterministic  two identical runs differ in any bit
//   crash, timeout    from RunStatus
//   stray_process     the call returned but left a process it started running (RunStatus)
// and, for a kernel with a backward entry (gradient_scores.h, docs/backward.md):
//   non_finite_gradient   a NaN/Inf dQ, dK or dV element where the exact gradient is
//                         finite and within the output format's range
//   masked_key_gradient   a dK or dV element of a key no query sees that is not exactly 0
//   wrong_group_sum       grouped-query dK, dV equal to one query head's share, not the group's sum
// and, for a kernel writing split-KV partials (HR_FEATURE_SPLIT_PARTIALS, judge_splits.h):
//   split_partial         a split's output or log-sum-exp off the exact attention over its own keys
//   split_merge           every partial within budget, the merged output not their log-sum-exp merge
// (a backward whose repeated calls differ is `nondeterministic`, its detail says "backward").
// RunStatus unsupported and bad_output are not faults of the numerics: they are
// counted separately (CaseFaults::unsupported_runs, bad_output_runs).
#pragma once

#include <cstdint>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "headroom/attach.h"
#include "headroom/reference.h"

namespace headroom {

enum class FaultClass : unsigned char {
  non_finite,
  mask_leak,
  oob_read,
  oob_write,
  convention,
  nondeterministic,
  crash,
  timeout,
  stray_process,
  non_finite_gradient,
  masked_key_gradient,
  wrong_group_sum,
  split_partial,
  split_merge,
};

/// Every fault class, in the order above.
inline constexpr FaultClass kAllFaultClasses[] = {
    FaultClass::non_finite, FaultClass::mask_leak,        FaultClass::oob_read, FaultClass::oob_write,
    FaultClass::convention, FaultClass::nondeterministic, FaultClass::crash,    FaultClass::timeout,
    FaultClass::stray_process, FaultClass::non_finite_gradient, FaultClass::masked_key_gradient,
    FaultClass::wrong_group_sum, FaultClass::split_partial, FaultClass::split_merge,
};

/// Returns: the JSON name ("non_finite", "mask_leak", ...).
std::string_view fault_class_name(FaultClass c);
/// Returns: the class of a JSON name, or nothing.
std::optional<FaultClass> parse_fault_class(std::string_view name);
/// Returns: the fault class of an isolation outcome (crash, oob_read,
/// oob_write, timeout, stray_process), or nothing for ok, unsupported and bad_output.
std::optional<FaultClass> fault_of(RunStatus s);

struct Fault {
  FaultClass kind = FaultClass::non_finite;
  std::string detail;                ///< one line: what, where, the values (hex floats)
  std::vector<std::int64_t> where;   ///< first offending index: (b, h, i, d) output element,
                                     ///< (b, h, i, j) for a leak when the key is inferred; empty when unknown
  std::int64_t count = 0;            ///< elements (non_finite, nondeterministic) or rows (mask_leak,
                                     ///< convention) affected
  double leaked_mass = -1;           ///< mask_leak: certified lower bound on the leaked probability mass
                                     ///< in the worst row (see detect_mask_leak); −1 when not inferable
};

/// Everything the detectors found on one case.
struct CaseFaults {
  std::vector<Fault> faults;         ///< at most one per class
  int unsupported_runs = 0;          ///< runs answered HR_UNSUPPORTED
  int bad_output_runs = 0;           ///< runs with missing or malformed output
  std::string bad_output_detail;     ///< the first such run's defect: which file, what was wrong
  int runs = 0;                      ///< kernel calls made by the detectors (not counting the first run)
  std::vector<std::string> notes;    ///< coverage remarks (e.g. leak patterns sampled), not faults

  /// Returns: the fault of class c, or null.
  const Fault* find(FaultClass c) const;
};

struct DetectorOptions {
  RunOptions run;                    ///< for every re-run
  int determinism_runs = 3;          ///< identical runs compared, counting the first; < 2 skips the check
  int max_leak_patterns = 16;        ///< distinct masked-key sets probed (evenly sampled beyond this)
  bool mask_leak = true;
  bool alignment = true;             ///< compute the opposite causal alignment's reference when Tq ≠ Tk
  ReferenceOptions reference;        ///< for that reference
};

/// Returns: a non_finite fault when `out` (or `lse`) holds NaN/Inf where `ref`
/// is finite, outside fully masked rows; else nothing. Rows the reference left
/// out (CoreReference::unsampled) count as finite: every one is still checked.
std::optional<Fault> detect_non_finite(const KernelRun& run, const CoreReference& ref);
std::optional<Fault> detect_non_finite(const KernelRun& run, const BlockReference& ref);

/// Returns: a convention fault when a fully masked row of a core output is not
/// as `declared`: zeros — every element ±0 (and lse, if returned, −inf); nan —
/// every element NaN (lse NaN or −inf); never_called — no check (such cases are
/// never given to the kernel; receive refuses them).
std::optional<Fault> detect_masked_rows(const KernelRun& run, const CoreReference& ref, MaskedRowConvention declared);

/// Returns: a convention fault when the case is causal with Tq ≠ Tk and the
/// output is far from the declared alignment's reference (max scaled error
/// ≥ 16 in output rounding units) but at least 8 times closer to the opposite
/// alignment's, computed with `opt.reference`; measured over rows that neither
/// alignment fully masks. Else nothing (also for non-causal or square cases).
std::optional<Fault> detect_causal_alignment(const KernelRun& run, const ReceivedCase& c, const CoreReference& ref,
                                             Format output_format, const ReferenceOptions& opt);
std::optional<Fault> detect_causal_alignment(const KernelRun& run, const ReceivedCase& c, const BlockReference& ref,
                                             Format output_format, const ReferenceOptions& opt);

/// Returns: a mask_leak fault when poisoning masked keys changes a row that
/// must not see them. Method: for each distinct set S of keys masked for a
/// query row (per batch and key/value head; block level: masked in every
/// head), re-run with the keys of S poisoned and compare bit for bit every row
/// whose masked set contains S (±0 count as equal: 0·v reads v but leaks no
/// mass). Three runs per set: V := P_V (a power of two 2^8 above max|V|,
/// within the input format), then K := +P_K and K := −P_K with V poisoned
/// (a masked score entering the max or the normaliser). int8: codes poisoned
/// (the extreme code for the zero point), values dequantised exactly.
/// The leaked mass is certified from the V-only run, if it shows the leak:
/// a row's shift Δ_d = Σ_{leaked j} w_j (P_{j,d} − v_{j,d}), so the mass
/// Σ|w_j| ≥ max_d |Δ_d| / (max|P| + max|V|) (up to output rounding).
/// The first leaking key is found by bisecting S on the first changed row.
/// A change counts as a leak only when it reproduces: the same poisoned call
/// gives the same row again and the unpoisoned call the baseline's; otherwise
/// the result is a nondeterministic fault (identical calls differed). A change
/// within 8 units of roundoff of the output format (times the row's largest
/// |value|) counts only if a 2^16 times larger value poison (where the input
/// format holds it) moves the row at least 2^14 times as far: rounding jitter
/// does not grow with the poison (a note says so). A core
/// row that does not move when only its own kv head's masked keys are
/// poisoned reads another head's K/V: a convention fault (head order), not a leak.
/// `runs` (if non-null) is increased by the kernel calls made.
/// The probes poison `c` itself, not a copy (a production-sized case is held
/// once), and put every poisoned value back bit for bit before returning.
/// Preconditions: baseline = kernel.run(c) with status ok.
/// Returns: a mask_leak fault when, on a paged core case, poisoning the pages
/// outside a sequence's block table (other sequences' pages and pages in no
/// table; K to ±P_K, V to P_V, powers of two 2^8 above the largest |K|, |V|)
/// changes any bit of that sequence's output rows (±0 equal); the detail
/// names one such page, found by bisection. Nothing for other cases (and for
/// int8 and 8-bit float inputs, which paged cases do not reach).
/// `runs` (if non-null) is increased by the kernel calls made.
/// Poisons c's pages in place and clears them again before returning.
std::optional<Fault> detect_page_leak(AttachedKernel& kernel, ReceivedCase& c, const KernelRun& baseline,
                                      const RunOptions& run_opt, int* runs);

std::optional<Fault> detect_mask_leak(AttachedKernel& kernel, ReceivedCase& c, const KernelRun& baseline,
                                      const DetectorOptions& opt, int* runs = nullptr,
                                      std::vector<std::string>* notes = nullptr);

/// Returns: a nondeterministic fault when one of `runs − 1` further identical
/// runs differs from `baseline` in any bit of out or lse (NaN payloads and the
/// sign of zero included), or ends with another status. The further runs (up
/// to 4) are made one after another in one process (run_repeated), so state a
/// kernel keeps between calls (a call counter choosing a split) shows too.
std::optional<Fault> detect_nondeterminism(AttachedKernel& kernel, const ReceivedCase& c, const KernelRun& baseline,
                                           int runs, const RunOptions& opt, int* calls = nullptr);

/// Returns: every fault of one case, given the first run `first` and the
/// reference of what the kernel received. When `first` is not ok only its
/// status is judged (a fault class, or the unsupported/bad_output counts).
/// A leak that the opposite causal alignment explains is reported once, as the
/// convention fault (its detail says so). `c` is poisoned in place by the
/// leak probes and is bit for bit as given when this returns.
CaseFaults detect_faults(AttachedKernel& kernel, ReceivedCase& c, const KernelRun& first,
                         const CoreReference& ref, const DetectorOptions& opt = {});
CaseFaults detect_faults(AttachedKernel& kernel, ReceivedCase& c, const KernelRun& first,
                         const BlockReference& ref, const DetectorOptions& opt = {});

}  // namespace headroom
