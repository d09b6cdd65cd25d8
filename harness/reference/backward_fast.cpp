// headroom — the backward fast path: double-double gradients with a-posteriori bounds.
//
// Notation as fast_row.inc: u = 2^-53, dd = an unevaluated sum hi + lo,
// normalised when |lo| ≤ u|hi|. One query row i with n visible keys; the
// forward kernel (FastCore::run_row_weights) gives weights ŵ_j and Ŝ with, per
// fast_core.cpp (a)–(c), w_j = ŵ_j(1 + φ_j), |φ_j| ≤ φ̄, |S − Ŝ| ≤ ε_S·Ŝ_low.
//
//  (1) P̂_j = ŵ_j/Ŝ as the forward's quotient (row_outputs: relative error
//      ≤ 12.1u² ≤ 16u²), normalised by two_sum. Exact P_j = P̂_j(1 + ·) with
//        |P_j − P̂_j| ≤ ρ·P̂_j,  ρ = (1 + φ̄)/((1 − ε_S)(1 − 16u²)) − 1.
//      A negligible key (ŵ_j = 0, t_j < −650) has P̂_j = 0 and exact
//      P_j ≤ π0 = 2^-937/(Ŝ_low(1 − ε_S)).
//  (2) dP̂_j = dO_i·V_j, normalised (hi + lo), with |dP̂_j − dP_j| ≤ ε_j:
//      on the grid (backward_row.inc, backward_dp_kernel) σ_j the power of two
//      2^(e+2) for ‖dO_i‖₂·‖V_j‖₂ ≤ b_j = 2^e·m (norm_up, rounded up; 1 ≤ m < 2),
//      at least 2^-900, so Σ_d |dO_id V_jd| ≤ b_j ≤ σ_j/2 (Cauchy–Schwarz),
//      and ε_j = score_coef·σ_j + score_floor (fast_core.cpp's score bound at
//      Dk = Dv padded); ε_j = 0 when dO_i or V_j is 0 throughout (every product
//      is then exactly 0, and so are h, ℓ and the sums). A row where some
//      b_j > 2^998, or whose c_e = max_j ε_j / A_i (below) exceeds
//      kGridDotMax (a choice, not a claim: a coarse grid against small
//      products), takes the cascaded dot product of fast_row.inc's scores
//      instead (Ogita, Rump & Oishi 2005, Dot2): ε_j = c_dot·A_j with
//      c_dot = γ_{Dv+1}·u·(Dv + 2), and c_e = c_dot. Either way A_j ≥
//      Σ_d |dO_id||V_jd| (computed, rounded up by nonneg_sum_up over Dv
//      padded + 3 operations), and ε_j ≤ c_e·(A_j + A_i) for every
//      non-negligible key (A_j ≥ 0).
//  (3) D̂ = Σ_j dd_mul(P̂_j, dP̂_j) accumulated by dd_add. dd_mul errs by
//      ≤ 6.1u² relatively (fast_row.inc); dd_add(a, b) = two_sum(a.hi, b.hi)
//      = (s, e), l = RN(RN(a.lo + b.lo) + e), two_sum(s, l): the two roundings
//      err by ≤ u²(|a.hi| + |b.hi|) and ≤ 2.01u²(|a.hi| + |b.hi|), so
//      ≤ 3.01u²(|a.hi| + |b.hi|). With U ≥ Σ_j |P̂_j dP̂_j| (sum of |t.hi|,
//      rounded up, × (1 + 2^-50)) the rounding is ≤ (3.1n + 10)u²·U, and, as
//      D − D̂' = Σ_j (P_j − P̂_j)dP̂_j + P_j(dP_j − dP̂_j) for the exact sum D̂',
//        |D̂ − D| ≤ err_D = (3.1n + 10)u²U + ρU + (1 + ρ)·EP + π0·A_neg + n·2^-1060
//      with EP ≥ Σ_j P̂_j ε_j (grid: Σ_j P̂_j,hi·ε_j by fma, rounded up over
//      2n operations, × (1 + u) for P̂_lo; Dot2: c_dot·AP), AP ≥ Σ_j P̂_j A_j
//      and A_neg ≥ Σ_{negligible j} A_j (the last term charges underflow in
//      the products). A_i = (1 + ρ)AP + π0·A_neg ≥ Σ_j P_j A_j.
//  (4) dŜ_j = dd_mul(P̂_j, dd_add(dP̂_j, −D̂)). With |dP̂_j| ≤ A_j + ε_j,
//      |D̂| ≤ (1 + κ_D)A_i (κ_D = err_D/A_i), |dP_j| ≤ A_j, |D| ≤ A_i, and so
//      |dP̂_j| + |D̂| ≤ (1 + c_e + κ_D)(A_j + A_i):
//        |dŜ_j − dS_j| ≤ P̂_j[9.2u²(|dP̂_j| + |D̂|) + ε_j + err_D + ρ(|dP_j| + |D|)]
//                      ≤ τ·m_j,   m_j = RN(P̂_j,hi·RN(A_j + A_i)),
//        τ = (1 + 2^-50)(1 + u)[9.2u²(1 + c_e + κ_D) + c_e + κ_D + ρ],
//      and |dŜ_j| ≤ λ·m_j, λ = (1 + c_e + κ_D)(1 + 2^-49). A negligible key
//      has dŜ_j = 0 and |dS_j| ≤ ν = π0(A_max + A_i)(1 + 2^-50). Underflow in
//      (4) is charged 2^-1060 per term (far above its few 2^-1074).
//  (5) Sums Σ_j dŜ_j K_jd (dQ) on the grid σ_d, the power of two 2·2^⌊log2 x⌋
//      for x = RN↑(2·S·K_max,d) (S ≥ Σ_j |dŜ_j,hi| rounded up), at least
//      2^-900, so Σ_j |dŜ_j,hi K_jd| ≤ σ_d/2 (backward_row.inc, dq_grid_cols:
//      the sequence of weighted_sums_grid), erring by ≤ FastCore::grid_error(n)
//      at σ_d in place of λe_acc·M below; a row whose grid error at some
//      column exceeds 2^(target − 2) of the column's |s|·M, or whose x exceeds
//      2^999, runs them by the cascade instead (a choice, not a claim).
//      Σ_i dŜ_ij Q_id (dK), Σ_i P̂_ij dO_id (dV), and dQ's fallback, with
//      the operation sequence of fast_row.inc's weighted_sums (renormalised
//      every kRenormEvery terms), whose bound is n(4B + 8)u²(1 + 2^-38)·Ḡ,
//      Ḡ = Σ|exact terms| ≤ λ·M (dQ, dK) or (1 + u)·M (dV), M the magnitude
//      sums Σ m_j|x| or Σ P̂_hi|dO| accumulated by fma beside them (rounded up
//      by nonneg_sum_up), plus n·2^-1071 for underflow. So, before the factor
//      |s| of dQ and dK (applied with one more rounding, charged u|s·L|):
//        bound(dQ_id) = (τ + λe_acc)M_id + n_neg·ν·K_max,d + n·2^-1060·K_max,d + tiny
//                      (grid: τ·M_id + grid_error(n) at σ_d + the same terms)
//        bound(dK_jd) = (τ_max + λ_max·e_acc,j)M_jd + (k_neg,j·ν_max + n_j·2^-1060)·Q_max,d + tiny
//        bound(dV_jd) = (ρ_max + e_acc,j)(1 + u)M_jd + k_neg,j·π0_max·dO_max,d + tiny
//      (maxima over the block's rows, e_acc,j with n_j the rows seeing key j).
//      A row whose τ exceeds kCleanTau (scores so large that the forward's
//      exponent uncertainty, ρ, is far above u²: massive activations) would
//      lift τ_max and ρ_max for every key of the block; its own terms are
//      charged instead, beside the sums: E_jd += RN(τ_i·m_ij)·|Q_id| and
//      F_jd += RN(ρ_i·P̂_ij,hi)·|dO_id| by fma, so with its clean rows' maxima
//        bound(dK_jd) gains nonneg_sum_up(E_jd, 2n_j + 2), and
//        bound(dV_jd) gains (1 + u)·nonneg_sum_up(F_jd, 2n_j + 2)
//      (each term one rounded product then one fma: 2 operations on its path
//      besides the sum's; (1 + u) covers |P̂_lo| ≤ u·P̂_hi), which is the
//      per-row form of the same bound: Σ_i τ_i m_ij|Q_id| ≥ the dirty rows' error.
//      A column of K (of Q, of dO over the block's rows) that is 0 throughout
//      makes every term of dQ_id (dK_jd, dV_jd) exactly 0: the sum is exactly 0,
//      given with bound 0 and magnitude 0 (a one-hot dO has such columns).
//      Likewise where the accumulated magnitude M is 0 and no negligible key
//      took part: each term's m·|x| is then 0 or rounded to 0 from below
//      2^-1074; with μ ≤ every coefficient m (P̂_hi for dV) of the sum and
//      ξ ≤ every nonzero |x| of its column, μ·ξ ≥ 2^-1073 rules the second
//      out, so every x of the sum is 0 and it is exactly 0.
//  (6) Magnitudes: the exact natural magnitudes of reference_backward.h
//      differ from |s|·M (resp. M) by the relative errors of P̂ (ρ), of the
//      computed A (γ_Dv, with Dv padded + 3 operations; γ_2n) and of the sums (γ_2n): κ_mag = 3ρ + 3γ_Dv +
//      2γ_2n + 10u, required ≤ 2^-30, and by π0·A_neg, required ≤ 2^-40·A_i;
//      the reported magnitude is M·(1 − 2^-30) rounded down, a lower end.
//      An element is certified when its bound ≤ 2^target·magnitude (or both
//      are 0: no terms at all).
// A row the forward kernel cannot finish, or whose ρ, κ or magnitudes leave
// these ranges, sends its whole block to the multiprecision path.
#include "backward_fast.h"

