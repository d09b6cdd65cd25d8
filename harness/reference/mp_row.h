// headroom — one attention row in multiprecision, with its certified error bound.
//
// The row: visible keys j ∈ J (n = |J|), scores z_j = cap(s·(q·k_j)) + β_j
// (cap(x) = c·tanh(x/c) under a soft cap c > 0, else x), weights
// w_j = exp(z_j − m) for a fixed number m, S = Σ w_j (+ w_σ = exp(σ − m) when
// the row has a sink logit σ), N_d = Σ w_j v_jd, O_d = N_d / S, lse = m + log S. The algorithm runs at working precision p
// (unit u: relative error of + − × ÷; u_f: of exp and log; see mp_arith.h) and
// every number below is the value actually computed, hatted.
//
// Error analysis (each step's bound is what the code computes beside it):
//
//  (1) Dot product. â = Σ_k RN(q̂_k·k̂_jk) summed recursively: |â − q̂·k̂| ≤
//      γ_Dk·Σ|q̂_k||k̂_jk| (Higham 2002, §3.1, eq. 3.5, rounded products). The
//      inputs may themselves be inexact (block level: projections with
//      |q̂ − q| ≤ γ'·a_q, |q| ≤ a_q, likewise k), which adds
//      Σ(|q̂−q||k̂| + |q||k̂−k|) ≤ γ'(2+γ')·Ā_j with Ā_j = Σ_k a_qk·a_kjk
//      (γ' = 0 and a = |·| at core level). Then ẑ_j = RN(RN(s·â) + β_j), and
//      with (1+u)(1+γ_n) ≤ 1+γ_{n+1}:
//        |ẑ_j − z_j| ≤ E_j = |s|·Ā_j·[γ_{Dk+1}(1+γ')² + γ'(2+γ')] + u|ẑ_j|.
//  (1') Soft cap c > 0 (applied before the bias): x̂ = RN(ŷ/c) with ŷ = RN(s·â),
//      τ̂ = RN_f(tanh x̂), ĉ = RN(c·τ̂). The map y ↦ c·tanh(y/c) is 1-Lipschitz
//      (its derivative sech²(y/c) lies in (0, 1]), so the error of ŷ carries
//      over unchanged; the division adds c·u|ŷ/c| = u|ŷ|, tanh adds
//      c·|τ̂ − tanh x̂| ≤ c·u_f|tanh x̂| ≤ c·u_f|τ̂|/(1 − u_f), the product u|ĉ|:
//        E_j = |s|·Ā_j·[...] + u|ŷ| + c·u_f|τ̂|/(1 − u_f) + u|ĉ| + u|ẑ_j|.
//      (tanh: correctly rounded by MPFR, mpfr_tanh; Boost's charged u_f as
//      exp and log are, and measured against MPFR in reference_test.cpp.)
//  (1'') A sink logit σ (exact float32) is one more weight with exponent
//      σ − m and no value row: it joins m, Ŝ (n + 1 terms) and lse below and
//      none of the N_d, G_d; (2)–(8) hold with n + 1 in the sums of (4) and
//      O_d = N_d/S, |O_d| ≤ Σ_j w_j|v_jd|/S unchanged.
//  (2) m = max_j ẑ_j (any fixed number would do: the softmax and lse below are
//      exact in m, so m carries no error). t̂_j = RN(ẑ_j − m), |t̂_j − (ẑ_j − m)|
//      ≤ u|t̂_j|, so the exact exponent z_j − m lies within r_j = E_j + u|t̂_j|
//      of t̂_j.
//  (3) ŵ_j = RN_f(exp(t̂_j)). The exact weight w_j = exp(z_j − m) satisfies
//      w_j = ŵ_j(1 + φ_j), |φ_j| ≤ φ̄ = (e^r − 1 + u_f)/(1 − u_f), r = max r_j
//      (bound_arith.h: weight_uncertainty_up). A weight that underflows to 0
//      (t̂_j below −2^20, only reachable through enormous biases) has
//      w_j < e^{-2^19}; its whole contribution, however large v, is below
//      2^-1074 and is charged as such ("tiny").
//  (4) Ŝ = Σ ŵ_j recursively: |Ŝ − Σŵ_j| ≤ γ_{n−1}Σŵ_j ≤ γ_{n−1}Ŝ/(1−γ_{n−1}).
//      With (3): |S − Ŝ| ≤ ε_S·Ŝ, ε_S = (φ̄ + γ_{n−1})/(1 − γ_{n−1}).
//  (5) N̂_d = Σ RN(ŵ_j·v̂_jd) and Ĝ_d = Σ RN(ŵ_j·a_vjd) (a_v ≥ |v|, |v̂|/(1+γ'),
//      |v̂ − v| ≤ γ'a_v): with G_d = Σ ŵ_j a_vjd ≤ Ĝ_d/(1 − γ_n),
//        |N̂_d − N_d| ≤ [γ_n(1+γ') + γ' + φ̄]·G_d
//      (rounding, input error, weight error in turn).
//  (6) Q = N̂_d/Ŝ exactly: Q − O_d = (N̂_d − N_d)/Ŝ + O_d(S − Ŝ)/Ŝ, and
//      |O_d| ≤ Σ w_j|v_jd|/S ≤ (1+φ̄)G_d/(Ŝ(1−ε_S)), hence
//        |Q − O_d| ≤ c·G_d/Ŝ,  c = γ_n(1+γ') + γ' + φ̄ + ε_S(1+φ̄)/(1−ε_S).
//      Ô_d = RN(Q) adds u|Ô_d|:
//        bound_d = c/(1−γ_n)·⌈Ĝ_d/Ŝ⌉ + u|Ô_d| (+ tiny).
//  (7) M_d = Σ p_j|v_jd| (core: a_v = |v|) lies within
//      ⌊Ĝ_d/Ŝ⌋(1−φ̄)/((1+γ_n)(1+ε_S)) and ⌈Ĝ_d/Ŝ⌉(1+φ̄)/((1−γ_n)(1−ε_S)); the
//      element is certified when bound_d ≤ 2^target times the lower end.
//  (8) lse: l̂ = RN(m + RN_f(log Ŝ)); exact lse = m + log S and
//      |log S − log Ŝ| ≤ −log(1 − ε_S) ≤ ε_S/(1−ε_S), so
//        lse_bound = ε_S/(1−ε_S) + u_f|RN_f(log Ŝ)| + u|l̂| (+ tiny),
//      certified when ≤ 2^target (absolute: an lse error δ is a relative error
//      δ of Σ exp z_j).
#pragma once

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <vector>

