// headroom — reference_backward: the certified gradients, block by block.
//
// Method fast: each (batch, kv head) block on the fast path (backward_fast.h),
// then the elements it could not certify one by one in MPFR intervals
// (backward_mp.h), by the same worker; method multiprecision: every element
// in MPFR intervals. A block is computed the same way whichever worker takes
// it, so the result does not depend on the thread count.
#include <algorithm>
#include <cmath>
#include <memory>
#include <optional>
#include <string>
#include <vector>

#include "backward_fast.h"
#include "backward_mp.h"
#include "headroom/input_error.h"
#include "headroom/reference_backward.h"
#include "input_check.h"
#include "parallel.h"

namespace headroom {
namespace {

void require_d_o(const CoreShape& s, const Tensor& d_o) {
  const std::vector<std::int64_t> want{s.batch, s.q_heads, s.q_len, s.value_dim};
  if (d_o.shape != want)
    throw InputError("reference input", "tensor d_o", "shape does not match [B, Hq, Tq, Dv] of the problem",
                     "give d_o the shape of the forward output");
  for (std::size_t i = 0; i < d_o.values.size(); ++i)
    if (!std::isfinite(d_o.values[i]))
      throw InputError("reference input", "tensor d_o, flat index " + std::to_string(i), "value is not finite",
                       "the reference is defined for finite inputs only; fix or regenerate the case");
}

GradientReference gradient(std::vector<std::int64_t> shape) {
  GradientReference g;
  g.out = Tensor(shape);
  g.bound = Tensor(shape);
  g.magnitude = Tensor(std::move(shape));
  return g;
}

GradientReference& target(BackwardReference& r, detail::GradKind k) {
  switch (k) {
    case detail::GradKind::d_q: return r.d_q;
    case detail::GradKind::d_k: return r.d_k;
    case detail::GradKind::d_v: return r.d_v;
    case detail::GradKind::d_s: break;
  }
  return r.d_s;
}

// Every element of block (b, g) as pending: the multiprecision method.
void all_elements(const CoreShape& s, std::int64_t block, bool with_ds, std::vector<detail::PendingElement>& out) {
  using detail::GradKind;
  const std::int64_t b = block / s.kv_heads, g = block % s.kv_heads, group = s.q_heads / s.kv_heads;
  for (std::int64_t h = g * group; h < (g + 1) * group; ++h)
    for (std::int64_t i = 0; i < s.q_len; ++i) {
      for (std::int64_t d = 0; d < s.key_dim; ++d) out.push_back({GradKind::d_q, b, h, i, d});
      if (with_ds)
        for (std::int64_t j = 0; j < s.kv_len; ++j) out.push_back({GradKind::d_s, b, h, i, j});
    }
  for (std::int64_t j = 0; j < s.kv_len; ++j) {
    for (std::int64_t d = 0; d < s.key_dim; ++d) out.push_back({GradKind::d_k, b, g, j, d});
    for (std::int64_t d = 0; d < s.value_dim; ++d) out.push_back({GradKind::d_v, b, g, j, d});
  }
}

}  // namespace

BackwardReference reference_backward(const CoreProblem& p, const CoreInputs& in, const Tensor& d_o,
                                     const BackwardOptions& opt) {
  return detail::reference_backward_with(p, in, d_o, opt, nullptr, nullptr);
}

BackwardReference detail::reference_backward_with(const CoreProblem& p, const CoreInputs& in, const Tensor& d_o,
                                                  const BackwardOptions& opt, const FastKernels* fk,
                                                  const BackwardKernels* bk) {
  detail::require_valid(p, in);
  if (p.has_softcap() || p.has_sinks())
    throw InputError("reference input", p.has_softcap() ? "field softcap" : "field sinks",
                     "the backward reference does not differentiate soft caps or sink logits yet",
                     "judge the backward on a problem without them");
  const CoreShape& s = p.shape;
  require_d_o(s, d_o);
  BackwardReference ref;
  ref.d_q = gradient({s.batch, s.q_heads, s.q_len, s.key_dim});
  ref.d_k = gradient({s.batch, s.kv_heads, s.kv_len, s.key_dim});
  ref.d_v = gradient({s.batch, s.kv_heads, s.kv_len, s.value_dim});
  if (opt.with_d_scores) ref.d_s = gradient({s.batch, s.q_heads, s.q_len, s.kv_len});
  ref.fully_masked.assign(static_cast<std::size_t>(s.batch * s.q_heads * s.q_len), 0);

  const std::int64_t blocks = s.batch * s.kv_heads;
  const unsigned workers = detail::worker_count(blocks, opt.base.threads);
  const bool fast_method = opt.base.method == ReferenceMethod::fast;
  std::optional<detail::BackwardFast> fast;
  if (fast_method) fast.emplace(p, in, d_o, opt, workers, fk, bk);

  struct Worker {
    std::unique_ptr<detail::MpBackward> mp;
    detail::BackwardFast::Scratch scratch;
    std::vector<detail::PendingElement> pending;
    BackwardStats stats;
  };
  std::vector<Worker> pool(workers);
  std::vector<std::uint8_t> block_ok(static_cast<std::size_t>(blocks), 1);
  detail::parallel_for(blocks, workers, [&](std::int64_t block, unsigned w) {
    Worker& me = pool[w];
    me.pending.clear();
    if (fast) {
      fast->run_block(block, ref, me.scratch, me.pending, me.stats);
    } else {
      all_elements(s, block, opt.with_d_scores, me.pending);
      const std::int64_t b = block / s.kv_heads, g = block % s.kv_heads, group = s.q_heads / s.kv_heads;
      std::vector<std::int64_t> keys;
      std::vector<double> bias;
      for (std::int64_t h = g * group; h < (g + 1) * group; ++h)
        for (std::int64_t i = 0; i < s.q_len; ++i) {
          detail::visible_keys(s, p.mask, b, h, i, keys, bias);
          const std::int64_t row = (b * s.q_heads + h) * s.q_len + i;
          if (keys.empty()) ref.fully_masked[static_cast<std::size_t>(row)] = 1;
          else ++me.stats.rows;
        }
    }
    if (me.pending.empty()) return;
    if (!me.mp) me.mp = std::make_unique<detail::MpBackward>(p, in, d_o, opt.base.target_log2);
    bool ok = true;
    for (const detail::PendingElement& e : me.pending) {
      const detail::MpBackward::Element r = me.mp->element(e.kind, e.b, e.head, e.t, e.d);
      GradientReference& g = target(ref, e.kind);
      const auto at = static_cast<std::size_t>(g.out.offset(e.b, e.head, e.t, e.d));
      g.out.values[at] = r.out;
      g.bound.values[at] = r.bound;
      g.magnitude.values[at] = r.magnitude;
      ok = ok && r.certified;
    }
    if (fast) me.stats.escalated_elements += static_cast<std::int64_t>(me.pending.size());
    block_ok[static_cast<std::size_t>(block)] = ok ? 1 : 0;
  });
  for (std::uint8_t ok : block_ok) ref.certified = ref.certified && ok != 0;
  for (const Worker& w : pool) {
    ref.stats.rows += w.stats.rows;
    ref.stats.escalated_elements += w.stats.escalated_elements;
    ref.stats.dp_dot2_rows += w.stats.dp_dot2_rows;
    ref.stats.dq_cascade_rows += w.stats.dq_cascade_rows;
    ref.stats.charged_rows += w.stats.charged_rows;
    if (w.mp) ref.stats.max_precision = std::max(ref.stats.max_precision, w.mp->max_precision_used());
  }
  return ref;
}

}  // namespace headroom
