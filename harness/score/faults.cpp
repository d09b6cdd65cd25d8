// headroom — fault classes, the run-status, non-finite, masked-row and determinism detectors (faults.h).
#include "headroom/faults.h"

#include <algorithm>
#include <cmath>
#include <cstring>
#include <string>
#include <tuple>

#include "headroom/scores.h"

namespace headroom {
namespace {

std::string index_text(const std::vector<std::int64_t>& idx) {
  std::string t = "[";
  for (std::size_t i = 0; i < idx.size(); ++i) t += (i ? "," : "") + std::to_string(idx[i]);
  return t + "]";
}

std::vector<std::int64_t> unflatten(std::int64_t flat, const std::vector<std::int64_t>& shape) {
  std::vector<std::int64_t> idx(shape.size());
  for (std::size_t k = shape.size(); k-- > 0;) {
    idx[k] = shape[k] == 0 ? 0 : flat % shape[k];
    flat = shape[k] == 0 ? 0 : flat / shape[k];
  }
  return idx;
}

bool same_bits(double a, double b) { return std::memcmp(&a, &b, sizeof a) == 0; }

// Rows of a block output Y[b, i, :] that depend on a fully masked query row.
std::vector<std::uint8_t> block_excluded_rows(const BlockReference& ref) {
  const std::int64_t batch = ref.out.shape.at(0), q_len = ref.out.shape.at(1);
  std::vector<std::uint8_t> ex(static_cast<std::size_t>(batch * q_len), 0);
  if (batch * q_len == 0) return ex;
  const std::int64_t heads = static_cast<std::int64_t>(ref.fully_masked.size()) / (batch * q_len);
  for (std::int64_t b = 0; b < batch; ++b)
    for (std::int64_t h = 0; h < heads; ++h)
      for (std::int64_t i = 0; i < q_len; ++i)
        if (ref.fully_masked[static_cast<std::size_t>((b * heads + h) * q_len + i)]) ex[static_cast<std::size_t>(b * q_len + i)] = 1;
  return ex;
}

// `unsampled` rows (a long case's rows the reference left out) have a visible
// key, so their exact output, a convex combination of finite values, is finite.
std::optional<Fault> non_finite_in(const KernelRun& run, const Tensor& ref_out, const std::vector<std::uint8_t>& excluded,
                                   const Tensor* ref_lse, const std::vector<std::uint8_t>* unsampled = nullptr) {
  auto left_out = [&](std::size_t row) { return unsampled != nullptr && row < unsampled->size() && (*unsampled)[row]; };
  Fault f;
  f.kind = FaultClass::non_finite;
  const std::int64_t width = ref_out.shape.empty() ? 1 : ref_out.shape.back();
  const std::size_t n = std::min(run.out.values.size(), ref_out.values.size());
  for (std::size_t k = 0; k < n; ++k) {
    const std::size_t row = width == 0 ? 0 : k / static_cast<std::size_t>(width);
    if ((row < excluded.size() && excluded[row]) || (!left_out(row) && !std::isfinite(ref_out.values[k]))) continue;
    if (std::isfinite(run.out.values[k])) continue;
    if (f.count++ == 0) {
      f.where = unflatten(static_cast<std::int64_t>(k), ref_out.shape);
      f.detail = "output " + index_text(f.where) + " is " + hex_float(run.out.values[k]) + " where the reference is " +
                 (left_out(row) ? std::string("finite (a row with a visible key; not sampled for scoring)")
                                : hex_float(ref_out.values[k]));
    }
  }
  std::int64_t lse_count = 0;
  if (ref_lse != nullptr && !run.lse.values.empty()) {
    for (std::size_t k = 0; k < std::min(run.lse.values.size(), ref_lse->values.size()); ++k) {
      if ((k < excluded.size() && excluded[k]) || (!left_out(k) && !std::isfinite(ref_lse->values[k]))) continue;
      if (std::isfinite(run.lse.values[k])) continue;
      if (lse_count++ == 0 && f.count == 0) {
        f.where = unflatten(static_cast<std::int64_t>(k), ref_lse->shape);
        f.detail = "log-sum-exp " + index_text(f.where) + " is " + hex_float(run.lse.values[k]) +
                   " where the reference is " +
                   (left_out(k) ? std::string("finite (not sampled for scoring)") : hex_float(ref_lse->values[k]));
      }
    }
  }
  if (f.count + lse_count == 0) return std::nullopt;
  if (run.unwritten > 0 && run.first_unwritten >= 0) {
    // Not a NaN the kernel computed: the fill headroom put there before the call.
    const auto at = unflatten(run.first_unwritten, ref_out.shape);
    f.detail = std::to_string(run.unwritten) + " output element(s) never written by the kernel (they still hold "
               "headroom's NaN fill), first at " + index_text(at) +
               (run.unwritten < f.count ? "; " + f.detail : std::string());
  }
  f.detail += " (" + std::to_string(f.count) + " output elements";
  if (lse_count > 0) f.detail += ", " + std::to_string(lse_count) + " log-sum-exp values";
  f.detail += " non-finite)";
  f.count += lse_count;
  return f;
}

void merge_into(CaseFaults& cf, Fault f) {
  for (Fault& have : cf.faults) {
    if (have.kind == f.kind) {
      have.detail += "; " + f.detail;
      have.count += f.count;
      if (have.where.empty()) have.where = f.where;
      return;
    }
  }
  cf.faults.push_back(std::move(f));
}

// The status of the first run decides whether there is anything to inspect.
bool judge_status(CaseFaults& cf, const KernelRun& first) {
  if (first.status == RunStatus::ok) return true;
  if (first.status == RunStatus::unsupported) {
    ++cf.unsupported_runs;
  } else if (first.status == RunStatus::bad_output) {
    if (cf.bad_output_runs++ == 0) cf.bad_output_detail = first.detail;
  } else if (auto cls = fault_of(first.status)) {
    Fault f;
    f.kind = *cls;
    f.detail = std::string(run_status_name(first.status)) + (first.detail.empty() ? "" : ": " + first.detail);
    f.count = 1;
    merge_into(cf, std::move(f));
  }
  return false;
}

template <class Ref>
void rerun_detectors(CaseFaults& cf, AttachedKernel& kernel, ReceivedCase& c, const KernelRun& first,
                     const Ref& ref, const DetectorOptions& opt) {
  const KernelDeclaration& d = kernel.declaration();
  std::optional<Fault> alignment;
  if (opt.alignment) {
    alignment = detect_causal_alignment(first, c, ref, d.output_format, opt.reference);
  }
  // Determinism first: the leak probe compares re-runs bit for bit against the
  // first run, which only means something for a deterministic kernel.
  std::optional<Fault> nd = detect_nondeterminism(kernel, c, first, opt.determinism_runs, opt.run, &cf.runs);
  if (nd && opt.mask_leak) {
    cf.notes.push_back("mask_leak not probed: the kernel is nondeterministic");
  } else if (opt.mask_leak) {
    std::optional<Fault> leak = detect_mask_leak(kernel, c, first, opt, &cf.runs, &cf.notes);
    if (!leak) leak = detect_page_leak(kernel, c, first, opt.run, &cf.runs);
    if (leak) {
      if (leak->kind != FaultClass::mask_leak) {
        merge_into(cf, std::move(*leak));  // nondeterminism or a wrong-head read the probe told apart
      } else if (alignment) {
        alignment->detail += "; it reads keys the declared alignment masks (" + leak->detail + ")";
      } else {
        merge_into(cf, std::move(*leak));
      }
    }
  }
  if (alignment) merge_into(cf, std::move(*alignment));
  if (nd) merge_into(cf, std::move(*nd));
}

}  // namespace

std::string_view fault_class_name(FaultClass c) {
  switch (c) {
    case FaultClass::non_finite: return "non_finite";
    case FaultClass::mask_leak: return "mask_leak";
    case FaultClass::oob_read: return "oob_read";
    case FaultClass::oob_write: return "oob_write";
    case FaultClass::convention: return "convention";
    case FaultClass::nondeterministic: return "nondeterministic";
    case FaultClass::crash: return "crash";
    case FaultClass::timeout: return "timeout";
    case FaultClass::stray_process: return "stray_process";
    case FaultClass::non_finite_gradient: return "non_finite_gradient";
    case FaultClass::masked_key_gradient: return "masked_key_gradient";
    case FaultClass::wrong_group_sum: return "wrong_group_sum";
    case FaultClass::split_partial: return "split_partial";
    case FaultClass::split_merge: return "split_merge";
  }
  return "unknown";
}

std::optional<FaultClass> parse_fault_class(std::string_view name) {
  for (FaultClass c : kAllFaultClasses) {
    if (fault_class_name(c) == name) return c;
  }
  return std::nullopt;
}

std::optional<FaultClass> fault_of(RunStatus s) {
  switch (s) {
    case RunStatus::crash: return FaultClass::crash;
    case RunStatus::oob_read: return FaultClass::oob_read;
    case RunStatus::oob_write: return FaultClass::oob_write;
    case RunStatus::timeout: return FaultClass::timeout;
    case RunStatus::stray_process: return FaultClass::stray_process;
    case RunStatus::ok:
    case RunStatus::unsupported:
    case RunStatus::bad_output: return std::nullopt;
  }
  return std::nullopt;
}

const Fault* CaseFaults::find(FaultClass c) const {
  for (const Fault& f : faults) {
    if (f.kind == c) return &f;
  }
  return nullptr;
}

std::optional<Fault> detect_non_finite(const KernelRun& run, const CoreReference& ref) {
  return non_finite_in(run, ref.out, ref.fully_masked, &ref.lse, &ref.unsampled);
}

std::optional<Fault> detect_non_finite(const KernelRun& run, const BlockReference& ref) {
  return non_finite_in(run, ref.out, block_excluded_rows(ref), nullptr);
}

std::optional<Fault> detect_masked_rows(const KernelRun& run, const CoreReference& ref, MaskedRowConvention declared) {
  if (declared == MaskedRowConvention::never_called || ref.out.shape.size() != 4) return std::nullopt;
  const bool zeros = declared == MaskedRowConvention::zeros;
  const std::int64_t width = ref.out.shape[3];
  const bool has_lse = !run.lse.values.empty();
  Fault f;
  f.kind = FaultClass::convention;
  for (std::size_t row = 0; row < ref.fully_masked.size(); ++row) {
    if (!ref.fully_masked[row]) continue;
    std::string found;
    std::int64_t at = -1;
    for (std::int64_t d = 0; d < width && found.empty(); ++d) {
      const std::size_t k = row * static_cast<std::size_t>(width) + static_cast<std::size_t>(d);
      if (k >= run.out.values.size()) break;
      const double o = run.out.values[k];
      if (zeros ? o != 0.0 : !std::isnan(o)) {
        found = hex_float(o);
        at = d;
      }
    }
    if (found.empty() && has_lse && row < run.lse.values.size()) {
      // kernel_abi.h: zeros rows have log-sum-exp −inf; NaN rows NaN or −inf.
      const double l = run.lse.values[row];
      const bool fine = zeros ? (std::isinf(l) && l < 0) : (std::isnan(l) || (std::isinf(l) && l < 0));
      if (!fine) found = "log-sum-exp " + hex_float(l);
    }
    if (found.empty()) continue;
    if (f.count++ == 0) {
      f.where = unflatten(static_cast<std::int64_t>(row) * width + (at < 0 ? 0 : at), ref.out.shape);
      f.detail = std::string("fully masked row declared ") + (zeros ? "zeros" : "NaN") + " but " +
                 (at < 0 ? found : "element " + index_text(f.where) + " is " + found);
    }
  }
  if (f.count == 0) return std::nullopt;
  f.detail += " (" + std::to_string(f.count) + " rows)";
  return f;
}

std::optional<Fault> detect_nondeterminism(AttachedKernel& kernel, const ReceivedCase& c, const KernelRun& baseline,
                                           int runs, const RunOptions& opt, int* calls) {
  // The runs after the first are made one after another in one process (one
  // isolated child), so state a kernel keeps between calls shows as well.
  std::vector<KernelRun> repeated;
  if (runs >= 2) repeated = kernel.run_repeated(c, opt, std::min(runs - 1, 4));
  const int in_one = static_cast<int>(repeated.size());
  for (int r = 2; r <= runs; ++r) {
    if (r - 2 >= static_cast<int>(repeated.size())) {
      if (in_one < std::min(runs - 1, 4)) break;  // a call ended that process: its status was compared last
      repeated.push_back(kernel.run(c, opt));
    }
    const KernelRun& again = repeated[static_cast<std::size_t>(r - 2)];
    if (calls != nullptr) ++*calls;
    const std::string same_process =
        r >= 3 && r - 2 < in_one ? " (made in the same process right after run " + std::to_string(r - 1) + ")" : "";
    Fault f;
    f.kind = FaultClass::nondeterministic;
    if (again.status != baseline.status) {
      f.count = 1;
      f.detail = "run " + std::to_string(r) + same_process + " ended " + run_status_name(again.status) + ", run 1 " +
                 run_status_name(baseline.status) + (again.detail.empty() ? "" : ": " + again.detail);
      return f;
    }
    for (const auto& [mine, theirs, what] :
         {std::tuple{&again.out, &baseline.out, "output"}, std::tuple{&again.lse, &baseline.lse, "log-sum-exp"}}) {
      if (mine->shape != theirs->shape || mine->values.size() != theirs->values.size()) {
        f.count += 1;
        if (f.detail.empty()) f.detail = std::string("run ") + std::to_string(r) + " returned a differently shaped " + what;
        continue;
      }
      for (std::size_t k = 0; k < mine->values.size(); ++k) {
        if (same_bits(mine->values[k], theirs->values[k])) continue;
        if (f.count++ == 0) {
          f.where = unflatten(static_cast<std::int64_t>(k), theirs->shape);
          f.detail = std::string(what) + " " + index_text(f.where) + " is " + hex_float(theirs->values[k]) +
                     " in run 1 and " + hex_float(mine->values[k]) + " in run " + std::to_string(r) + same_process;
        }
      }
    }
    if (f.count > 0) {
      f.detail += " (" + std::to_string(f.count) + " values differ)";
      return f;
    }
  }
  return std::nullopt;
}

CaseFaults detect_faults(AttachedKernel& kernel, ReceivedCase& c, const KernelRun& first,
                         const CoreReference& ref, const DetectorOptions& opt) {
  CaseFaults cf;
  if (!judge_status(cf, first)) return cf;
  if (auto f = detect_non_finite(first, ref)) merge_into(cf, std::move(*f));
  if (auto f = detect_masked_rows(first, ref, kernel.declaration().masked_row)) merge_into(cf, std::move(*f));
  rerun_detectors(cf, kernel, c, first, ref, opt);
  return cf;
}

CaseFaults detect_faults(AttachedKernel& kernel, ReceivedCase& c, const KernelRun& first,
                         const BlockReference& ref, const DetectorOptions& opt) {
  CaseFaults cf;
  if (!judge_status(cf, first)) return cf;
  if (auto f = detect_non_finite(first, ref)) merge_into(cf, std::move(*f));
  // A block output row mixes every head through W_o, so the masked-row
  // convention of one head cannot be read off Y; such rows are only excluded.
  rerun_detectors(cf, kernel, c, first, ref, opt);
  return cf;
}

}  // namespace headroom