#include "bound_arith.h"

namespace headroom::detail {

/// The row being computed: its visible keys, their biases, the scale, target.
struct RowSpec {
  const std::int64_t* keys = nullptr;  ///< visible key indices, n of them (n ≥ 1)
  const double* bias = nullptr;        ///< β per visible key (n values), or null for 0
  std::int64_t n = 0;
  double scale = 1.0;                  ///< s, exactly the float32 passed
  double softcap = 0.0;                ///< c > 0: scores capped as c·tanh(x/c) before β; 0: none
  bool has_sink = false;               ///< a sink logit joins the normaliser
  double sink = 0.0;                   ///< σ, exactly the float32 passed
  int target_log2 = -80;
};

/// Where a row's results go. Elements d not wanted are left untouched.
template <class Num>
struct RowOut {
  double* out = nullptr;                ///< Dv values: RN(Ô_d)
  double* bound = nullptr;              ///< Dv values: certified |Ô_d − O_d|
  double* magnitude = nullptr;          ///< Dv values or null: RN(Ĝ_d/Ŝ)
  double* lse = nullptr;                ///< 1 value or null
  double* lse_bound = nullptr;
  const std::uint8_t* want = nullptr;   ///< Dv flags or null for every element
  Num* keep = nullptr;                  ///< Dv numbers or null: Ô_d kept in multiprecision
};

struct RowVerdict {
  bool certified = true;       ///< every computed element (and lse) within target
  double worst_excess = 0;     ///< max of bound / allowed over them (≤ 1 when certified)
};

template <class Arith>
struct MpWorkspace {
  using Num = typename Arith::Num;
  std::vector<Num> w, n_acc, g_acc, q;
  std::vector<double> err;
  std::vector<std::int64_t> dims;
  Num tmp, m, s;
  long precision = -1;

