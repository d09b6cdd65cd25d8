// headroom — judging a kernel's backward on one case (judge_backward.h).
#include "headroom/judge_backward.h"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <limits>
#include <string>

#include "headroom/bundled_registry.h"
#include "headroom/format.h"
#include "headroom/gradient_scores.h"
#include "headroom/kernel_abi.h"
#include "headroom/reference_backward.h"
#include "headroom/upstream_gradient.h"

namespace headroom {
namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

std::string join(const std::vector<std::int64_t>& v) {
  std::string s;
  for (std::size_t i = 0; i < v.size(); ++i) s += (i ? "," : "") + std::to_string(v[i]);
  return s;
}

std::string number(double v) {
  char buf[40];
  std::snprintf(buf, sizeof buf, "%.4g", v);
  return buf;
}

// Gradient elements whose exact value rounds past the output format's largest
// finite value: no finite answer exists in the format (binary16 dV of a
// 2^12-scaled dO, say). They are set NaN in `g` (NaN references are not
// scored, case_score.cpp) and counted.
std::int64_t exclude_beyond_range(GradientReference& g, Format f) {
  std::int64_t n = 0;
  for (double& y : g.out.values) {
    if (std::isfinite(y) && !std::isfinite(round_to_format(y, f))) {
      y = kNaN;
      ++n;
    }
  }
  return n;
}

// The underflow of the backward's products in its working format (float32,
// float64 for a float64 kernel: the formats the default budgets' score_bits
// assume). With gradual underflow a product (or exp) errs by u·|r| + η, η half
// the smallest subnormal, while sums of subnormals are exact (Higham 2002,
// Accuracy and Stability of Numerical Algorithms, §2.1, the model with
// underflow, from memory). A weight P_ij = exp(z_ij − lse_i) below 2^-126
// holds only a few bits in float32, or is flushed, so a key of negligible
// weight gets dK, dV, d(bias) with a relative error up to 1 however well the
// rest is done (large_logits rows of standard: 1.2e6 scaled units on dK, with
// every weight rounded as float32 has to). Each element's unit u_F·M gets η
// times the coefficients the weight's and each later product's η reach it
// through, term by term (A_ij = Σ_d |dO_id||V_jd|, A_i = Σ_j P_ij A_ij):
//   dV_jd  += η (|dO_id| + 1)                       (P, then P·dO)
//   dS_ij  += η (A_ij + A_i + 1)                     (P, then P·(dP − D))
//   dQ_id  += η ((A_ij + A_i + 1)(|s| + 1)|K_jd| + 1) (then s·dS and ·K)
//   dK_jd  += η ((A_ij + A_i + 1)(|s| + 1)|Q_id| + 1) (then s·dS and ·Q)
// summed over the visible terms, in double (a budget coordinate, not a
// certified bound): the magnitudes in `ref` become M + that/u_F.
void add_underflow_floor(BackwardReference& ref, const Case& received, const CoreReference& fwd, Format f) {
  const double eta = f == Format::float64 ? 0x1p-1074 : 0x1p-150;  // float64: its smallest subnormal (half is not a double)
  const double inv_u = 1.0 / unit_roundoff(f);
  const CoreProblem& p = received.core;
  const CoreShape& s = p.shape;
  const CoreInputs& in = received.core_inputs;
  const Tensor& d_o = received.d_o;
  const double scale = std::fabs(static_cast<double>(p.scale)), sc1 = scale + 1;
  const bool with_ds = !ref.d_s.out.values.empty();
  std::vector<double> z(static_cast<std::size_t>(s.kv_len)), a(static_cast<std::size_t>(s.kv_len));
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < s.q_heads; ++h) {
      const std::int64_t g = kv_head_of(s, h);
      for (std::int64_t i = 0; i < s.q_len; ++i) {
        const double lse = fwd.lse.at(b, h, i);
        if (!std::isfinite(lse)) continue;  // fully masked (or unsampled): no gradient flows
        double a_i = 0;
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          const auto u = static_cast<std::size_t>(j);
          a[u] = -1;
          if (!p.mask.visible(s, b, h, i, j)) continue;
          double dot = 0, aj = 0;
          for (std::int64_t d = 0; d < s.key_dim; ++d) dot += in.q.at(b, h, i, d) * in.k.at(b, g, j, d);
          for (std::int64_t d = 0; d < s.value_dim; ++d) aj += std::fabs(d_o.at(b, h, i, d) * in.v.at(b, g, j, d));
          z[u] = static_cast<double>(p.scale) * dot + p.mask.bias_at(b, h, i, j);
          a[u] = aj;
          a_i += std::exp(z[u] - lse) * aj;
        }
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          const auto u = static_cast<std::size_t>(j);
          if (a[u] < 0) continue;
          const double c = a[u] + a_i + 1;
          for (std::int64_t d = 0; d < s.value_dim; ++d)
            ref.d_v.magnitude.at(b, g, j, d) += eta * (std::fabs(d_o.at(b, h, i, d)) + 1) * inv_u;
          for (std::int64_t d = 0; d < s.key_dim; ++d) {
            ref.d_q.magnitude.at(b, h, i, d) += eta * (c * sc1 * std::fabs(in.k.at(b, g, j, d)) + 1) * inv_u;
            ref.d_k.magnitude.at(b, g, j, d) += eta * (c * sc1 * std::fabs(in.q.at(b, h, i, d)) + 1) * inv_u;
          }
          if (with_ds) ref.d_s.magnitude.at(b, h, i, j) += eta * c * inv_u;
        }
      }
    }
}

