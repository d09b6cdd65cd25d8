// headroom — the page probe: does a paged kernel read pages outside a sequence's block table? (faults.h)
//
// For each sequence b, every page its table does not name (other sequences'
// pages and pages in no table) is poisoned — K to ±P_K, V to P_V, as the
// mask-leak probe does — and b's output rows compared bit for bit with the
// first run's: b may not see those pages, whatever the others do with them.
// A change is a mask_leak naming the page, found by bisecting the poisoned set.
#include <algorithm>
#include <cmath>
#include <cstring>
#include <set>
#include <string>

#include "headroom/faults.h"
#include "leak_poison.h"

namespace headroom {
namespace {

bool rows_of_b_changed(const KernelRun& base, const KernelRun& run, const CoreShape& s, std::int64_t b) {
  const std::size_t width = static_cast<std::size_t>(s.q_heads * s.q_len * s.value_dim);
  const std::size_t at = static_cast<std::size_t>(b) * width;
  for (std::size_t k = at; k < at + width; ++k) {
    const double x = base.out.values[k], y = run.out.values[k];
    if (!(x == 0 && y == 0) && std::memcmp(&x, &y, sizeof x) != 0) return true;
  }
  return false;
}

}  // namespace

std::optional<Fault> detect_page_leak(AttachedKernel& kernel, ReceivedCase& c, const KernelRun& baseline,
                                      const RunOptions& run_opt, int* runs) {
  if (c.received.level != Level::core || !c.received.core.has_paged_kv() || is_quantised(c.input_format))
    return std::nullopt;
  const CoreProblem& p = c.received.core;
  const CoreShape& s = p.shape;
  const double pk = score_detail::leak_poison(c.received.core_inputs.k, c.input_format);
  const double pv = score_detail::leak_poison(c.received.core_inputs.v, c.input_format);
  // Poisons pages in c itself (no second copy of the case) and clears them
  // again before returning, whether the call returns or throws.
  auto call = [&](const std::vector<std::int32_t>& pages, double k_sign) {
    struct Clear {
      ReceivedCase& c;
      ~Clear() {
        c.poisoned_pages.clear();
        c.page_poison_k = c.page_poison_v = 0.0;
      }
    } clear{c};
    c.poisoned_pages = pages;
    c.page_poison_k = k_sign * pk;
    c.page_poison_v = pv;
    if (runs != nullptr) ++*runs;
    return kernel.run(c, run_opt);
  };
  for (std::int64_t b = 0; b < s.batch; ++b) {
    std::set<std::int32_t> own;
    for (std::int64_t slot = 0; slot < p.paged.max_pages_per_seq; ++slot) own.insert(p.paged.page(b, slot));
    std::vector<std::int32_t> foreign;
    for (std::int32_t pg = 0; pg < p.paged.num_pages; ++pg)
      if (own.count(pg) == 0) foreign.push_back(pg);
    if (foreign.empty()) continue;
    for (double sign : {1.0, -1.0}) {
      const KernelRun run = call(foreign, sign);
      if (run.status != RunStatus::ok || run.out.shape != baseline.out.shape) {
        Fault f;
        f.kind = FaultClass::mask_leak;
        f.count = 1;
        f.detail = "with the pages outside sequence " + std::to_string(b) + "'s block table poisoned the run ended " +
                   std::string(run_status_name(run.status)) + (run.detail.empty() ? "" : ": " + run.detail) +
                   " (run 1: ok)";
        return f;
      }
      if (!rows_of_b_changed(baseline, run, s, b)) continue;
      // Bisect to one page that moves sequence b's rows.
      std::vector<std::int32_t> cand = foreign;
      while (cand.size() > 1) {
        const auto half = static_cast<std::ptrdiff_t>(cand.size() / 2);
        std::vector<std::int32_t> lower(cand.begin(), cand.begin() + half), upper(cand.begin() + half, cand.end());
        const KernelRun r2 = call(lower, sign);
        if (r2.status == RunStatus::ok && r2.out.shape == baseline.out.shape && rows_of_b_changed(baseline, r2, s, b))
          cand = lower;
        else
          cand = upper;
      }
      const std::vector<int> sharers = p.paged.sharers();
      Fault f;
      f.kind = FaultClass::mask_leak;
      f.count = 1;
      f.where = {b};
      f.detail = "page " + std::to_string(cand[0]) + " (" +
                 (sharers[static_cast<std::size_t>(cand[0])] == 0 ? std::string("in no block table")
                                                                  : "not in sequence " + std::to_string(b) + "'s block table") +
                 ") changes sequence " + std::to_string(b) + "'s output when poisoned (K set to " +
                 (sign > 0 ? "+" : "-") + "P_K, V to P_V): the kernel reads a page outside the sequence's table";
      return f;
    }
  }
  return std::nullopt;
}

}  // namespace headroom
