// headroom — the fast path's driver: layouts, the certified bound per element, escalation.
//
// From the kernel's raw quantities (fast_row.inc, notation there) to bounds.
// Per row, with n visible keys, u = 2^-53:
//
//  (a) Exponents. The kernel reports r_max ≥ every r_j, the uncertainty of
//      key j's exponent: score error E_z,j (|s|·score_err, the dot products'
//      bound on the row's grid σ ≥ 2‖q‖·max_j‖k_j‖, + the finishing roundings), the shift's rounding and the exp reduction's ρ_j.
//      r_max and lse_err are sums and products of a few dozen nonnegative
//      doubles computed in round-to-nearest: their relative rounding error is
//      below γ_64 < 2^-46, covered by inflating them by (1 + 2^-40); 2^-1000 is
//      added for every underflowed operation in them (far more than n·2^-1074).
//  (b) Weights. ŵ_j = e^{t'_j}(1 + δ_j), |δ_j| ≤ kExpRelErr, |t'_j − (z_j − m)|
//      ≤ r_j, so the exact weight w_j = ŵ_j(1 + φ_j) with |φ_j| ≤ φ̄ =
//      (e^r − 1 + δ)/(1 − δ) (bound_arith.h). Negligible keys (t < −650) have
//      ŵ_j = 0 and w_j < e^{-650+r} < 2^-937.
//  (c) Sums. Ŝ and each H_d + L_d are within e_acc = n(4B+8)u²(1 + 2^-38) of
//      the sums of their exact terms, relative to Σ|terms| (fast_row.inc); the
//      terms themselves use ŵ = w_hi + w_lo, |w_lo| ≤ u·w_hi, so Σ_j ŵ_j|v_jd|
//      ≤ (1 + u)G_d with G_d = Σ w_hi,j|v_jd| ≤ Ĝ_d(1 + 2^-49). Underflows in
//      the cascades cost at most 6 roundings of 2^-1075 per key: n·2^-1071.
//      |S − Ŝ| ≤ ε_S·Ŝ_low with ε_S = (φ̄ + e_acc)/(1 − e_acc) + (n_neg·2^-937 +
//      n·2^-1071)/Ŝ_low (Ŝ_low = SH − |SL| ≥ 1 − tiny: the maximal key has
//      weight e^0).
//  (d) Outputs, as mp_row.h step (6): with N_d the exact numerator,
//      |H + L − N_d| ≤ (e_acc + φ̄)(1 + u)G_d + ν_d, ν_d = n_neg·2^-937·max|v_neg,d|
//      + n·2^-1071, and |O_d| ≤ ((1 + φ̄)(1 + u)G_d + ν_d)/(Ŝ_low(1 − ε_S)), so
//        |(H+L)/Ŝ − O_d| ≤ c·Ĝ_d(1 + 2^-49)/Ŝ_low + 2ν_d/Ŝ_low,
//        c = (e_acc + φ̄)(1 + u) + ε_S(1 + φ̄)(1 + u)/(1 − ε_S),
//      and the quotient q1 + q2 adds e_div ≤ 16u²|out| (+ 2^-1060 if the
//      remainder underflowed): bound_d is their sum, every step rounded up.
//  (c'') Weighted sums on the grid σ_d (o.grid; fast_row.inc, weighted_sums_grid):
//      H + L is within grid_error_d (absolute) of Σ_j ŵ_j v_jd, so the term
//      e_acc(1 + u)G_d of (d) is replaced by grid_error_d: c loses its e_acc
//      and grid_error_d/Ŝ_low is added to bound_d. A row whose grid share
//      would exceed 2^(target−2) of its scale is run again with the cascaded
//      sums of (c) first (grid_too_coarse: a choice, the bound is sound either way).
//  (e) Magnitude M_d = Σ p_j|v_jd| ≥ Ĝ_d(1 − 2^-49)(1 − u)(1 − φ̄)/(Ŝ_up(1 + ε_S)),
//      and RN(Ĝ_d/SH) is within 2^-49 of it. Element certified when
//      bound_d ≤ 2^target·(that lower end).
//  (f) lse: |lse_ref − (m + log Ŝ)| ≤ lse_err (kernel) and |log S − log Ŝ| ≤
//      ε_S/(1 − ε_S); certified when their sum is ≤ 2^target.
// Whatever misses its target is recomputed on the multiprecision path (the
// elements and the lse separately); a row the kernel could not finish (a
// non-finite value, a reduction out of range) is recomputed whole.
//
// Wide inputs (block level, WideCoreInputs): the values held are double-doubles
// q̃ = q + q_lo, k̃, ṽ, and the exact inputs lie within radii of them:
// ‖q − q̃‖₂ ≤ ρ_q, ‖k_j − k̃_j‖₂ ≤ ρ_k,j, |v_jd − ṽ_jd| ≤ ρ_v,d for every key.
//  (a') The score's dot product is formed on q̃, k̃ (fast_row.inc,
//      score_blocks, wide: the same score_err covers it), and the exact inputs move it by at most
//      ρ_q‖k̃_j‖ + ‖q̃‖ρ_k,j + ρ_qρ_k,j (Cauchy–Schwarz), which the kernel adds
//      to E_z,j: the exponent uncertainty r_j — and so φ̄ and everything after
//      it — then covers exact scores, not the scores of q̃, k̃.
//  (c') The weighted sums also take ŵ·v_lo (fast_row.inc, weighted_sums,
//      wide): e_acc = n(6B+14)u²(1 + 2^-38), and Σ|ŵ_j||ṽ_jd| ≤ (1+u)²G_d, so
//      the factor (1+u) of (c)–(d) becomes (1 + 2^-51) ≥ (1+u)².
//  (d') So far the bound encloses Σ_j p_j ṽ_jd with the exact weights p_j;
//      the exact output Σ_j p_j v_jd differs from it by ≤ Σ_j p_j ρ_v,d = ρ_v,d
//      (Σ_j p_j = 1), added to bound_d.
//  The output o_ref = q1 + q2 is returned exactly as out + out_lo.
#include "fast_core.h"