// The exact forward as the ABI passes it: O in the output format (0 on fully
// masked rows), lse in float32 (−inf there).
void exact_forward(const CoreReference& ref, Format f, Tensor& o, Tensor& lse) {
  o = ref.out;
  lse = ref.lse;
  for (double& x : o.values) x = std::isnan(x) ? 0.0 : round_to_format(x, f);
  for (double& x : lse.values) x = std::isnan(x) ? -INFINITY : static_cast<double>(static_cast<float>(x));
}

GradientFigures figures_of(const CaseScore& s) {
  GradientFigures g;
  g.max_ulp = static_cast<double>(s.max_ulp);
  g.max_scaled_error = s.max_scaled_error;
  g.rmse = s.rmse;
  g.relative_rmse = s.relative_rmse;
  g.cosine = s.cosine;
  return g;
}

const CaseScore& tensor(const GradientScores& s, std::size_t t) {
  return t == 0 ? s.d_q : t == 1 ? s.d_k : t == 2 ? s.d_v : s.d_bias;
}
std::size_t tensors(const GradientScores& s) { return s.bias_judged ? 4 : 3; }

void add_fault(CaseFaults& f, FaultClass c, std::string detail, std::int64_t count, std::vector<std::int64_t> where) {
  if (f.find(c) != nullptr) return;  // at most one per class; the forward's came first
  f.faults.push_back({c, std::move(detail), std::move(where), count, -1});
}

// A backward call that did not return ok: its status as the forward's fault classes.
bool call_failed(const BackwardRun& run, const char* way, Judgement& j) {
  if (run.status == RunStatus::ok) return false;
  if (auto f = fault_of(run.status)) {
    add_fault(j.faults, *f, std::string("backward (") + way + "): " + run.detail, 1, {});
  } else if (run.status == RunStatus::unsupported) {
    j.faults.notes.push_back(std::string("the backward declined the case (") + way + "): gradients not judged");
  } else {
    j.faults.bad_output_runs += 1;
    if (j.faults.bad_output_detail.empty()) j.faults.bad_output_detail = std::string("backward: ") + run.detail;
  }
  return true;
}

void non_finite_faults(const GradientScores& s, const char* way, CaseFaults& f) {
  if (s.non_finite == 0) return;
  for (std::size_t t = 0; t < tensors(s); ++t) {
    const CaseScore& c = tensor(s, t);
    if (c.non_finite == 0) continue;
    add_fault(f, FaultClass::non_finite_gradient,
              std::to_string(s.non_finite) + " non-finite gradient elements (" + way + "), first in " +
                  kGradientNames[t] + " at [" + join(c.first_non_finite) + "]",
              s.non_finite, c.first_non_finite);
    return;
  }
}