#include <algorithm>
#include <bit>
#include <cmath>

#include "bound_arith.h"
#include "input_check.h"

#if defined(__clang__)
#pragma clang fp contract(off)
#else
#pragma GCC optimize("fp-contract=off")
#endif

namespace headroom::detail {
namespace {

constexpr double kU = 0x1p-53;
constexpr double kU2 = 0x1p-106;
constexpr double kMagSlack = 0x1p-30;
// Rows with τ above this are charged per term (see (5)): a choice, not a claim
// (the bound holds either way). Typical rows have τ near 2^-85 at D = 128 and
// 2^-87.4 at D = 64 (N(0,1) inputs: ρ, the forward's exp uncertainty,
// dominates), so at 2^-82 they share the block's maxima (dK, dV bounds within
// 2^-82 of their magnitudes from τ) and the per-term charges, two more passes
// over each row's Q and dO per key, are left to massive-activation rows.
constexpr double kCleanTau = 0x1p-82;
// (2): a row whose grid dot products' c_e exceeds this takes Dot2 (c_dot ≈ 2^-92 at Dv = 128).
constexpr double kGridDotMax = 0x1p-86;

struct DD {
  double hi, lo;
};
inline DD two_sum(double a, double b) {
  const double s = a + b;
  const double bb = s - a;
  return {s, (a - (s - bb)) + (b - bb)};
}
// As fast_row.inc's dd_mul: normalised x, y; relative error ≤ 6.1u²; result normalised.
inline DD dd_mul(DD x, DD y) {
  const double p = x.hi * y.hi;
  double e = std::fma(x.hi, y.hi, -p);
  e = std::fma(x.hi, y.lo, e);
  e = std::fma(x.lo, y.hi, e);
  const double s = p + e;
  return {s, e - (s - p)};
}
// (3): error ≤ 3.01u²(|a.hi| + |b.hi|); result normalised.
inline DD dd_add(DD a, DD b) {
  const DD s = two_sum(a.hi, b.hi);
  const double l = (a.lo + b.lo) + s.lo;
  return two_sum(s.hi, l);
}

// (2): hi + lo = Σ a_c b_c (Dot2); *abs_sum = Σ |a_c b_c| rounded as computed.
inline DD dot2(const double* a, const double* b, std::int64_t n, double* abs_sum) {
  double hi = 0, lo = 0, g = 0;
  for (std::int64_t c = 0; c < n; ++c) {
    const double p = a[c] * b[c];
    const DD s = two_sum(hi, p);
    hi = s.hi;
    lo += s.lo + std::fma(a[c], b[c], -p);
    g = std::fma(std::fabs(a[c]), std::fabs(b[c]), g);
  }
  *abs_sum = g;
  return two_sum(hi, lo);
}

double e_acc_up(std::int64_t n) {
  return mul_up(mul_up(static_cast<double>(n), static_cast<double>(4 * kRenormEvery + 8)), mul_up(kU2, 1.0 + 0x1p-38));
}

// The element's certified verdict: bound ≤ 2^target·magnitude, or both 0.
bool meets(double bound, double magnitude, double allowed_rel) {
  return bound <= mul_down(allowed_rel, magnitude) || (bound == 0 && magnitude == 0);
}

void put(GradientReference& g, std::size_t at, double out, double bound, double magnitude) {
  g.out.values[at] = out;
  g.bound.values[at] = bound;
  g.magnitude.values[at] = magnitude;
}

}  // namespace


BackwardFast::BackwardFast(const CoreProblem& p, const CoreInputs& in, const Tensor& d_o, const BackwardOptions& opt,
                           unsigned workers, const FastKernels* fk, const BackwardKernels* bk)
    : p_(p),
      in_(in),
      d_o_(d_o),
      opt_(opt),
      fast_(p, in, opt.base, workers, fk),
      kernels_(bk != nullptr ? bk : &backward_kernels()) {
  const std::int64_t dv = p.shape.value_dim;
  dk_pad_ = (p.shape.key_dim + kLanes - 1) / kLanes * kLanes;
  dv_pad_ = (dv + kLanes - 1) / kLanes * kLanes;
  dot_coef_ = mul_up(mul_up(gamma_up(dv + 1, kU), kU), static_cast<double>(dv + 2));
  // (2): fast_core.cpp's score bound at Dk = dv_pad_ (backward_row.inc, backward_dp_kernel).
  const auto n = static_cast<double>(dv_pad_);
  dp_coef_ = add_up(mul_up(mul_up(gamma_up(dv_pad_ + 1, kU), kU), n + 2), mul_up(n + 3, kU2));
  dp_floor_ = mul_up(3 * n, 0x1p-1074);
}

std::int64_t BackwardFast::blocks() const { return p_.shape.batch * p_.shape.kv_heads; }

void BackwardFast::run_block(std::int64_t block, BackwardReference& ref, Scratch& sc,
                             std::vector<PendingElement>& pending, BackwardStats& stats) const {
  const CoreShape& s = p_.shape;
  const std::int64_t b = block / s.kv_heads, g = block % s.kv_heads, group = s.q_heads / s.kv_heads;
  const std::int64_t tk = s.kv_len, dk = s.key_dim, dv = s.value_dim, dkp = dk_pad_, dvp = dv_pad_;
  const double scale = p_.scale, abs_s = std::fabs(scale);
  const double allowed_rel = std::ldexp(1.0, opt_.base.target_log2);
  const bool want_ds = opt_.with_d_scores;
  const double* kb = &in_.k.values[static_cast<std::size_t>(in_.k.offset(b, g, 0, 0))];
  const double* vb = &in_.v.values[static_cast<std::size_t>(in_.v.offset(b, g, 0, 0))];
  const BackwardKernels& kr = *kernels_;

  auto zero_fill = [](std::vector<double>& v, std::int64_t n) { v.assign(static_cast<std::size_t>(n), 0.0); };
  for (auto* v : {&sc.k_hi, &sc.k_lo, &sc.k_mag, &sc.k_err, &sc.k_pad}) zero_fill(*v, tk * dkp);
  for (auto* v : {&sc.v_hi, &sc.v_lo, &sc.v_mag, &sc.v_err, &sc.v_pad}) zero_fill(*v, tk * dvp);
  for (auto* v : {&sc.q_hi, &sc.q_lo, &sc.q_mag, &sc.q_sigma}) zero_fill(*v, dkp);
  for (Scratch::Slot& rw : sc.slot) {
    zero_fill(rw.q_pad, dkp);
    zero_fill(rw.do_pad, dvp);
  }
  sc.v_norm.assign(static_cast<std::size_t>(tk), 0.0);
  sc.v_zero.assign(static_cast<std::size_t>(tk), 0);
  for (std::int64_t j = 0; j < tk; ++j) {
    std::copy(kb + j * dk, kb + (j + 1) * dk, &sc.k_pad[static_cast<std::size_t>(j * dkp)]);
    std::copy(vb + j * dv, vb + (j + 1) * dv, &sc.v_pad[static_cast<std::size_t>(j * dvp)]);
    sc.v_norm[static_cast<std::size_t>(j)] = norm_up(vb + j * dv, dv);
    sc.v_zero[static_cast<std::size_t>(j)] = std::all_of(vb + j * dv, vb + (j + 1) * dv, [](double x) { return x == 0; });
  }
  sc.k_rows.assign(static_cast<std::size_t>(tk), 0);
  sc.k_neg.assign(static_cast<std::size_t>(tk), 0);
  sc.k_fresh.assign(static_cast<std::size_t>(tk), 0);
  std::vector<double> k_max(static_cast<std::size_t>(dk), 0.0), q_max(static_cast<std::size_t>(dk), 0.0),
      do_max(static_cast<std::size_t>(dv), 0.0);
  // Smallest nonzero |x| per column (k over the block's keys, q and dO over its rows); +inf if none.
  std::vector<double> k_min(static_cast<std::size_t>(dk), kInf), q_min(static_cast<std::size_t>(dk), kInf),
      do_min(static_cast<std::size_t>(dv), kInf);
  auto note_min = [](std::vector<double>& mins, const double* x, std::int64_t n) {
    for (std::int64_t d = 0; d < n; ++d)
      if (x[d] != 0) mins[static_cast<std::size_t>(d)] = std::min(mins[static_cast<std::size_t>(d)], std::fabs(x[d]));
  };
  // Smallest coefficient m of the dK sums and P̂_hi of the dV sums over the block.
  double mk_min = kInf, mv_min = kInf;
  // Exactly 0 by the rule of (6): magnitude 0, no negligible key, μ·ξ ≥ 2^-1073.
  auto exact_zero = [](double mag, std::int64_t neg, double mu, double xi) {
    return mag == 0 && neg == 0 && mul_down(mu, xi) >= 0x1p-1073;
  };
  for (std::int64_t j = 0; j < tk; ++j)
    for (std::int64_t d = 0; d < dk; ++d)
      k_max[static_cast<std::size_t>(d)] = std::max(k_max[static_cast<std::size_t>(d)], std::fabs(kb[j * dk + d]));
  for (std::int64_t j = 0; j < tk; ++j) note_min(k_min, kb + j * dk, dk);
  double tau_max = 0, lambda_max = 1, rho_max = 0, nu_max = 0, pi0_max = 0;
  bool failed = false;

  auto escalate_block = [&] {
    for (std::int64_t h = g * group; h < (g + 1) * group; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i) {
        for (std::int64_t d = 0; d < dk; ++d) pending.push_back({GradKind::d_q, b, h, i, d});
        if (want_ds)
          for (std::int64_t j = 0; j < tk; ++j) pending.push_back({GradKind::d_s, b, h, i, j});
      }
    for (std::int64_t j = 0; j < tk; ++j) {
      for (std::int64_t d = 0; d < dk; ++d) pending.push_back({GradKind::d_k, b, g, j, d});
      for (std::int64_t d = 0; d < dv; ++d) pending.push_back({GradKind::d_v, b, g, j, d});
    }
  };

  BackwardRowArgs args;
  args.k = sc.k_pad.data();
  args.v = sc.v_pad.data();
  args.dk_pad = dkp;
  args.dv_pad = dvp;
  args.q_sigma = sc.q_sigma.data();
  args.q_hi = sc.q_hi.data();
  args.q_lo = sc.q_lo.data();
  args.q_mag = sc.q_mag.data();
  args.k_hi = sc.k_hi.data();
  args.k_lo = sc.k_lo.data();
  args.k_mag = sc.k_mag.data();
  args.k_err = sc.k_err.data();
  args.v_hi = sc.v_hi.data();
  args.v_lo = sc.v_lo.data();
  args.v_mag = sc.v_mag.data();
  args.v_err = sc.v_err.data();
  args.k_fresh = sc.k_fresh.data();
  args.k_rows = sc.k_rows.data();
  const double grid_allowed = std::ldexp(1.0, opt_.base.target_log2 - 2);
  // (5): the dK and dV terms of up to group_rows consecutive rows go into the
  // accumulators together, key by key and within a key row by row: the
  // operations on each accumulator, and their order, are those of one row at
  // a time, with each key's accumulators read from memory once per group.
  BackwardRowArgs group_args[kScatterRows];
  const int group_rows = scatter_rows_for(tk);
  int filled = 0;
  auto scatter = [&] {
    if (filled > 0) kr.kv_scatter(group_args, filled, tk);
    filled = 0;
  };

  for (std::int64_t h = g * group; h < (g + 1) * group && !failed; ++h) {
    for (std::int64_t i = 0; i < s.q_len && !failed; ++i) {
      const std::int64_t row = (b * s.q_heads + h) * s.q_len + i;
      const double* q = &in_.q.values[static_cast<std::size_t>(in_.q.offset(b, h, i, 0))];
      const double* dor = &d_o_.values[static_cast<std::size_t>(d_o_.offset(b, h, i, 0))];
      for (std::int64_t d = 0; d < dk; ++d)
        q_max[static_cast<std::size_t>(d)] = std::max(q_max[static_cast<std::size_t>(d)], std::fabs(q[d]));
      for (std::int64_t d = 0; d < dv; ++d)
        do_max[static_cast<std::size_t>(d)] = std::max(do_max[static_cast<std::size_t>(d)], std::fabs(dor[d]));
      note_min(q_min, q, dk);
      note_min(do_min, dor, dv);
      FastCore::RowScratch& rs = sc.row;
      visible_keys(s, p_.mask, b, h, i, rs.keys, rs.bias);
      const std::size_t dq_at = static_cast<std::size_t>(row * dk);
      if (want_ds)
        for (std::int64_t j = 0; j < tk; ++j) put(ref.d_s, static_cast<std::size_t>(row * tk + j), 0, 0, 0);
      if (rs.keys.empty()) {  // no gradient flows through a fully masked row
        ref.fully_masked[static_cast<std::size_t>(row)] = 1;
        for (std::int64_t d = 0; d < dk; ++d) put(ref.d_q, dq_at + static_cast<std::size_t>(d), 0, 0, 0);
        continue;
      }
      ++stats.rows;
      FastRowOut o;
      fast_.run_row_weights(row, rs, o);
      FastCore::WeightBounds wb;
      if (!o.ok || !FastCore::weight_bounds(o, static_cast<std::int64_t>(rs.keys.size()), false, wb)) {
        failed = true;
        break;
      }
      const auto n = static_cast<std::int64_t>(rs.keys.size());
      const auto nz = static_cast<std::size_t>(n);
      Scratch::Slot& rw = sc.slot[static_cast<std::size_t>(filled)];
      for (auto* v : {&rw.ph, &rw.pl, &sc.dph, &sc.dpl, &sc.a, &rw.sh, &rw.sl, &rw.mh, &sc.dp_sigma, &sc.dp_eps})
        v->resize(nz);
      rw.keys = rs.keys;
      args.q = rw.q_pad.data();
      args.d_o = rw.do_pad.data();
      std::copy(q, q + dk, rw.q_pad.begin());
      std::copy(dor, dor + dv, rw.do_pad.begin());
      args.keys = rw.keys.data();
      args.n = n;

      // (1)
      // (1 + φ̄)/((1 − ε_S)(1 − η)) − 1 = (φ̄ + ε_S + η − ε_S·η)/((1 − ε_S)(1 − η)), η = 16u².
      const double rho = div_up(add_up(add_up(wb.phi, wb.eps_s), 16 * kU2),
                                mul_down(sub_down(1.0, wb.eps_s), sub_down(1.0, 16 * kU2)));
      const double pi0 = div_up(0x1p-937, mul_down(wb.s_low, sub_down(1.0, wb.eps_s)));
      std::int64_t n_neg = 0;
      for (std::size_t x = 0; x < nz; ++x) {
        const double wh = rs.w_hi[x], wl = rs.w_lo[x];
        if (wh == 0.0) {
          rw.ph[x] = rw.pl[x] = 0.0;
          ++n_neg;
          continue;
        }
        const double q1 = wh / o.s_hi;
        const double r0 = std::fma(-q1, o.s_hi, wh);
        const double r = (r0 + wl) - q1 * o.s_lo;
        const DD pn = two_sum(q1, r / o.s_hi);
        rw.ph[x] = pn.hi;
        rw.pl[x] = pn.lo;
      }
      // (2): the grid's σ_j and ε_j; Dot2 when a grid would leave [2^-900, 2^1000].
      const bool do_zero = std::all_of(dor, dor + dv, [](double x) { return x == 0; });
      const double do_norm = norm_up(dor, dv);
      bool grid = true;
      for (std::size_t x = 0; x < nz; ++x) {
        const auto ju = static_cast<std::size_t>(rs.keys[x]);
        if (do_zero || sc.v_zero[ju] != 0) {
          sc.dp_sigma[x] = 0x1p-900;
          sc.dp_eps[x] = 0.0;
          continue;
        }
        const double bj = mul_up(do_norm, sc.v_norm[ju]);
        if (!(bj <= 0x1p998) && grid) {
          grid = false;
          ++stats.dp_dot2_rows;
        }
        // 2^(ilogb(b_j) + 2) by the exponent field (b_j normal here; an infinite or NaN
        // b_j has turned the grid off above and its σ_j is not used).
        sc.dp_sigma[x] = bj > 0x1p-902 ? 4 * std::bit_cast<double>(std::bit_cast<std::uint64_t>(bj) &
                                                                   0x7ff0000000000000ULL)
                                       : 0x1p-900;
        sc.dp_eps[x] = add_up(mul_up(dp_coef_, sc.dp_sigma[x]), dp_floor_);
      }
      // (2), (3); once more with Dot2 when the grid's c_e exceeds kGridDotMax.
      DD delta{0, 0};
      double u_up = 0, ap_up = 0, a_neg_up = 0, a_max = 0, c_e = 0, ep_up = 0;
      for (int attempt = 0; attempt < 2; ++attempt) {
        if (grid) {
          args.dp_sigma = sc.dp_sigma.data();
          args.dph = sc.dph.data();
          args.dpl = sc.dpl.data();
          args.a = sc.a.data();
          kr.dp(args);
        } else {
          for (std::size_t x = 0; x < nz; ++x) {
            double abs_sum = 0;
            const DD dp = dot2(dor, vb + rs.keys[x] * dv, dv, &abs_sum);
            sc.dph[x] = dp.hi;
            sc.dpl[x] = dp.lo;
            sc.a[x] = abs_sum;
          }
        }
        delta = {0, 0};
        double u_sum = 0, ap = 0, a_neg = 0, ep = 0, eps_max = 0;
        a_max = 0;
        const NonnegSumUp a_up(grid ? dvp + 3 : dv);
        for (std::size_t x = 0; x < nz; ++x) {
          const double a = a_up(sc.a[x]);
          sc.a[x] = a;
          if (rw.ph[x] == 0.0) {
            a_neg += a;
            a_max = std::max(a_max, a);
            continue;
          }
          const DD t = dd_mul({rw.ph[x], rw.pl[x]}, {sc.dph[x], sc.dpl[x]});
          delta = dd_add(delta, t);
          u_sum += std::fabs(t.hi);
          ap = std::fma(rw.ph[x], a, ap);
          if (grid) {
            ep = std::fma(rw.ph[x], sc.dp_eps[x], ep);
            eps_max = std::max(eps_max, sc.dp_eps[x]);
          }
        }
        u_up = mul_up(nonneg_sum_up(u_sum, n), 1.0 + 0x1p-50);
        ap_up = mul_up(nonneg_sum_up(ap, 2 * n), 1.0 + kU);
        a_neg_up = nonneg_sum_up(a_neg, n);
        const double a_i = add_up(mul_up(add_up(1.0, rho), ap_up), mul_up(pi0, a_neg_up));
        if (grid) {
          ep_up = mul_up(nonneg_sum_up(ep, 2 * n), 1.0 + kU);
          c_e = div_up(eps_max, a_i);
          if (!(c_e <= kGridDotMax) && attempt == 0) {
            grid = false;
            ++stats.dp_dot2_rows;
            continue;
          }
        } else {
          ep_up = mul_up(dot_coef_, ap_up);
          c_e = dot_coef_;
        }
        break;
      }
      const double one_rho = add_up(1.0, rho);
      double err_d = mul_up(mul_up(add_up(mul_up(3.1, static_cast<double>(n)), 10.0), kU2), u_up);
      err_d = add_up(err_d, mul_up(rho, u_up));
      err_d = add_up(err_d, mul_up(one_rho, ep_up));
      err_d = add_up(err_d, add_up(mul_up(pi0, a_neg_up), mul_up(static_cast<double>(n), 0x1p-1060)));
      const double neg_part = mul_up(pi0, a_neg_up);
      const double a_i = add_up(mul_up(one_rho, ap_up), neg_part);
      const double kappa_d = a_i > 0 ? div_up(err_d, a_i) : 0.0;
      const double c_k = add_up(c_e, kappa_d);
      const double tau = mul_up(mul_up(1.0 + 0x1p-50, 1.0 + kU),
                                add_up(mul_up(9.2 * kU2, add_up(1.0, c_k)), add_up(c_k, rho)));
      const double lambda = mul_up(add_up(1.0, c_k), 1.0 + 0x1p-49);
      const double nu = mul_up(mul_up(pi0, add_up(a_max, a_i)), 1.0 + 0x1p-50);
      const double kappa_mag = add_up(add_up(mul_up(3.0, rho), mul_up(3.0, gamma_up(dvp + 3, kU))),
                                      add_up(mul_up(2.0, gamma_up(2 * n, kU)), 10 * kU));
      if (!(kappa_mag <= 0x1p-34) || !(neg_part <= mul_down(0x1p-40, a_i) || a_neg_up == 0) ||
          !std::isfinite(tau) || !(c_k <= 0x1p-34)) {
        failed = true;
        break;
      }
      const bool charged = tau > kCleanTau;
      if (charged) ++stats.charged_rows;
      if (!charged) {
        tau_max = std::max(tau_max, tau);
        rho_max = std::max(rho_max, rho);
      }
      lambda_max = std::max(lambda_max, lambda);
      nu_max = std::max(nu_max, nu);
      if (n_neg > 0) pi0_max = std::max(pi0_max, pi0);

      // (4) dS of the row.
      const DD minus_d{-delta.hi, -delta.lo};
      double m_row_min = kInf, ds_abs = 0;
      for (std::size_t x = 0; x < nz; ++x) {
        const std::int64_t j = rs.keys[x];
        if (rw.ph[x] == 0.0) {
          ++sc.k_neg[static_cast<std::size_t>(j)];
          rw.sh[x] = rw.sl[x] = rw.mh[x] = 0.0;
          if (want_ds) put(ref.d_s, static_cast<std::size_t>(row * tk + j), 0.0, nu, 0.0);
          continue;
        }
        const DD ds = dd_mul({rw.ph[x], rw.pl[x]}, dd_add({sc.dph[x], sc.dpl[x]}, minus_d));
        const double m = rw.ph[x] * (sc.a[x] + a_i);
        rw.sh[x] = ds.hi;
        rw.sl[x] = ds.lo;
        rw.mh[x] = m;
        ds_abs += std::fabs(ds.hi);
        m_row_min = std::min(m_row_min, m);
        mv_min = std::min(mv_min, rw.ph[x]);
        if (want_ds) {
          const double bound = add_up(mul_up(tau, m), 0x1p-1060);
          put(ref.d_s, static_cast<std::size_t>(row * tk + j), ds.hi, bound, mul_down(m, 1.0 - kMagSlack));
        }
      }
      mk_min = std::min(mk_min, m_row_min);
      args.ds_hi = rw.sh.data();
      args.ds_lo = rw.sl.data();
      args.m = rw.mh.data();
      args.p_hi = rw.ph.data();
      args.p_lo = rw.pl.data();
      args.tau = tau;
      args.rho = rho;
      args.charged = charged;

      // (5) dQ of the row: on the grid, or by the cascade when a grid column is too coarse.
      const double s_up = nonneg_sum_up(ds_abs, n);
      bool q_grid = n <= (std::int64_t{1} << 30);
      for (std::int64_t d = 0; d < dkp && q_grid; ++d) {
        const double x = mul_up(mul_up(2.0, s_up), d < dk ? k_max[static_cast<std::size_t>(d)] : 0.0);
        if (!(x <= 0x1p999)) q_grid = false;
        const double floor2 = std::bit_cast<double>(std::bit_cast<std::uint64_t>(x) & 0x7ff0000000000000ULL);
        sc.q_sigma[static_cast<std::size_t>(d)] = std::max(2 * floor2, 0x1p-900);
      }
      const FastCore::GridError ge = FastCore::grid_error(n);
      if (q_grid) {
        kr.dq_grid(args);
        for (std::int64_t d = 0; d < dk && q_grid; ++d) {
          const auto du = static_cast<std::size_t>(d);
          if (k_max[du] != 0 && !(ge.at(sc.q_sigma[du]) <= grid_allowed * sc.q_mag[du])) q_grid = false;
        }
        if (!q_grid) ++stats.dq_cascade_rows;
      }
      if (!q_grid) kr.dq_cascade(args);
      const double e_acc = e_acc_up(n);
      const double coef = q_grid ? tau : add_up(tau, mul_up(lambda, e_acc));
      const double tiny = mul_up(static_cast<double>(n), 0x1p-1071);
      const NonnegSumUp q_mag_up(2 * n);
      for (std::int64_t d = 0; d < dk; ++d) {
        const auto du = static_cast<std::size_t>(d);
        if (k_max[du] == 0 || exact_zero(sc.q_mag[du], n_neg, m_row_min, k_min[du])) {  // (6): exactly 0
          put(ref.d_q, dq_at + du, 0, 0, 0);
          continue;
        }
        const double mag = q_mag_up(sc.q_mag[du]);
        double bound = add_up(mul_up(coef, mag), tiny);
        if (q_grid) bound = add_up(bound, ge.at(sc.q_sigma[du]));
        bound = add_up(bound, mul_up(add_up(mul_up(static_cast<double>(n_neg), nu), mul_up(static_cast<double>(n),
                                                                                             0x1p-1060)),
                                     k_max[du]));
        const double sl = scale * sc.q_lo[du];
        const double out = std::fma(scale, sc.q_hi[du], sl);
        bound = add_up(mul_up(abs_s, bound), add_up(mul_up(0x1p-52, std::fabs(sl)), 0x1p-1074));
        const double magnitude = mul_down(mul_down(abs_s, sc.q_mag[du]), 1.0 - kMagSlack);
        put(ref.d_q, dq_at + du, out, bound, magnitude);
        if (!meets(bound, magnitude, allowed_rel)) pending.push_back({GradKind::d_q, b, h, i, d});
      }
      if (want_ds) {
        for (std::size_t x = 0; x < nz; ++x) {
          const auto at = static_cast<std::size_t>(row * tk + rs.keys[x]);
          if (!meets(ref.d_s.bound.values[at], ref.d_s.magnitude.values[at], allowed_rel))
            pending.push_back({GradKind::d_s, b, h, i, rs.keys[x]});
        }
      }
      // (5) the row's terms of dK and dV, with those of the rows beside it.
      group_args[filled++] = args;
      if (filled == group_rows) scatter();
    }
  }
  if (!failed) scatter();
  if (failed) {
    escalate_block();
    return;
  }

  // (5) dK and dV of the block.
  kr.renormalise(sc.k_hi.data(), sc.k_lo.data(), tk * dkp);
  kr.renormalise(sc.v_hi.data(), sc.v_lo.data(), tk * dvp);
  for (std::int64_t j = 0; j < tk; ++j) {
    const auto ju = static_cast<std::size_t>(j);
    const std::size_t kat = ju * static_cast<std::size_t>(dkp), vat = ju * static_cast<std::size_t>(dvp);
    const std::int64_t rows = sc.k_rows[ju], neg = sc.k_neg[ju];
    if (rows == 0 && neg == 0) {  // masked from every query: no terms, exactly 0
      for (std::int64_t d = 0; d < dk; ++d) put(ref.d_k, static_cast<std::size_t>(ref.d_k.out.offset(b, g, j, d)), 0, 0, 0);
      for (std::int64_t d = 0; d < dv; ++d) put(ref.d_v, static_cast<std::size_t>(ref.d_v.out.offset(b, g, j, d)), 0, 0, 0);
      continue;
    }
    const double e_acc = e_acc_up(rows), tiny = mul_up(static_cast<double>(rows), 0x1p-1071);
    if (!(gamma_up(2 * rows, kU) <= 0x1p-34)) {
      for (std::int64_t d = 0; d < dk; ++d) pending.push_back({GradKind::d_k, b, g, j, d});
      for (std::int64_t d = 0; d < dv; ++d) pending.push_back({GradKind::d_v, b, g, j, d});
      continue;
    }
    const NonnegSumUp mag_up(2 * rows), err_up(2 * rows + 2);
    const double k_coef = add_up(tau_max, mul_up(lambda_max, e_acc));
    const double k_abs = add_up(mul_up(static_cast<double>(neg), nu_max), mul_up(static_cast<double>(rows), 0x1p-1060));
    for (std::int64_t d = 0; d < dk; ++d) {
      const auto du = static_cast<std::size_t>(d);
      const std::size_t at = static_cast<std::size_t>(ref.d_k.out.offset(b, g, j, d));
      if (q_max[du] == 0 || exact_zero(sc.k_mag[kat + du], neg, mk_min, q_min[du])) {  // (6): exactly 0
        put(ref.d_k, at, 0, 0, 0);
        continue;
      }
      const double mag = mag_up(sc.k_mag[kat + du]);
      double bound = add_up(add_up(mul_up(k_coef, mag), mul_up(k_abs, q_max[du])), tiny);
      bound = add_up(bound, err_up(sc.k_err[kat + du]));
      const double sl = scale * sc.k_lo[kat + du];
      const double out = std::fma(scale, sc.k_hi[kat + du], sl);
      bound = add_up(mul_up(abs_s, bound), add_up(mul_up(0x1p-52, std::fabs(sl)), 0x1p-1074));
      const double magnitude = mul_down(mul_down(abs_s, sc.k_mag[kat + du]), 1.0 - kMagSlack);
      put(ref.d_k, at, out, bound, magnitude);
      if (!meets(bound, magnitude, allowed_rel)) pending.push_back({GradKind::d_k, b, g, j, d});
    }
    const double v_coef = mul_up(add_up(rho_max, e_acc), 1.0 + kU);
    const double v_abs = mul_up(static_cast<double>(neg), pi0_max);
    for (std::int64_t d = 0; d < dv; ++d) {
      const auto du = static_cast<std::size_t>(d);
      const std::size_t at = static_cast<std::size_t>(ref.d_v.out.offset(b, g, j, d));
      if (do_max[du] == 0 || exact_zero(sc.v_mag[vat + du], neg, mv_min, do_min[du])) {  // (6): exactly 0
        put(ref.d_v, at, 0, 0, 0);
        continue;
      }
      const double mag = mag_up(sc.v_mag[vat + du]);
      double bound = add_up(add_up(mul_up(v_coef, mag), mul_up(v_abs, do_max[du])), tiny);
      bound = add_up(bound, mul_up(err_up(sc.v_err[vat + du]), 1.0 + kU));
      const double magnitude = mul_down(sc.v_mag[vat + du], 1.0 - kMagSlack);
      put(ref.d_v, at, sc.v_hi[vat + du] + sc.v_lo[vat + du], bound, magnitude);
      if (!meets(bound, magnitude, allowed_rel)) pending.push_back({GradKind::d_v, b, g, j, d});
    }
  }
}

}  // namespace headroom::detail