  void prepare(const Arith& ar, std::int64_t n, std::int64_t dv, std::int64_t dk) {
    const bool repr = precision != ar.precision();
    // Every number at the working precision: all of them when it changes, and
    // the ones a longer row adds (a default-constructed Num has the library's
    // default precision, not ours: its roundings would escape the analysis,
    // and a row's bits would depend on the rows its worker did before).
    auto fit = [&](std::vector<Num>& v, std::int64_t size) {
      const auto want = static_cast<std::size_t>(size);
      const std::size_t had = v.size();
      if (had < want) v.resize(want);
      for (std::size_t i = repr ? 0 : had; i < v.size(); ++i) ar.init(v[i]);
    };
    fit(w, n);
    fit(n_acc, dv);
    fit(g_acc, dv);
    fit(q, dk);
    if (repr) {
      ar.init(tmp);
      ar.init(m);
      ar.init(s);
      precision = ar.precision();
    }
    if (err.size() < static_cast<std::size_t>(n)) err.resize(static_cast<std::size_t>(n));
  }
};

/// Runs one row at the arithmetic's precision. Source supplies the operands
/// (reference_core.cpp, reference_block.cpp): begin_row(ar, ws), dot(ar, ws,
/// acc, j), abs_dot_up(j) = Ā_j, add_v(ar, acc, tmp, w, j, d) (acc += RN(w·v̂_jd)),
/// abs_v(j, d) = a_vjd, gamma_in() = γ', value_dim().
/// Returns: whether the computed elements met the target, and by how much not.
template <class Arith, class Source>
RowVerdict mp_row(const Arith& ar, MpWorkspace<Arith>& ws, const Source& src, const RowSpec& spec,
                  const RowOut<typename Arith::Num>& o) {
  using Num = typename Arith::Num;
  const std::int64_t n = spec.n, dv = src.value_dim();
  const double u = ar.unit(), uf = ar.unit_fn();
  const double gin = src.gamma_in();
  const std::int64_t nw = n + (spec.has_sink ? 1 : 0);  // weights: the keys', then the sink's
  ws.prepare(ar, nw, dv, src.key_dim());
  src.begin_row(ar, ws);

  // (1) scores and their absolute error bounds E_j.
  const double one_gin = add_up(1.0, gin);
  const double gdot = mul_up(std::fabs(spec.scale),
                             add_up(mul_up(gamma_up(src.key_dim() + 1, u), mul_up(one_gin, one_gin)),
                                    mul_up(gin, add_up(2.0, gin))));
  const double c = spec.softcap, c_fn = c > 0 ? div_up(mul_up(c, uf), sub_down(1.0, uf)) : 0.0;
  std::int64_t arg_max = 0;
  for (std::int64_t idx = 0; idx < n; ++idx) {
    Num& z = ws.w[static_cast<std::size_t>(idx)];
    const std::int64_t j = spec.keys[idx];
    src.dot(ar, ws, z, j);
    ar.mul_d(z, spec.scale);
    double e = mul_up(gdot, src.abs_dot_up(j));
    if (c > 0) {  // (1')
      e = add_up(e, mul_up(u, ar.abs_up(z)));
      ar.div_d(z, c);
      ar.tanh(z);
      e = add_up(e, mul_up(c_fn, ar.abs_up(z)));
      ar.mul_d(z, c);
      e = add_up(e, mul_up(u, ar.abs_up(z)));
    }
    if (spec.bias != nullptr) ar.add_d(z, spec.bias[idx]);
    ws.err[static_cast<std::size_t>(idx)] = add_up(e, mul_up(u, ar.abs_up(z)));
    if (idx > 0 && ar.less(ws.w[static_cast<std::size_t>(arg_max)], z)) arg_max = idx;
  }
  if (spec.has_sink) {  // (1''): exact, so no score error
    Num& z = ws.w[static_cast<std::size_t>(n)];
    ar.set_d(z, spec.sink);
    ws.err[static_cast<std::size_t>(n)] = 0.0;
    if (ar.less(ws.w[static_cast<std::size_t>(arg_max)], z)) arg_max = n;
  }

  // (2), (3) shift by m, exponentiate, track the largest exponent uncertainty.
  ar.set(ws.m, ws.w[static_cast<std::size_t>(arg_max)]);
  double r_max = 0;
  bool tiny = false, broken = false;
  for (std::int64_t idx = 0; idx < nw; ++idx) {
    Num& w = ws.w[static_cast<std::size_t>(idx)];
    ar.sub(w, ws.m);
    const double t_abs = ar.abs_up(w);
    r_max = std::max(r_max, add_up(ws.err[static_cast<std::size_t>(idx)], mul_up(u, t_abs)));
    ar.exp(w);
    if (ar.is_zero(w)) {
      if (t_abs >= 0x1p20) tiny = true;
      else broken = true;  // an exp that underflows above −2^20 breaks the model
    }
  }
  const double phi = broken ? kInf : weight_uncertainty_up(r_max, uf);

  // (4) the sum of weights.
  ar.zero(ws.s);
  for (std::int64_t idx = 0; idx < nw; ++idx) ar.add(ws.s, ws.w[static_cast<std::size_t>(idx)]);
  const double g_n = gamma_up(n, u), g_n1 = gamma_up(nw - 1, u);
  const double eps_s = div_up(add_up(phi, g_n1), sub_down(1.0, g_n1));

  // (5) weighted sums of v and of its magnitude bound, for the wanted elements.
  ws.dims.clear();
  for (std::int64_t d = 0; d < dv; ++d)
    if (o.want == nullptr || o.want[d] != 0) ws.dims.push_back(d);
  for (std::int64_t d : ws.dims) {
    ar.zero(ws.n_acc[static_cast<std::size_t>(d)]);
    ar.zero(ws.g_acc[static_cast<std::size_t>(d)]);
  }
  for (std::int64_t idx = 0; idx < n; ++idx) {
    const Num& w = ws.w[static_cast<std::size_t>(idx)];
    const std::int64_t j = spec.keys[idx];
    for (std::int64_t d : ws.dims) {
      src.add_v(ar, ws.n_acc[static_cast<std::size_t>(d)], ws.tmp, w, j, d);
      ar.add_prod_d(ws.g_acc[static_cast<std::size_t>(d)], ws.tmp, w, src.abs_v(j, d));
    }
  }

  // (6), (7) quotient, bound, magnitude, certification.
  const double one_phi = add_up(1.0, phi);
  const double coef = add_up(add_up(mul_up(g_n, one_gin), add_up(gin, phi)),
                             div_up(mul_up(eps_s, one_phi), sub_down(1.0, eps_s)));
  const double c_g = div_up(coef, sub_down(1.0, g_n));
  const double low = div_down(sub_down(1.0, phi), mul_up(add_up(1.0, g_n), add_up(1.0, eps_s)));
  const double allowed_rel = std::ldexp(1.0, spec.target_log2);
  RowVerdict verdict;
  auto judge = [&](double bound, double allowed) {
    if (!(bound <= allowed)) verdict.certified = false;
    const double excess = allowed > 0 ? bound / allowed : (bound > 0 ? kInf : 0.0);
    if (!(excess <= verdict.worst_excess)) verdict.worst_excess = std::isnan(excess) ? kInf : excess;
  };
  for (std::int64_t d : ws.dims) {
    const auto du = static_cast<std::size_t>(d);
    Num& q = o.keep != nullptr ? o.keep[d] : ws.n_acc[du];
    if (o.keep != nullptr) ar.init(q);
    ar.div(q, ws.n_acc[du], ws.s);
    const double g_up = ar.quotient_up(ws.g_acc[du], ws.s, ws.tmp);
    const double g_down = ar.quotient_down(ws.g_acc[du], ws.s, ws.tmp);
    double bound = add_up(mul_up(c_g, g_up), mul_up(u, ar.abs_up(q)));
    if (tiny) bound = add_up(bound, 0x1p-1074);
    o.out[d] = ar.nearest(q);
    o.bound[d] = bound;
    if (o.magnitude != nullptr) {
      ar.div(ws.tmp, ws.g_acc[du], ws.s);
      o.magnitude[d] = ar.nearest(ws.tmp);
    }
    judge(bound, mul_down(allowed_rel, mul_down(g_down, low)));
  }

  // (8) log-sum-exp.
  if (o.lse != nullptr) {
    ar.log(ws.tmp, ws.s);
    const double log_abs = ar.abs_up(ws.tmp);
    ar.add(ws.tmp, ws.m);
    double bound = add_up(add_up(div_up(eps_s, sub_down(1.0, eps_s)), mul_up(uf, log_abs)),
                          mul_up(u, ar.abs_up(ws.tmp)));
    if (tiny) bound = add_up(bound, 0x1p-1074);
    *o.lse = ar.nearest(ws.tmp);
    *o.lse_bound = bound;
    judge(bound, allowed_rel);
  }
  return verdict;
}

/// Returns: the a-priori working precision for a row, a multiple of 64 (MPFR
/// works in 64-bit limbs, so the bits up to the next limb cost nothing):
/// the bound of mp_row.h is about u·R with
///   R = 2·t_dot·max_j(|s|Ā_j + |β_j|) + 2·max_j(ẑ_max − ẑ_j) + 2(n + t_v) + 8,
/// t_dot, t_v the error terms per dot product and per value (Dk + 3, 0 at core
/// level); p = −target + 4 + ⌈log2 R⌉ leaves a factor 8 of slack for the
/// double estimate of the scores this uses. Not finite R → `max_precision`.
inline long a_priori_precision(int target_log2, double r, long max_precision) {
  if (!std::isfinite(r)) return max_precision;
  const long bits = -target_log2 + 4 + static_cast<long>(std::ceil(std::log2(std::max(r, 1.0))));
  const long rounded = std::max<long>(128, (bits + 63) / 64 * 64);
  return std::min(rounded, max_precision);
}

/// Returns: the next precision after a row missed its target by `excess`
/// (bound / allowed): enough bits for the shortfall plus 16, at least one limb.
inline long next_precision(long p, double excess, long max_precision) {
  const double extra = std::isfinite(excess) && excess > 1 ? std::ceil(std::log2(excess)) + 16 : 2.0 * p;
  const long bits = p + std::max<long>(64, static_cast<long>(std::min(extra, 1e6)));
  return std::min(max_precision, (bits + 63) / 64 * 64);
}

}  // namespace headroom::detail