// dK, dV of a key that no query of its group sees (by the mask) must be exactly 0.
void masked_key_faults(const BackwardRun& run, const Case& received, CaseFaults& f) {
  const CoreShape& s = received.core.shape;
  const std::int64_t group = s.q_heads / s.kv_heads;
  std::int64_t count = 0;
  std::vector<std::int64_t> first;
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t g = 0; g < s.kv_heads; ++g)
      for (std::int64_t j = 0; j < s.kv_len; ++j) {
        bool seen = false;
        for (std::int64_t h = g * group; h < (g + 1) * group && !seen; ++h)
          for (std::int64_t i = 0; i < s.q_len && !seen; ++i) seen = received.core.mask.visible(s, b, h, i, j);
        if (seen) continue;
        for (auto [t, dim] : {std::pair{&run.d_k, s.key_dim}, std::pair{&run.d_v, s.value_dim}})
          for (std::int64_t d = 0; d < dim; ++d) {
            if (t->at(b, g, j, d) == 0) continue;
            if (count++ == 0) first = {b, g, j, d};
          }
      }
  if (count == 0) return;
  add_fault(f, FaultClass::masked_key_gradient,
            std::to_string(count) + " dK/dV elements of keys no query sees are not 0 (the exact gradient is 0), "
                                    "first at [b,g,j,d] = [" + join(first) + "]",
            count, first);
}

// The plain backward's scores on the same case, both ways; nothing when it cannot run there.
struct PlainScores {
  GradientScores exact, own;
  bool own_judged = false;
};
std::optional<PlainScores> plain_scores(AttachedKernel& plain, const ReceivedCase& rc, const Case& source,
                                        const Tensor& o, const Tensor& lse, const BackwardReference& ref,
                                        const RunOptions& run, Format f) {
  if (why_unfit(source, plain.declaration())) return std::nullopt;
  const BackwardRun exact = plain.run_backward(rc, o, lse, run);
  if (exact.status != RunStatus::ok) return std::nullopt;
  PlainScores p;
  p.exact = score_gradients(exact, ref, f);
  const KernelRun fwd = plain.run(rc, run);
  if (fwd.status == RunStatus::ok && !fwd.lse.values.empty()) {
    const BackwardRun own = plain.run_backward(rc, fwd.out, fwd.lse, run);
    if (own.status == RunStatus::ok) {
      p.own = score_gradients(own, ref, f);
      p.own_judged = true;
    }
  }
  return p;
}

void set_ratios(std::array<GradientFigures, 4>& figs, const GradientScores& kernel, const GradientScores& plain) {
  for (std::size_t t = 0; t < tensors(kernel) && t < tensors(plain); ++t) {
    const CaseScore& p = tensor(plain, t);
    if (p.non_finite == 0 && p.elements > 0) figs[t].ratio_to_plain = ratio_to_plain(tensor(kernel, t), p).max_scaled_error;
  }
}

}  // namespace

Case with_upstream_gradient(const Case& c, const KernelDeclaration& d) {
  Case out = c;
  if (d.backward && c.level == Level::core && c.d_o.values.empty()) out.d_o = upstream_gradient_for(c);
  return out;
}

std::unique_ptr<AttachedKernel> plain_backward_for(const KernelDeclaration& d) {
  if (!d.backward) return nullptr;
  for (const auto& b : bundled_kernels())
    if (!b.flawed && b.declaration.backward && receives_alike(b.declaration, d)) return attach_in_process(b.kernel);
  return nullptr;
}