#include <algorithm>
#include <cmath>
#include <limits>

#include "bound_arith.h"
#include "input_check.h"
#include "parallel.h"

namespace headroom::detail {
namespace {

constexpr double kU = 0x1p-53;
constexpr double kU2 = 0x1p-106;

}  // namespace

FastCore::FastCore(const CoreProblem& p, const CoreInputs& in, const ReferenceOptions& opt, unsigned workers,
                   const FastKernels* kernels, const WideCoreInputs* wide)
    : p_(p), in_(in), opt_(opt), kernels_(kernels != nullptr ? kernels : &fast_kernels()), wide_(wide) {
  const CoreShape& s = p.shape;
  blocks_ = (s.kv_len + kLanes - 1) / kLanes;
  dv_pad_ = (s.value_dim + kLanes - 1) / kLanes * kLanes;
  // fast_row.inc, score_blocks: |hi + lo − q̃·k̃_j| ≤ (γ_{Dk+1}·(Dk+2)·u + (Dk+3)·u²)·σ
  // + 3·Dk·2^-1075, narrow or wide.
  const auto dk = static_cast<double>(s.key_dim);
  score_coef_ = add_up(mul_up(mul_up(gamma_up(s.key_dim + 1, kU), kU), dk + 2), mul_up(dk + 3, kU2));
  score_floor_ = mul_up(3 * dk, 0x1p-1074);  // ≥ 3·Dk·2^-1075
  const std::int64_t heads = s.batch * s.kv_heads;
  kt_.assign(static_cast<std::size_t>(heads * blocks_ * s.key_dim * kLanes), 0.0);
  // V rows already a whole number of lanes long are read where they lie (the
  // layout [B, Hkv, Tk, Dv] is the padded one): no copy of V is held.
  const bool v_in_place = dv_pad_ == s.value_dim;
  if (!v_in_place) vp_.assign(static_cast<std::size_t>(heads * s.kv_len * dv_pad_), 0.0);
  vp_at_ = v_in_place ? in.v.values.data() : vp_.data();
  if (wide_ != nullptr) {
    kt_lo_.assign(kt_.size(), 0.0);
    if (!v_in_place) vp_lo_.assign(vp_.size(), 0.0);
    vp_lo_at_ = v_in_place ? wide_->v_lo.values.data() : vp_lo_.data();
  }
  k_norm_.assign(static_cast<std::size_t>(heads * s.kv_len), 0.0);
  v_max_.assign(static_cast<std::size_t>(heads * dv_pad_), 0.0);
  // fast_row.inc, weighted_sums_grid: n(4 roundings)·2^-1075 ≤ n·2^-1073 absolute, and
  // (n+1)u²(1+u) + (γ_B + 3u)(n+1)u(1+u)²(1 + 2^-40) per σ_d (n: the row's keys).
  parallel_for(heads, workers, [&](std::int64_t bg, unsigned) {
    const std::int64_t b = bg / s.kv_heads, g = bg % s.kv_heads;
    double* kt = &kt_[static_cast<std::size_t>(bg * blocks_ * s.key_dim * kLanes)];
    for (std::int64_t j = 0; j < s.kv_len; ++j) {
      const double* k = &in.k.values[static_cast<std::size_t>(in.k.offset(b, g, j, 0))];
      for (std::int64_t c = 0; c < s.key_dim; ++c)
        kt[((j / kLanes) * s.key_dim + c) * kLanes + j % kLanes] = k[c];
      k_norm_[static_cast<std::size_t>(bg * s.kv_len + j)] = norm_up(k, s.key_dim);
      const double* v = &in.v.values[static_cast<std::size_t>(in.v.offset(b, g, j, 0))];
      if (!v_in_place) std::copy(v, v + s.value_dim, &vp_[static_cast<std::size_t>((bg * s.kv_len + j) * dv_pad_)]);
      double* v_max = &v_max_[static_cast<std::size_t>(bg * dv_pad_)];
      for (std::int64_t d = 0; d < s.value_dim; ++d) v_max[d] = std::max(v_max[d], std::fabs(v[d]));
      if (wide_ != nullptr) {
        const std::size_t at = static_cast<std::size_t>(bg * blocks_ * s.key_dim * kLanes);
        const double* kl = &wide_->k_lo.values[static_cast<std::size_t>(in.k.offset(b, g, j, 0))];
        for (std::int64_t c = 0; c < s.key_dim; ++c)
          kt_lo_[at + static_cast<std::size_t>(((j / kLanes) * s.key_dim + c) * kLanes + j % kLanes)] = kl[c];
        const double* vl = &wide_->v_lo.values[static_cast<std::size_t>(in.v.offset(b, g, j, 0))];
        if (!v_in_place)
          std::copy(vl, vl + s.value_dim, &vp_lo_[static_cast<std::size_t>(bg * s.kv_len * dv_pad_ + j * dv_pad_)]);
      }
    }
  });
}

std::int64_t FastCore::groups() const {
  const CoreShape& s = p_.shape;
  return s.batch * s.q_heads * ((s.q_len + kMaxGroup - 1) / kMaxGroup);
}

void FastCore::prepare_row(std::int64_t row, RowScratch& rs, FastRowArgs& a, FastRowOut& o) const {
  const CoreShape& s = p_.shape;
  const std::int64_t i = row % s.q_len, h = (row / s.q_len) % s.q_heads, b = row / (s.q_len * s.q_heads);
  const std::int64_t g = kv_head_of(s, h), dv = s.value_dim, bg = b * s.kv_heads + g;
  const auto n = static_cast<std::int64_t>(rs.keys.size());
  const auto tk_pad = static_cast<std::size_t>(blocks_ * kLanes);
  rs.raw_hi.resize(tk_pad);
  rs.raw_lo.resize(tk_pad);
  const auto n_pad = static_cast<std::size_t>((n + kLanes - 1) / kLanes * kLanes);
  rs.w_hi.resize(n_pad);
  rs.w_lo.resize(n_pad);
  rs.acc.resize(static_cast<std::size_t>(6 * dv_pad_));
  rs.out.resize(static_cast<std::size_t>(dv));
  rs.out_lo.resize(static_cast<std::size_t>(dv));
  rs.g.resize(static_cast<std::size_t>(dv));
  rs.neg_vmax.resize(static_cast<std::size_t>(dv));
  rs.want.assign(static_cast<std::size_t>(dv), 0);
  a.q = &in_.q.values[static_cast<std::size_t>(in_.q.offset(b, h, i, 0))];
  a.kt = &kt_[static_cast<std::size_t>(bg * blocks_ * s.key_dim * kLanes)];
  a.vp = vp_at_ + bg * s.kv_len * dv_pad_;
  a.k_norm = &k_norm_[static_cast<std::size_t>(bg * s.kv_len)];
  a.keys = rs.keys.data();
  a.bias = rs.bias.empty() ? nullptr : rs.bias.data();
  a.n = n;
  a.dk = s.key_dim;
  a.dv = dv;
  a.dv_pad = dv_pad_;
  a.scale = p_.scale;
  a.q_norm = norm_up(a.q, s.key_dim);
  // σ: the power of two 2^(e+2) ≥ 2·‖q‖·max_j ‖k_j‖ over the visible keys
  // (A = 2^e·m, 1 ≤ m < 2), at least 2^-900; fast_row.inc, score_blocks.
  double k_max = 0;
  for (const std::int64_t j : rs.keys) k_max = std::max(k_max, a.k_norm[j]);
  const double bound = mul_up(a.q_norm, k_max);
  a.sigma = bound > 0x1p-902 ? std::ldexp(1.0, std::ilogb(bound) + 2) : 0x1p-900;
  if (!std::isfinite(bound)) a.sigma = kInf;
  a.score_err = add_up(mul_up(score_coef_, a.sigma), score_floor_);
  if (wide_ != nullptr) {
    a.q_lo = &wide_->q_lo.values[static_cast<std::size_t>(in_.q.offset(b, h, i, 0))];
    a.kt_lo = &kt_lo_[static_cast<std::size_t>(bg * blocks_ * s.key_dim * kLanes)];
    a.vp_lo = vp_lo_at_ + bg * s.kv_len * dv_pad_;
    a.q_rad = wide_->q_rad[static_cast<std::size_t>(row)];
    a.k_rad = &wide_->k_rad[static_cast<std::size_t>(bg * s.kv_len)];
  }
  a.v_max = &v_max_[static_cast<std::size_t>(bg * dv_pad_)];
  a.tables = &fast_tables();
  a.raw_hi = rs.raw_hi.data();
  a.raw_lo = rs.raw_lo.data();
  a.w_hi = rs.w_hi.data();
  a.w_lo = rs.w_lo.data();
  a.acc = rs.acc.data();
  o = FastRowOut{};
  o.out = rs.out.data();
  if (wide_ != nullptr) o.out_lo = rs.out_lo.data();
  o.g = rs.g.data();
  o.neg_vmax = rs.neg_vmax.data();
}

bool FastCore::run_group(std::int64_t group, CoreReference& ref, Scratch& sc, RowRecompute& mp,
                         ReferenceStats& stats) const {
  const CoreShape& s = p_.shape;
  const std::int64_t per_head = (s.q_len + kMaxGroup - 1) / kMaxGroup;
  const std::int64_t head = group / per_head, i0 = (group % per_head) * kMaxGroup;
  const int count = static_cast<int>(std::min<std::int64_t>(kMaxGroup, s.q_len - i0));
  const std::int64_t b = head / s.q_heads, h = head % s.q_heads;
  bool ok = true;
  // Rows that see the same keys as the first live row of a batch go together.
  int row_of[kMaxGroup];
  int batch = 0;
  FastRowArgs args[kMaxGroup];
  FastRowOut outs[kMaxGroup];
  auto flush = [&] {
    if (batch == 0) return;
    kernels_->group(args, outs, batch);
    for (int r = 0; r < batch; ++r) {
      const std::int64_t row = head * s.q_len + i0 + row_of[r];
      if (grid_too_coarse(sc.row[row_of[r]], outs[r], args[r].dv_pad)) {  // again, double-double sums
        args[r].no_grid = true;
        kernels_->group(&args[r], &outs[r], 1);
      }
      ok = finish_row(row, sc.row[row_of[r]], outs[r], ref, mp, stats) && ok;
    }
    batch = 0;
  };
  for (int r = 0; r < count; ++r) {
    RowScratch& rs = sc.row[r];
    const std::int64_t row = head * s.q_len + i0 + r;
    visible_keys(s, p_.mask, b, h, i0 + r, rs.keys, rs.bias);
    if (rs.keys.empty()) {
      write_fully_masked(row, ref);
      continue;
    }
    if (row_left_out(opt_, row)) {
      write_unsampled(row, ref);
      continue;
    }
    if (batch > 0 && rs.keys != sc.row[row_of[0]].keys) flush();
    row_of[batch] = r;
    prepare_row(row, rs, args[batch], outs[batch]);
    ++batch;
  }
  flush();
  return ok;
}

FastCore::GridError FastCore::grid_error(std::int64_t n) {
  const auto n1 = static_cast<double>(n + 1);
  GridError e;
  e.coef = add_up(mul_up(mul_up(n1, kU2), 1.0 + 0x1p-52),
                  mul_up(mul_up(add_up(gamma_up(kRenormEvery, kU), 3 * kU), mul_up(n1, kU)), 1.0 + 0x1p-39));
  e.floor = mul_up(static_cast<double>(n), 0x1p-1073);
  return e;
}

double FastCore::GridError::at(double sigma) const { return add_up(mul_up(coef, sigma), floor); }

bool FastCore::grid_too_coarse(const RowScratch& rs, const FastRowOut& o, std::int64_t dv_pad) const {
  if (!o.ok || !o.grid) return false;
  // A choice of method, not a claim: the grid's share of an element's bound
  // against 2^(target − 2) of its magnitude's scale Ĝ_d/Ŝ (the bound divides
  // both by Ŝ); the bound itself is derived in finish_row either way.
  const double allowed = std::ldexp(1.0, opt_.target_log2 - 2);
  const GridError ge = grid_error(static_cast<std::int64_t>(rs.keys.size()));
  for (std::int64_t d = 0; d < p_.shape.value_dim; ++d)
    if (!(ge.at(rs.acc[static_cast<std::size_t>(5 * dv_pad + d)]) <= allowed * rs.g[static_cast<std::size_t>(d)]))
      return true;
  return false;
}

void FastCore::run_row_weights(std::int64_t row, RowScratch& rs, FastRowOut& o) const {
  FastRowArgs a;
  prepare_row(row, rs, a, o);
  a.weights_only = true;
  kernels_->group(&a, &o, 1);
}

bool FastCore::weight_bounds(const FastRowOut& o, std::int64_t n, bool wide, WeightBounds& wb) {
  const double r = add_up(mul_up(o.r_max, 1.0 + 0x1p-40), 0x1p-1000);
  wb.phi = weight_uncertainty_up(r, kFastExpRelErr);
  if (!std::isfinite(wb.phi)) return false;
  wb.e_acc = mul_up(mul_up(static_cast<double>(n), static_cast<double>(wide ? 6 * kRenormEvery + 14
                                                                              : 4 * kRenormEvery + 8)),
                    mul_up(kU2, 1.0 + 0x1p-38));
  wb.s_low = sub_down(o.s_hi, std::fabs(o.s_lo));
  wb.s_up = add_up(o.s_hi, std::fabs(o.s_lo));
  const double tiny_sum = mul_up(static_cast<double>(n), 0x1p-1071);
  wb.neg = mul_up(static_cast<double>(o.negligible), 0x1p-937);
  wb.eps_s = add_up(div_up(add_up(wb.phi, wb.e_acc), sub_down(1.0, wb.e_acc)),
                    div_up(add_up(wb.neg, tiny_sum), wb.s_low));
  return wb.eps_s < 0.5;
}

bool FastCore::finish_row(std::int64_t row, RowScratch& sc, const FastRowOut& o, CoreReference& ref, RowRecompute& mp,
                          ReferenceStats& stats) const {
  const CoreShape& s = p_.shape;
  const std::int64_t dv = s.value_dim;
  const auto n = static_cast<std::int64_t>(sc.keys.size());
  ++stats.rows;

  auto escalate_all = [&] {
    ++stats.escalated_rows;
    stats.escalated_elements += dv;
    ++stats.escalated_lse;
    return mp.run(row, ref, nullptr, true);
  };
  if (!o.ok) return escalate_all();

  // (a)–(c)
  const bool wide = wide_ != nullptr;
  WeightBounds wb;
  if (!weight_bounds(o, n, wide, wb)) return escalate_all();
  const double phi = wb.phi, e_acc = wb.e_acc, s_low = wb.s_low, s_up = wb.s_up, eps_s = wb.eps_s;
  const double tiny_sum = mul_up(static_cast<double>(n), 0x1p-1071);
  const double neg = wb.neg;
  const double one_u = wide ? 1.0 + 0x1p-51 : 1.0 + kU;  // (c')
  const double c = add_up(mul_up(add_up(e_acc, phi), one_u),
                          div_up(mul_up(mul_up(eps_s, add_up(1.0, phi)), one_u), sub_down(1.0, eps_s)));
  const double cg = div_up(mul_up(c, 1.0 + 0x1p-49), s_low);
  // (c''): on the grid, e_acc·(1 + u)G_d gives way to the absolute grid_error.
  const double c_grid = add_up(mul_up(phi, one_u),
                               div_up(mul_up(mul_up(eps_s, add_up(1.0, phi)), one_u), sub_down(1.0, eps_s)));
  const double cg_grid = div_up(mul_up(c_grid, 1.0 + 0x1p-49), s_low);
  const GridError ge = grid_error(n);
  const double low = div_down(mul_down(mul_down(1.0 - 0x1p-49, 1.0 - kU), sub_down(1.0, phi)),
                              mul_up(s_up, add_up(1.0, eps_s)));
  const double allowed_rel = std::ldexp(1.0, opt_.target_log2);

  // (d), (e)
  const std::size_t base = static_cast<std::size_t>(row * dv);
  bool any = false;
  for (std::int64_t d = 0; d < dv; ++d) {
    const double out = sc.out[static_cast<std::size_t>(d)], gd = sc.g[static_cast<std::size_t>(d)];
    double nu = tiny_sum;
    if (o.negligible > 0) nu = add_up(nu, mul_up(neg, sc.neg_vmax[static_cast<std::size_t>(d)]));
    double bound = add_up(mul_up(o.grid ? cg_grid : cg, gd), div_up(mul_up(2.0, nu), s_low));
    if (o.grid) bound = add_up(bound, div_up(ge.at(sc.acc[static_cast<std::size_t>(5 * dv_pad_ + d)]), s_low));  // (c'')
    bound = add_up(bound, add_up(mul_up(16 * kU2 * (1 + 0x1p-40), std::fabs(out)), 0x1p-1060));
    if (wide) {  // (d')
      const std::int64_t g = kv_head_of(s, (row / s.q_len) % s.q_heads), b = row / (s.q_len * s.q_heads);
      bound = add_up(bound, wide_->v_rad[static_cast<std::size_t>((b * s.kv_heads + g) * dv + d)]);
      wide_->out_lo[base + static_cast<std::size_t>(d)] = sc.out_lo[static_cast<std::size_t>(d)];
    }
    ref.out.values[base + static_cast<std::size_t>(d)] = out;
    ref.bound.values[base + static_cast<std::size_t>(d)] = bound;
    ref.magnitude.values[base + static_cast<std::size_t>(d)] = gd / o.s_hi;
    if (!wide && !(bound <= mul_down(allowed_rel, mul_down(gd, low)))) {
      sc.want[static_cast<std::size_t>(d)] = 1;
      any = true;
      ++stats.escalated_elements;
    }
  }
  // (f)
  const double lse_bound = add_up(add_up(mul_up(o.lse_err, 1.0 + 0x1p-40), 0x1p-1000),
                                  div_up(eps_s, sub_down(1.0, eps_s)));
  ref.lse.values[static_cast<std::size_t>(row)] = o.lse;
  ref.lse_bound.values[static_cast<std::size_t>(row)] = lse_bound;
  const bool lse_miss = !wide && !(lse_bound <= allowed_rel);
  if (lse_miss) ++stats.escalated_lse;
  if (!any && !lse_miss) return true;
  ++stats.escalated_rows;
  return mp.run(row, ref, sc.want.data(), lse_miss);
}

}  // namespace headroom::detail
