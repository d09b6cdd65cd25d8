// headroom — reference_core: every query row of a core problem, certified.
//
// Method fast: each row on the double-double fast path (fast_core.h), the
// elements that miss the target recomputed in multiprecision; method
// multiprecision, and every problem with a soft cap or sink logits: each row
// in multiprecision (mp_core.h). Rows are
// independent and each is computed the same way whichever worker takes it,
// so the result does not depend on the thread count.
#include <algorithm>
#include <cstdint>
#include <memory>
#include <optional>
#include <stdexcept>
#include <string>
#include <vector>

#include "fast_core.h"
#include "headroom/reference.h"
#include "input_check.h"
#include "mp_core.h"
#include "parallel.h"

namespace headroom {

CoreReference reference_core(const CoreProblem& p, const CoreInputs& in, const ReferenceOptions& opt) {
  detail::require_valid(p, in);
  const CoreShape& s = p.shape;
  CoreReference ref;
  ref.out = Tensor({s.batch, s.q_heads, s.q_len, s.value_dim});
  ref.bound = Tensor(ref.out.shape);
  ref.magnitude = Tensor(ref.out.shape);
  ref.lse = Tensor({s.batch, s.q_heads, s.q_len});
  ref.lse_bound = Tensor(ref.lse.shape);
  const std::int64_t rows = s.batch * s.q_heads * s.q_len;
  ref.fully_masked.assign(static_cast<std::size_t>(rows), 0);
  ref.unsampled.assign(static_cast<std::size_t>(rows), 0);
  if (!opt.rows.empty() && static_cast<std::int64_t>(opt.rows.size()) != rows)
    throw std::invalid_argument("reference_core: ReferenceOptions::rows has " + std::to_string(opt.rows.size()) +
                                " entries for " + std::to_string(rows) + " query rows");

  const unsigned workers = detail::worker_count(rows, opt.threads);
  std::optional<detail::FastCore> fast;
  // The fast path knows neither soft caps nor sinks: such problems take the
  // multiprecision path row by row (same certificate, slower).
  if (opt.method == ReferenceMethod::fast && !p.has_softcap() && !p.has_sinks()) fast.emplace(p, in, opt, workers);
  // Work items: groups of query rows on the fast path, single rows otherwise.
  const std::int64_t items = fast ? fast->groups() : rows;

  struct Worker {
    std::unique_ptr<detail::MpCoreRows> mp;
    detail::FastCore::Scratch scratch;
    ReferenceStats stats;
  };
  std::vector<Worker> pool(workers);
  std::vector<std::uint8_t> item_ok(static_cast<std::size_t>(items), 1);
  detail::parallel_for(items, workers, [&](std::int64_t item, unsigned w) {
    Worker& me = pool[w];
    if (!me.mp) me.mp = std::make_unique<detail::MpCoreRows>(p, in, opt);
    bool ok;
    if (fast) {
      ok = fast->run_group(item, ref, me.scratch, *me.mp, me.stats);
    } else {
      ok = me.mp->run(item, ref, nullptr, true);
      if (ref.fully_masked[static_cast<std::size_t>(item)] == 0) ++me.stats.rows;
    }
    item_ok[static_cast<std::size_t>(item)] = ok ? 1 : 0;
  });
  for (std::uint8_t ok : item_ok) ref.certified = ref.certified && ok != 0;
  for (const Worker& w : pool) {
    ref.stats.rows += w.stats.rows;
    ref.stats.escalated_rows += w.stats.escalated_rows;
    ref.stats.escalated_elements += w.stats.escalated_elements;
    ref.stats.escalated_lse += w.stats.escalated_lse;
    if (w.mp) ref.stats.max_precision = std::max(ref.stats.max_precision, w.mp->max_precision_used());
  }
  return ref;
}

}  // namespace headroom
