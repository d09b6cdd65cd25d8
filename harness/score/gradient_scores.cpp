// headroom — scores and faults of a backward kernel's gradients (gradient_scores.h).
#include "headroom/gradient_scores.h"

#include <algorithm>
#include <cmath>
#include <optional>
#include <tuple>
#include <vector>

#include "headroom/format.h"

namespace headroom {

double GradientScores::max_scaled_error() const {
  return std::max({d_q.max_scaled_error, d_k.max_scaled_error, d_v.max_scaled_error,
                   bias_judged ? d_bias.max_scaled_error : 0.0});
}

namespace {
// The certified d(bias) of the run's shape, when both sides have one.
std::optional<GradientReference> bias_reference(const BackwardRun& run, const BackwardReference& ref) {
  if (run.d_bias.values.empty() || ref.d_s.out.values.empty() || run.d_bias.shape.size() != 4) return std::nullopt;
  return bias_gradient(ref, run.d_bias.shape[1]);
}
}  // namespace

GradientScores score_gradients(const BackwardRun& run, const BackwardReference& ref, Format f) {
  GradientScores s;
  s.d_q = score_gradient(run.d_q, ref.d_q, ref.certified, f);
  s.d_k = score_gradient(run.d_k, ref.d_k, ref.certified, f);
  s.d_v = score_gradient(run.d_v, ref.d_v, ref.certified, f);
  s.non_finite = s.d_q.non_finite + s.d_k.non_finite + s.d_v.non_finite;
  if (const auto bias = bias_reference(run, ref)) {
    s.d_bias = score_gradient(run.d_bias, *bias, ref.certified, f);
    s.bias_judged = true;
    s.non_finite += s.d_bias.non_finite;
  }
  // A key no query sees: no term at all, so reference 0 with bound 0 and
  // magnitude 0 (reference_backward.h). Its gradient must be exactly 0.
  for (auto [got, want] : {std::pair{&run.d_k, &ref.d_k}, std::pair{&run.d_v, &ref.d_v}}) {
    const std::vector<std::int64_t>& e = want->out.shape;
    for (std::size_t i = 0; i < want->out.values.size(); ++i) {
      if (want->magnitude.values[i] != 0 || want->bound.values[i] != 0 || want->out.values[i] != 0) continue;
      if (got->values[i] == 0) continue;
      if (s.masked_key_leaks++ == 0) {
        const auto flat = static_cast<std::int64_t>(i);
        s.first_masked_key_leak = {flat / (e[1] * e[2] * e[3]), flat / (e[2] * e[3]) % e[1], flat / e[3] % e[2],
                                   flat % e[3]};
      }
    }
  }
  return s;
}

bool same_gradients(const BackwardRun& a, const BackwardRun& b) {
  return bit_identical(a.d_q, b.d_q) && bit_identical(a.d_k, b.d_k) && bit_identical(a.d_v, b.d_v) &&
         bit_identical(a.d_bias, b.d_bias);
}

double gradient_spread(const BackwardRun& a, const BackwardRun& b, const BackwardReference& ref, Format f) {
  double worst = 0;
  const double u = unit_roundoff(f);
  std::vector<std::tuple<const Tensor*, const Tensor*, const GradientReference*>> tensors{
      {&a.d_q, &b.d_q, &ref.d_q}, {&a.d_k, &b.d_k, &ref.d_k}, {&a.d_v, &b.d_v, &ref.d_v}};
  const std::optional<GradientReference> bias = bias_reference(a, ref);
  if (bias && b.d_bias.shape == a.d_bias.shape) tensors.emplace_back(&a.d_bias, &b.d_bias, &*bias);
  for (auto [x, y, r] : tensors) {
    for (std::size_t i = 0; i < x->values.size(); ++i) {
      const double d = std::fabs(x->values[i] - y->values[i]);
      if (d == 0) continue;
      const double unit = u * r->magnitude.values[i];
      worst = std::max(worst, unit > 0 ? d / unit : INFINITY);
    }
  }
  return worst;
}

bool wrong_group_sum(const BackwardRun& run, const Case& received, const GradientScores& s, double threshold,
                     Format f) {
  const CoreShape& sh = received.core.shape;
  const std::int64_t group = sh.q_heads / sh.kv_heads;
  if (group == 1) return false;
  const double against_sum = std::max(s.d_k.max_scaled_error, s.d_v.max_scaled_error);
  if (!(against_sum > threshold)) return false;
  // The per-head problem: head h reads its own copy of K and V of head h / group.
  CoreProblem p = received.core;
  p.shape.kv_heads = sh.q_heads;
  CoreInputs in{received.core_inputs.q, Tensor({sh.batch, sh.q_heads, sh.kv_len, sh.key_dim}),
                Tensor({sh.batch, sh.q_heads, sh.kv_len, sh.value_dim})};
  for (std::int64_t b = 0; b < sh.batch; ++b)
    for (std::int64_t h = 0; h < sh.q_heads; ++h)
      for (std::int64_t j = 0; j < sh.kv_len; ++j) {
        for (std::int64_t d = 0; d < sh.key_dim; ++d) in.k.at(b, h, j, d) = received.core_inputs.k.at(b, h / group, j, d);
        for (std::int64_t d = 0; d < sh.value_dim; ++d)
          in.v.at(b, h, j, d) = received.core_inputs.v.at(b, h / group, j, d);
      }
  const BackwardReference per_head = reference_backward(p, in, received.d_o);
  // Share t of every group as a [B, Hkv, Tk, D] reference.
  auto share = [&](const GradientReference& full, std::int64_t t) {
    const std::vector<std::int64_t>& e = full.out.shape;
    GradientReference g{Tensor({e[0], sh.kv_heads, e[2], e[3]}), Tensor({e[0], sh.kv_heads, e[2], e[3]}),
                        Tensor({e[0], sh.kv_heads, e[2], e[3]})};
    for (std::int64_t b = 0; b < e[0]; ++b)
      for (std::int64_t kv = 0; kv < sh.kv_heads; ++kv)
        for (std::int64_t j = 0; j < e[2]; ++j)
          for (std::int64_t d = 0; d < e[3]; ++d) {
            g.out.at(b, kv, j, d) = full.out.at(b, kv * group + t, j, d);
            g.bound.at(b, kv, j, d) = full.bound.at(b, kv * group + t, j, d);
            g.magnitude.at(b, kv, j, d) = full.magnitude.at(b, kv * group + t, j, d);
          }
    return g;
  };
  double best = INFINITY;
  for (std::int64_t t = 0; t < group; ++t) {
    const double e = std::max(score_gradient(run.d_k, share(per_head.d_k, t), per_head.certified, f).max_scaled_error,
                              score_gradient(run.d_v, share(per_head.d_v, t), per_head.certified, f).max_scaled_error);
    best = std::min(best, e);
  }
  return best * 16 < against_sum;
}

}  // namespace headroom