void judge_backward(AttachedKernel& k, const ReceivedCase& rc, const Case& source, const KernelRun& first,
                    const CoreReference& ref, const JudgeOptions& opt, Judgement& j) {
  const KernelDeclaration& d = k.declaration();
  const Format f = d.output_format;
  BackwardOptions bo;
  bo.base = opt.detect.reference;
  // d(bias) = dS, judged where the kernel writes it (HR_BACKWARD_BIAS_GRAD on a bias mask).
  bo.with_d_scores = (d.backward_flags & HR_BACKWARD_BIAS_GRAD) != 0 && rc.received.core.mask.kind == MaskKind::bias;
  const BackwardReference exact_ref = reference_backward(rc.received.core, rc.received.core_inputs, rc.received.d_o, bo);
  BackwardReference scored_ref = exact_ref;
  const std::int64_t beyond = exclude_beyond_range(scored_ref.d_q, f) + exclude_beyond_range(scored_ref.d_k, f) +
                              exclude_beyond_range(scored_ref.d_v, f) + exclude_beyond_range(scored_ref.d_s, f);
  if (beyond > 0)
    j.faults.notes.push_back(std::to_string(beyond) + " exact gradient elements round beyond " +
                             std::string(format_name(f)) + "'s range: not scored");
  if (!exact_ref.certified) j.record.reference_certified = false;
  add_underflow_floor(scored_ref, rc.received, ref, f);

  BackwardFigures figs;
  figs.upstream = source.d_o.values.empty() ? std::string(upstream_kind_name(upstream_kind_for(source))) : "case";
  Tensor o, lse;
  exact_forward(ref, f, o, lse);
  const RunOptions& run = opt.detect.run;
  const BackwardRun exact = k.run_backward(rc, o, lse, run);
  if (call_failed(exact, "fed the exact O and lse", j)) return;
  const GradientScores exact_scores = score_gradients(exact, scored_ref, f);
  figs.bias_judged = exact_scores.bias_judged;
  for (std::size_t t = 0; t < tensors(exact_scores); ++t) figs.fed_exact[t] = figures_of(tensor(exact_scores, t));
  non_finite_faults(exact_scores, "fed the exact O and lse", j.faults);

  // End to end: the kernel's own forward outputs, as training feeds them.
  const bool recomputes = (d.backward_flags & HR_BACKWARD_RECOMPUTES) != 0;
  std::optional<GradientScores> own_scores;
  if (first.lse.values.empty() && !recomputes) {
    figs.end_to_end_judged = false;
    j.faults.notes.push_back("the kernel's forward returns no log-sum-exp: its backward judged fed the exact one only");
  } else {
    const Tensor& own_lse = first.lse.values.empty() ? lse : first.lse;  // a recomputing backward ignores it
    const BackwardRun own = k.run_backward(rc, first.out, own_lse, run);
    if (call_failed(own, "fed its own forward", j)) return;
    own_scores = score_gradients(own, scored_ref, f);
    for (std::size_t t = 0; t < tensors(*own_scores); ++t) figs.end_to_end[t] = figures_of(tensor(*own_scores, t));
    non_finite_faults(*own_scores, "fed its own forward", j.faults);
  }

  masked_key_faults(exact, rc.received, j.faults);
  // wrong_group_sum is told apart from plain error only past what a sound
  // backward may reach: the default fed-exact limit of the format.
  if (j.score) {
    const double threshold = default_budget(d.input_format)
                                 .gradient_scaled_error_limit(gradient_accumulation_length(rc.received.core.shape),
                                                              *j.score, 2);
    if (wrong_group_sum(exact, rc.received, exact_scores, threshold, f)) {
      add_fault(j.faults, FaultClass::wrong_group_sum,
                "dK, dV match one query head's certified share, not the group's sum (max scaled error against the "
                "sum " + number(std::max(exact_scores.d_k.max_scaled_error, exact_scores.d_v.max_scaled_error)) + ")",
                1, {});
    }
  }

  // Further identical calls fed the exact inputs (determinism_runs − 1 of them), stopping at the first that differs.
  for (int call = 1; call < opt.detect.determinism_runs && j.faults.find(FaultClass::nondeterministic) == nullptr;
       ++call) {
    const BackwardRun again = k.run_backward(rc, o, lse, run);
    j.faults.runs += 1;
    if (again.status != RunStatus::ok) {
      add_fault(j.faults, FaultClass::nondeterministic,
                "backward: an identical call fed the exact O and lse ended " + std::string(run_status_name(again.status)) +
                    " (" + again.detail + ") where the first returned",
                1, {});
    } else if ((d.backward_flags & HR_BACKWARD_NONDETERMINISTIC) != 0) {
      figs.spread = std::max(figs.spread, gradient_spread(exact, again, scored_ref, f));
      const double bound = j.score ? default_budget(d.input_format)
                                         .gradient_scaled_error_limit(
                                             gradient_accumulation_length(rc.received.core.shape), *j.score, 2)
                                   : 0.0;
      if (figs.spread > bound)
        add_fault(j.faults, FaultClass::nondeterministic,
                  "backward (declared nondeterministic): two identical calls differ by " + number(figs.spread) +
                      " in scaled units, beyond the fed-exact gradient limit " + number(bound),
                  1, {});
    } else if (!same_gradients(exact, again)) {
      add_fault(j.faults, FaultClass::nondeterministic,
                "backward: " + std::to_string(call + 1) +
                    " identical calls fed the exact O and lse gave different gradient bits (the kernel does not "
                    "declare HR_BACKWARD_NONDETERMINISTIC)",
                1, {});
    }
  }

  // The ratio to the plain same-precision backward, each way.
  if (opt.plain_backward != nullptr && (opt.plain_backward == &k || opt.plain_backward->declaration().name == d.name)) {
    for (auto& g : figs.fed_exact) g.ratio_to_plain = 1.0;  // its own plain backward: 1 by construction
    for (auto& g : figs.end_to_end) g.ratio_to_plain = figs.end_to_end_judged ? 1.0 : kNaN;
  } else if (opt.plain_backward != nullptr && receives_alike(opt.plain_backward->declaration(), d)) {
    if (auto p = plain_scores(*opt.plain_backward, rc, source, o, lse, scored_ref, run, f)) {
      set_ratios(figs.fed_exact, exact_scores, p->exact);
      if (own_scores && p->own_judged) set_ratios(figs.end_to_end, *own_scores, p->own);
    }
  }
  j.record.backward = figs;
}

