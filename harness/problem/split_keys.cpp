// headroom — one split's problem (split_keys.h).
#include "headroom/split_keys.h"

#include <limits>

namespace headroom {
namespace {

Tensor key_slice(const Tensor& t, std::int64_t lo, std::int64_t hi) {
  Tensor out({t.shape[0], t.shape[1], hi - lo, t.shape[3]});
  for (std::int64_t b = 0; b < t.shape[0]; ++b)
    for (std::int64_t g = 0; g < t.shape[1]; ++g)
      for (std::int64_t j = lo; j < hi; ++j)
        for (std::int64_t d = 0; d < t.shape[3]; ++d) out.at(b, g, j - lo, d) = t.at(b, g, j, d);
  return out;
}

}  // namespace

SplitProblem split_keys(const CoreProblem& p, const CoreInputs& in, std::int64_t lo, std::int64_t hi) {
  const CoreShape& s = p.shape;
  SplitProblem out;
  CoreProblem& sp = out.problem;
  sp.shape = s;
  sp.shape.kv_len = hi - lo;
  sp.scale = p.scale;
  sp.softcap = p.softcap;
  const Mask& m = p.mask;
  const bool per_head = (m.kind == MaskKind::dense && m.allowed.shape[1] != 1) ||
                        (m.kind == MaskKind::bias && m.bias.shape[1] != 1);
  const std::int64_t hm = per_head ? s.q_heads : 1;
  const bool bias = m.kind == MaskKind::bias;
  sp.mask.kind = bias ? MaskKind::bias : MaskKind::dense;
  Tensor t({s.batch, hm, s.q_len, hi - lo});
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < hm; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i)
        for (std::int64_t j = lo; j < hi; ++j) {
          const bool on = m.visible(s, b, h, i, j);
          t.at(b, h, i, j - lo) = bias ? (on ? m.bias_at(b, h, i, j) : -std::numeric_limits<double>::infinity())
                                       : (on ? 1.0 : 0.0);
        }
  (bias ? sp.mask.bias : sp.mask.allowed) = std::move(t);
  out.inputs.q = in.q;
  out.inputs.k = key_slice(in.k, lo, hi);
  out.inputs.v = key_slice(in.v, lo, hi);
  return out;
}

}  // namespace headroom
