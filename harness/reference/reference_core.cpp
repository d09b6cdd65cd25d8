// headroom — reference_core: every query row of a core problem, certified.
#include <cstdint>
#include <memory>
#include <vector>

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

  std::vector<std::uint8_t> row_ok(static_cast<std::size_t>(rows), 1);
  const unsigned workers = detail::worker_count(rows, opt.threads);
  std::vector<std::unique_ptr<detail::MpCoreRows>> scratch(workers);
  detail::parallel_for(rows, workers, [&](std::int64_t row, unsigned w) {
    if (!scratch[w]) scratch[w] = std::make_unique<detail::MpCoreRows>(p, in, opt);
    row_ok[static_cast<std::size_t>(row)] = scratch[w]->run(row, ref, nullptr, true) ? 1 : 0;
  });
  for (std::uint8_t ok : row_ok) ref.certified = ref.certified && ok != 0;
  return ref;
}

}  // namespace headroom