std::vector<VerdictReason> judge_gradients(CaseRecord& rec, const CaseScore& fwd, const KernelBudget& budget,
                                           const CoreShape& shape) {
  std::vector<VerdictReason> reasons;
  if (!rec.backward) return reasons;
  const BackwardFigures& b = *rec.backward;
  const std::int64_t ng = gradient_accumulation_length(shape), nf = accumulation_length(shape);
  const double exact_limit = budget.gradient_scaled_error_limit(ng, fwd, 2);
  const double e2e_limit = budget.gradient_scaled_error_limit(ng + nf, fwd, 3);
  const double ratio_limit = budget.max_gradient_ratio_to_plain.relative_at(ng, fwd.unit_roundoff);
  rec.limits.max_gradient_scaled_error = exact_limit;
  rec.limits.max_gradient_scaled_error_end_to_end = e2e_limit;
  rec.limits.max_gradient_ratio_to_plain = ratio_limit;
  const std::string& origin = budget.max_gradient_scaled_error.origin;
  auto check = [&](const std::array<GradientFigures, 4>& way, const char* name, double limit, std::int64_t n) {
    for (std::size_t t = 0; t < b.tensors(); ++t) {
      const GradientFigures& g = way[t];
      if (!(g.max_scaled_error <= limit)) {
        VerdictReason r;
        r.what = "max_gradient_scaled_error";
        r.value = g.max_scaled_error;
        r.limit = limit;
        r.text = std::string(kGradientNames[t]) + " max_gradient_scaled_error " + number(g.max_scaled_error) + " (" +
                 name + ") exceeds " + number(limit) +
                 (limit > 0 ? " (" + number(g.max_scaled_error / limit) + "x the limit)" : "") + "; limit " +
                 budget.max_gradient_scaled_error.describe(n, fwd.unit_roundoff) + ", " + origin;
        reasons.push_back(std::move(r));
      }
      if (!std::isnan(g.ratio_to_plain) && g.ratio_to_plain > ratio_limit) {
        VerdictReason r;
        r.what = "max_gradient_ratio_to_plain";
        r.value = g.ratio_to_plain;
        r.limit = ratio_limit;
        r.text = std::string(kGradientNames[t]) + " max_gradient_ratio_to_plain " + number(g.ratio_to_plain) + " (" +
                 name + ") exceeds " + number(ratio_limit) + " (max scaled error against the plain backward's); " +
                 budget.max_gradient_ratio_to_plain.origin;
        reasons.push_back(std::move(r));
      }
    }
  };
  check(b.fed_exact, "fed the exact O and lse", exact_limit, ng);
  if (b.end_to_end_judged) check(b.end_to_end, "end to end", e2e_limit, ng + nf);
  return reasons;
}

}  // namespace headroom
