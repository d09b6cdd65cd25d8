// headroom — fast_block: the certified block on the double-double fast path.
//
// u = 2^-53, B = kRenormEvery. Every batch at once, in three stages:
//
//  (1) Projections Q = X_q W_q + b_q (likewise K, V) by the fast kernel's
//      weighted sums (fast_row.inc, weighted_group_kernel): the weights are
//      the row X_t, 1 (for the bias), the values the rows of W, then b. The
//      products are error-free and accumulated in double-double, so with
//      n = Dm + 1 terms and A_tc = Σ_m |X_tm||W_mc| + |b_c|,
//        |Q̃_tc − Q_tc| ≤ γ_P·A_tc,  γ_P = n(4B+8)u²(1 + 2^-38)
//      (weighted_sums' bound, the exact terms being X_tm·W_mc; underflows
//      cost ≤ n·2^-1071, covered by the floor 2^-950 added to A). Q̃ = hi + lo
//      exactly (two_sum of H and L, so |lo| ≤ u|hi|), and
//      A_up = Ĝ(1 + 2^-49) + 2^-950 ≥ A (Ĝ is within 2^-49.5 of A).
//      When X and W are float32-valued the products are exact and the sums
//      run on two grids (fast_row.inc, weighted_sums_exact_grid; triple-double
//      where a grid would overflow: weighted_sums_exact): each element then
//      carries its own radius, about 2^-106|Q| + 8n³u³σ (project below), so
//      the projections' uncertainty no longer scales with Σ|X||W|.
//  (2) Core attention per head on Q̃, K̃, Ṽ with radii (fast_core.cpp, wide):
//      ρ_q = ‖rad_q,row‖₂ ≥ ‖δq‖₂, ρ_k,j likewise, ρ_v,d = max_j rad_v,jd
//      (rad = γ_P·A_up on the double-double sums).
//      Each head output O_c comes back as a double-double Õ_c = hi + lo with
//      a certified B_c ≥ |Õ_c − O_c|. A row the kernel cannot finish is
//      recomputed by BlockRows in MPFR on the same double-double inputs
//      (mp_row.h with γ' = γ + 2^-127, γ the largest of the projections'
//      rad/A_up ratios: the inputs converted to p ≥ 128
//      bits err by ≤ 2^-128|Q̃| more; the result is taken back as a
//      double-double within 2^-105|hi| + 2^-1074 more, added to B_c).
//  (3) Y_tm = Σ_c O_c·W_o,cm + b_o,m by the weighted sums again, weights
//      Õ_c = hi + lo (normalised) and 1: with C = Hq·Dv, n = C + 1 terms,
//      G = Σ_c |hi_c||W_o,cm| + |b_o,m| ≤ Ĝ(1 + 2^-49), the exact terms
//      Õ_c·W_o,cm summing in absolute value to ≤ (1+u)G,
//        |Ŷ − Y| ≤ P + n(4B+8)u²(1 + 2^-38)(1+u)(1 + 2^-49)·Ĝ + n·2^-1071,
//      P = Σ_c B_c|W_o,cm| the propagated head errors — first bounded by
//      ‖B_t‖₂‖W_o[:, m]‖₂ (Cauchy–Schwarz), summed exactly where that misses.
//      The sums run on power-of-two grids σ_m ≥ 2(‖Õ_t‖₂‖W_o[:, m]‖₂ + |b_o,m|)
//      (OutputStage::set_grid; fast_row.inc, weighted_sums_grid): the middle
//      term is then FastCore::grid_error(n)·σ_m (two fma and a few additions
//      per term instead of a two_sum cascade); a row that misses on its grid
//      is formed again with the double-double sums before it escalates.
//      The magnitude Σ_c |O_c||W_o,cm| + |b_o,m| (reference.h) is reported as
//      Ĝ; it is at least Ĝ(1 − 2^-49)(1 − u) − P (|O_c| ≥ |hi_c|(1 − u) − B_c),
//      and the element is certified when its bound is within 2^target of that.
// Escalation: a row of Y with an element that misses has its head rows
// recomputed in MPFR to a target lowered by the shortfall (plus 4 bits), and
// is formed again; if it still misses (the projections' γ_P then dominates:
// huge activations, values that cancel), the batch is redone whole on the
// multiprecision path by the caller, projections included.
#include "fast_block.h"

#include <algorithm>
#include <bit>
#include <cmath>
#include <limits>
#include <memory>
#include <vector>

#include "block_rows.h"
#include "bound_arith.h"
#include "fast_core.h"
#include "fast_row.h"
#include "input_check.h"
#include "mp_arith.h"
#include "mp_core.h"
#include "mp_row.h"
#include "parallel.h"

namespace headroom::detail {
namespace {

constexpr double kU = 0x1p-53;
constexpr double kU2 = 0x1p-106;
constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();
constexpr double kAbsFloor = 0x1p-950;

// Returns: an upper bound of n(4B+8)u²(1 + 2^-38), the weighted sums' relative error for n terms.
double weighted_error(std::int64_t n) {
  return mul_up(mul_up(static_cast<double>(n), static_cast<double>(4 * kRenormEvery + 8)), mul_up(kU2, 1.0 + 0x1p-38));
}

// A matrix W [n − 1, cols] and a bias row (zeros when absent) as the kernel's values.
struct Operand {
  std::vector<double> vp;  // [n, pad]
  std::vector<std::int64_t> keys;
  std::int64_t n = 0, cols = 0, pad = 0;
};

Operand operand(const Tensor& w, const Tensor& bias) {
  Operand m;
  m.cols = w.shape[1];
  m.n = w.shape[0] + 1;
  m.pad = (m.cols + kLanes - 1) / kLanes * kLanes;
  m.vp.assign(static_cast<std::size_t>(m.n * m.pad), 0.0);
  for (std::int64_t r = 0; r < m.n; ++r)
    for (std::int64_t c = 0; c < m.cols; ++c) {
      const bool last = r == m.n - 1;
      if (last && bias.values.empty()) continue;
      m.vp[static_cast<std::size_t>(r * m.pad + c)] =
          last ? bias.values[static_cast<std::size_t>(c)] : w.values[static_cast<std::size_t>(r * m.cols + c)];
    }
  m.keys.resize(static_cast<std::size_t>(m.n));
  for (std::int64_t r = 0; r < m.n; ++r) m.keys[static_cast<std::size_t>(r)] = r;
  return m;
}

// Scratch for kMaxGroup rows of weighted sums.
struct SumScratch {
  std::vector<double> w_hi[kMaxGroup], w_lo[kMaxGroup], acc[kMaxGroup];
  FastRowArgs args[kMaxGroup];

  void bind(const Operand& m, int r) {
    const auto n_pad = static_cast<std::size_t>((m.n + kLanes - 1) / kLanes * kLanes);
    w_hi[r].assign(n_pad, 0.0);
    w_lo[r].assign(n_pad, 0.0);
    acc[r].resize(static_cast<std::size_t>(6 * m.pad));
    FastRowArgs& a = args[r];
    a = FastRowArgs{};
    a.vp = m.vp.data();
    a.keys = m.keys.data();
    a.n = m.n;
    a.dv = m.cols;
    a.dv_pad = m.pad;
    a.w_hi = w_hi[r].data();
    a.w_lo = w_lo[r].data();
    a.acc = acc[r].data();
  }
  double h(int r, std::int64_t c) const { return acc[r][static_cast<std::size_t>(c)]; }
  double l(int r, std::int64_t c, std::int64_t pad) const { return acc[r][static_cast<std::size_t>(pad + c)]; }
  double l3(int r, std::int64_t c, std::int64_t pad) const { return acc[r][static_cast<std::size_t>(4 * pad + c)]; }
  double g(int r, std::int64_t c, std::int64_t pad) const {
    return acc[r][static_cast<std::size_t>(2 * pad + c)] + acc[r][static_cast<std::size_t>(3 * pad + c)];
  }
};

inline void two_sum(double a, double b, double& s, double& e) {
  s = a + b;
  const double bb = s - a;
  e = (a - (s - bb)) + (b - bb);
}

bool float32_valued(const Tensor& t) {
  for (double x : t.values)
    if (static_cast<double>(static_cast<float>(x)) != x) return false;
  return true;
}

// (1) X·W + b for every row of x ([B, T, Dm]) as double-doubles, bounds
// A_up ≥ |exact| and radii ≥ |hi + lo − exact|, with rad ≤ gamma·A_up.
struct Projection {
  std::vector<double> hi, lo, a, rad;  // [B·T, cols]
  std::int64_t cols = 0;
  double gamma = 0;
};

Projection project(const FastKernels& kr, const Tensor& x, const Tensor& w, const Tensor& bias, unsigned workers) {
  const Operand m = operand(w, bias);
  const std::int64_t rows = x.shape[0] * x.shape[1], dm = x.shape[2];
  Projection out;
  out.cols = m.cols;
  out.hi.resize(static_cast<std::size_t>(rows * m.cols));
  out.lo.resize(out.hi.size());
  out.a.resize(out.hi.size());
  out.rad.resize(out.hi.size());
  // Float32-valued X and W: products exact (≤ 48 significant bits, ≥ 2^-298),
  // the bias row's 1·b too, so the triple-double sums apply (fast_row.inc,
  // weighted_sums_exact): |H + L + L3 − Q| ≤ n³u³(1 + 2^-40)·A. Taken to a
  // double-double: (a, b) = two_sum(H, L), c = RN(b + L3) (errs ≤ u|c|),
  // (hi, lo) = two_sum(a, c), so rad = n³u³(1 + 2^-40)A + u|c| + n·2^-1074;
  // as |c| ≤ u(1 + n²u + 2^-40)A (|b| ≤ u|a|, |L3| ≤ n²u²(1+…)A), rad ≤ γ·A_up
  // with γ = n³u³(1 + 2^-40) + u²(1 + 2^-12) for n ≤ 2^20 (A_up ≥ 2^-950 covers
  // the underflow slack). Otherwise the double-double sums: rad = γ_P·A_up.
  const bool exact = float32_valued(x) && float32_valued(w) && m.n <= (1 << 20);
  const double nd = static_cast<double>(m.n);
  const double cube = mul_up(mul_up(mul_up(nd, nd), mul_up(nd, 0x1p-159)), 1.0 + 0x1p-40);
  out.gamma = exact ? add_up(cube, mul_up(kU2, 1.0 + 0x1p-12)) : weighted_error(m.n);
  // Exact products on grids (fast_row.inc, weighted_sums_exact_grid): per row t
  // and column c, σ_tc = 2·2^⌊log2 x⌋ > x = 2(‖X_t‖·‖W_c‖ + |b_c|)(1 + 2^-50) ≥
  // 2·Σ_m |X_tm W_mc| + 2|b_c| (Cauchy–Schwarz; the factor covers x's three
  // roundings), at least 2^-900; a row with x > 2^999 somewhere keeps the
  // triple-double sums. Then H + H2 + L2 is within γ_{n−1}·n·u·σ2 + n·2^-1075
  // of Q_tc; taken to a double-double as above ((a, b) = two_sum(H, H2),
  // c = RN(b + L2), two_sum(a, c)): rad = that + u|c|. γ is then the largest
  // rad/A_up of the projection, computed (rounded up) beside it.
  std::vector<double> w_norm(static_cast<std::size_t>(m.pad), 0.0);
  if (exact)
    for (std::int64_t c = 0; c < m.cols; ++c) w_norm[static_cast<std::size_t>(c)] = norm_up(&w.values[static_cast<std::size_t>(c)], dm, m.cols);
  const double l2_coef = mul_up(mul_up(gamma_up(m.n - 1, kU), nd), kU);
  const double to2 = exact_grid_ratio(m.n);
  std::vector<double> gamma_of(workers, out.gamma);
  std::vector<SumScratch> scratch(workers);
  const std::int64_t groups = (rows + kMaxGroup - 1) / kMaxGroup;
  parallel_for(groups, workers, [&](std::int64_t grp, unsigned wk) {
    SumScratch& sc = scratch[wk];
    const int count = static_cast<int>(std::min<std::int64_t>(kMaxGroup, rows - grp * kMaxGroup));
    for (int r = 0; r < count; ++r) {
      sc.bind(m, r);
      sc.args[r].exact_sums = exact;
      const double* xr = &x.values[static_cast<std::size_t>((grp * kMaxGroup + r) * dm)];
      std::copy(xr, xr + dm, sc.w_hi[r].begin());
      sc.w_hi[r][static_cast<std::size_t>(dm)] = 1.0;
      if (exact) {
        const double xn = norm_up(xr, dm);
        double* sigma = sc.acc[r].data() + 5 * m.pad;
        bool grid = m.n <= (std::int64_t{1} << 30);
        for (std::int64_t c = 0; c < m.pad; ++c) {
          const double bc = c < m.cols && !bias.values.empty() ? std::fabs(bias.values[static_cast<std::size_t>(c)]) : 0.0;
          const double xc = 2 * (xn * w_norm[static_cast<std::size_t>(c)] + bc) * (1 + 0x1p-50);
          if (!(xc <= 0x1p999)) grid = false;
          const double floor2 = std::bit_cast<double>(std::bit_cast<std::uint64_t>(xc) & 0x7ff0000000000000ULL);
          sigma[c] = std::max(2 * floor2, 0x1p-900);
        }
        sc.args[r].exact_grid = grid;
      }
    }
    kr.weighted(sc.args, count);
    for (int r = 0; r < count; ++r)
      for (std::int64_t c = 0; c < m.cols; ++c) {
        const auto at = static_cast<std::size_t>((grp * kMaxGroup + r) * m.cols + c);
        out.a[at] = add_up(mul_up(sc.g(r, c, m.pad), 1.0 + 0x1p-49), kAbsFloor);
        if (exact && sc.args[r].exact_grid) {
          double a = 0, b = 0;
          two_sum(sc.h(r, c), sc.l3(r, c, m.pad), a, b);  // H, H2
          const double cc = b + sc.l(r, c, m.pad);          // + L2
          two_sum(a, cc, out.hi[at], out.lo[at]);
          const double sigma2 = sc.acc[r][static_cast<std::size_t>(5 * m.pad + c)] * to2;
          out.rad[at] = add_up(add_up(mul_up(l2_coef, sigma2), mul_up(kU, std::fabs(cc))), mul_up(nd, 0x1p-1074));
          gamma_of[wk] = std::max(gamma_of[wk], div_up(out.rad[at], out.a[at]));
        } else if (exact) {
          double a = 0, b = 0;
          two_sum(sc.h(r, c), sc.l(r, c, m.pad), a, b);
          const double cc = b + sc.l3(r, c, m.pad);
          two_sum(a, cc, out.hi[at], out.lo[at]);
          out.rad[at] = add_up(add_up(mul_up(cube, out.a[at]), mul_up(kU, std::fabs(cc))), mul_up(nd, 0x1p-1074));
        } else {
          two_sum(sc.h(r, c), sc.l(r, c, m.pad), out.hi[at], out.lo[at]);
          out.rad[at] = mul_up(out.gamma, out.a[at]);
        }
      }
  });
  for (const double g : gamma_of) out.gamma = std::max(out.gamma, g);
  return out;
}

// Copies a projection [B·T, H·D] into the core layout [B, H, T, D] (hi, lo, a).
void to_core(const Projection& pr, std::int64_t batch, std::int64_t len, std::int64_t heads, std::int64_t dim,
             Tensor& hi, Tensor& lo, std::vector<double>& a, std::vector<double>& rad) {
  hi = Tensor({batch, heads, len, dim});
  lo = Tensor(hi.shape);
  a.resize(hi.values.size());
  rad.resize(hi.values.size());
  for (std::int64_t b = 0; b < batch; ++b)
    for (std::int64_t h = 0; h < heads; ++h)
      for (std::int64_t t = 0; t < len; ++t)
        for (std::int64_t e = 0; e < dim; ++e) {
          const auto from = static_cast<std::size_t>((b * len + t) * pr.cols + h * dim + e);
          const auto to = static_cast<std::size_t>(hi.offset(b, h, t, e));
          hi.values[to] = pr.hi[from];
          lo.values[to] = pr.lo[from];
          a[to] = pr.a[from];
          rad[to] = pr.rad[from];
        }
}

struct Worker {
  std::unique_ptr<BlockRows> mp;
  FastCore::Scratch core;
  SumScratch sums;
  ReferenceStats stats;
};

// The output projection of one batch's rows of Y (stage (3)).
class OutputStage {
 public:
  OutputStage(const BlockProblem& p, const BlockInputs& in, const ReferenceOptions& opt, const FastKernels& kr,
              const CoreReference& cref, const std::vector<double>& out_lo, BlockReference& ref)
      : p_(p), opt_(opt), kr_(kr), cref_(cref), out_lo_(out_lo), ref_(ref), m_(operand(in.w_o, in.b_o)) {
    const std::int64_t dm = p.shape.model_dim, cat = m_.n - 1;
    col_norm_.resize(static_cast<std::size_t>(dm));
    for (std::int64_t m = 0; m < dm; ++m)
      col_norm_[static_cast<std::size_t>(m)] = norm_up(&in.w_o.values[static_cast<std::size_t>(m)], cat, dm);
    w_o_ = &in.w_o;
    g_y_ = mul_up(mul_up(weighted_error(m_.n), 1.0 + kU), 1.0 + 0x1p-49);
    grid_ = FastCore::grid_error(m_.n);
    slack_ = mul_up(static_cast<double>(m_.n), 0x1p-1071);
  }

  /// Returns: whether any head row of Y row (b, t) is fully masked.
  bool masked(std::int64_t b, std::int64_t t) const {
    const BlockShape& s = p_.shape;
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      if (cref_.fully_masked[static_cast<std::size_t>((b * s.q_heads + h) * s.q_len + t)] != 0) return true;
    return false;
  }

  /// Forms rows y[0..count) (each b·Tq + t, none fully masked) into ref_,
  /// on the grids where `grid` and they fit (set_grid), a row that misses on
  /// its grid again with the double-double sums.
  /// Returns (in excess[r]): the worst bound/allowed of each row (≤ 1: certified).
  void rows(const std::int64_t* y, int count, SumScratch& sc, double* excess, bool grid = true) {
    const BlockShape& s = p_.shape;
    const std::int64_t dv = s.value_dim, cat = m_.n - 1;
    double b_norm[kMaxGroup];
    for (int r = 0; r < count; ++r) {
      sc.bind(m_, r);
      const std::int64_t b = y[r] / s.q_len, t = y[r] % s.q_len;
      for (std::int64_t h = 0; h < s.q_heads; ++h) {
        const auto at = static_cast<std::size_t>(((b * s.q_heads + h) * s.q_len + t) * dv);
        for (std::int64_t d = 0; d < dv; ++d) {
          sc.w_hi[r][static_cast<std::size_t>(h * dv + d)] = cref_.out.values[at + static_cast<std::size_t>(d)];
          sc.w_lo[r][static_cast<std::size_t>(h * dv + d)] = out_lo_[at + static_cast<std::size_t>(d)];
        }
      }
      sc.w_hi[r][static_cast<std::size_t>(cat)] = 1.0;
      b_norm[r] = head_bound_norm(b, t);
      sc.args[r].weighted_grid = grid && set_grid(sc, r);
    }
    kr_.weighted(sc.args, count);
    const double allowed_rel = std::ldexp(1.0, opt_.target_log2);
    for (int r = 0; r < count; ++r) {
      excess[r] = 0;
      const std::int64_t b = y[r] / s.q_len, t = y[r] % s.q_len;
      const bool on_grid = sc.args[r].weighted_grid;
      for (std::int64_t m = 0; m < s.model_dim; ++m) {
        const auto at = static_cast<std::size_t>(ref_.out.offset(b, t, m));
        double hi = 0, lo = 0;
        // On the grid the sum is H + RN(L + Lc) (slots H, L, GH, GL, Lc, σ).
        const double l_sum = on_grid ? sc.l(r, m, m_.pad) + sc.l3(r, m, m_.pad) : sc.l(r, m, m_.pad);
        two_sum(sc.h(r, m), l_sum, hi, lo);
        const double g = sc.g(r, m, m_.pad);
        const double sum_err =
            on_grid ? grid_.at(sc.acc[r][static_cast<std::size_t>(5 * m_.pad + m)]) : mul_up(g_y_, g);
        double prop = mul_up(b_norm[r], col_norm_[static_cast<std::size_t>(m)]);
        auto judge = [&] {
          const double bound = add_up(add_up(prop, sum_err), slack_);
          const double low = sub_down(mul_down(g, (1.0 - 0x1p-49) * (1.0 - kU)), prop);
          ref_.bound.values[at] = bound;
          const double allowed = mul_down(allowed_rel, low);
          const double e = allowed > 0 ? bound / allowed : kInf;
          return std::isnan(e) ? kInf : e;
        };
        double e = judge();
        if (e > 1) {  // Cauchy–Schwarz was too coarse: the exact sum Σ_c B_c|W_o,cm|
          prop = exact_prop(b, t, m);
          e = judge();
        }
        ref_.out.values[at] = hi;
        ref_.magnitude.values[at] = g;
        excess[r] = std::max(excess[r], e);
      }
    }
    // A grid too coarse for a row (its σ from Cauchy–Schwarz far above Ĝ):
    // the row again with the double-double sums (a choice; both bounds hold).
    for (int r = 0; r < count; ++r)
      if (excess[r] > 1 && sc.args[r].weighted_grid) rows(&y[r], 1, sc, &excess[r], false);
  }

  void write_masked(std::int64_t b, std::int64_t t) {
    for (std::int64_t m = 0; m < p_.shape.model_dim; ++m) {
      const auto at = static_cast<std::size_t>(ref_.out.offset(b, t, m));
      ref_.out.values[at] = ref_.bound.values[at] = ref_.magnitude.values[at] = kNaN;
    }
  }

 private:
  // σ_m for row r of `sc` (its weights bound): 2·2^⌊log2 x⌋ > x =
  // 2(‖hi‖₂·‖W_o[:, m]‖₂ + |b_o,m|)(1 + 2^-50) ≥ 2(Σ_c |hi_c·W_o,cm| + |1·b_o,m|)
  // (Cauchy–Schwarz on the weights' high parts; norm_up bounds both norms from
  // above and the factor covers x's three roundings: (1 − u)³(1 + 2^-50) > 1),
  // at least 2^-900 (padded columns, values 0, take that). These are the
  // conditions of fast_row.inc's weighted_sums_grid with n = C + 1 ≤ 2^30 terms
  // T_c = Õ_c·W_o,cm and T_C = b_o,m; its bound, grid_ = FastCore::grid_error(n),
  //   |H + RN(L + Lc) − Σ_c T_c| ≤ grid_.coef·σ_m + grid_.floor,
  // takes the place of g_y_·Ĝ in stage (3)'s bound. Returns: false (double-
  // double sums) when some x exceeds 2^999 or is not finite.
  bool set_grid(SumScratch& sc, int r) const {
    if (m_.n > (std::int64_t{1} << 30)) return false;
    const double o_norm = norm_up(sc.w_hi[r].data(), m_.n - 1);
    double* sigma = sc.acc[r].data() + 5 * m_.pad;
    for (std::int64_t m = 0; m < m_.pad; ++m) {
      const bool real = m < m_.cols;
      const double wn = real ? col_norm_[static_cast<std::size_t>(m)] : 0.0;
      const double bm = real ? std::fabs(m_.vp[static_cast<std::size_t>((m_.n - 1) * m_.pad + m)]) : 0.0;
      const double x = 2 * (o_norm * wn + bm) * (1 + 0x1p-50);
      if (!(x <= 0x1p999)) return false;
      const double floor2 = std::bit_cast<double>(std::bit_cast<std::uint64_t>(x) & 0x7ff0000000000000ULL);
      sigma[m] = std::max(2 * floor2, 0x1p-900);
    }
    return true;
  }

  double head_bound_norm(std::int64_t b, std::int64_t t) const {
    const BlockShape& s = p_.shape;
    double sum = 0;
    for (std::int64_t h = 0; h < s.q_heads; ++h) {
      const auto at = static_cast<std::size_t>(((b * s.q_heads + h) * s.q_len + t) * s.value_dim);
      for (std::int64_t d = 0; d < s.value_dim; ++d) {
        const double x = cref_.bound.values[at + static_cast<std::size_t>(d)];
        sum += x * x;
      }
    }
    return std::nextafter(std::sqrt(nonneg_sum_up(sum, 2 * s.q_heads * s.value_dim)), kInf);
  }
  double exact_prop(std::int64_t b, std::int64_t t, std::int64_t m) const {
    const BlockShape& s = p_.shape;
    double sum = 0;
    for (std::int64_t h = 0; h < s.q_heads; ++h) {
      const auto at = static_cast<std::size_t>(((b * s.q_heads + h) * s.q_len + t) * s.value_dim);
      for (std::int64_t d = 0; d < s.value_dim; ++d)
        sum += cref_.bound.values[at + static_cast<std::size_t>(d)] *
               std::fabs(w_o_->values[static_cast<std::size_t>((h * s.value_dim + d) * s.model_dim + m)]);
    }
    return nonneg_sum_up(sum, 2 * s.q_heads * s.value_dim);
  }

  const BlockProblem& p_;
  const ReferenceOptions& opt_;
  const FastKernels& kr_;
  const CoreReference& cref_;
  const std::vector<double>& out_lo_;
  BlockReference& ref_;
  const Tensor* w_o_ = nullptr;
  Operand m_;
  std::vector<double> col_norm_;
  double g_y_ = 0, slack_ = 0;
  FastCore::GridError grid_;
};

}  // namespace

std::vector<std::uint8_t> fast_block(const BlockProblem& p, const BlockInputs& in, const ReferenceOptions& opt,
                                     BlockReference& ref) {
  const BlockShape& s = p.shape;
  const FastKernels& kr = fast_kernels();
  const std::int64_t items = std::max(s.q_len, s.kv_len) * s.batch * s.q_heads;
  const unsigned workers = worker_count(items, opt.threads);

  // (1) projections, in the core layout, with radii.
  CoreProblem cp;
  cp.shape = s.core();
  cp.scale = p.scale;
  cp.mask = p.mask;
  CoreInputs hi;
  WideCoreInputs wide;
  std::vector<double> aq, ak, av, rq, rk, rv;
  double gamma_p = 0;
  auto place = [&](const Projection& pr, std::int64_t len, std::int64_t heads, std::int64_t dim, Tensor& h, Tensor& l,
                   std::vector<double>& a, std::vector<double>& rad) {
    to_core(pr, s.batch, len, heads, dim, h, l, a, rad);
    gamma_p = std::max(gamma_p, pr.gamma);
  };
  place(project(kr, in.x_q, in.w_q, in.b_q, workers), s.q_len, s.q_heads, s.key_dim, hi.q, wide.q_lo, aq, rq);
  place(project(kr, in.x_kv, in.w_k, in.b_k, workers), s.kv_len, s.kv_heads, s.key_dim, hi.k, wide.k_lo, ak, rk);
  place(project(kr, in.x_kv, in.w_v, in.b_v, workers), s.kv_len, s.kv_heads, s.value_dim, hi.v, wide.v_lo, av, rv);
  auto norms = [&](const std::vector<double>& rad, std::int64_t rows, std::int64_t dim, std::vector<double>& out) {
    out.resize(static_cast<std::size_t>(rows));
    for (std::int64_t r = 0; r < rows; ++r)
      out[static_cast<std::size_t>(r)] = norm_up(&rad[static_cast<std::size_t>(r * dim)], dim);
  };
  norms(rq, s.batch * s.q_heads * s.q_len, s.key_dim, wide.q_rad);
  norms(rk, s.batch * s.kv_heads * s.kv_len, s.key_dim, wide.k_rad);
  wide.v_rad.assign(static_cast<std::size_t>(s.batch * s.kv_heads * s.value_dim), 0.0);
  for (std::int64_t bg = 0; bg < s.batch * s.kv_heads; ++bg)
    for (std::int64_t j = 0; j < s.kv_len; ++j)
      for (std::int64_t d = 0; d < s.value_dim; ++d) {
        double& r = wide.v_rad[static_cast<std::size_t>(bg * s.value_dim + d)];
        r = std::max(r, rv[static_cast<std::size_t>((bg * s.kv_len + j) * s.value_dim + d)]);
      }

  // (2) core attention, wide.
  const std::int64_t core_rows = s.batch * s.q_heads * s.q_len;
  CoreReference cref;
  cref.out = Tensor({s.batch, s.q_heads, s.q_len, s.value_dim});
  cref.bound = Tensor(cref.out.shape);
  cref.magnitude = Tensor(cref.out.shape);
  cref.lse = Tensor({s.batch, s.q_heads, s.q_len});
  cref.lse_bound = Tensor(cref.lse.shape);
  cref.fully_masked.assign(static_cast<std::size_t>(core_rows), 0);
  std::vector<double> out_lo(cref.out.values.size(), 0.0);
  wide.out_lo = out_lo.data();
  const FastCore core(cp, hi, opt, workers, &kr, &wide);
  std::vector<Worker> pool(workers);
  const double gamma_in = add_up(gamma_p, 0x1p-127);
  auto mp_of = [&](unsigned w) -> BlockRows& {
    if (!pool[w].mp) pool[w].mp = std::make_unique<BlockRows>(cp, hi, wide, aq, ak, av, gamma_in, opt.target_log2);
    return *pool[w].mp;
  };
  parallel_for(core.groups(), workers, [&](std::int64_t group, unsigned w) {
    core.run_group(group, cref, pool[w].core, mp_of(w), pool[w].stats);
  });

  // (3) output projection, rows of Y in groups; escalation per row.
  OutputStage stage(p, in, opt, kr, cref, out_lo, ref);
  const std::int64_t y_rows = s.batch * s.q_len;
  std::vector<std::uint8_t> row_ok(static_cast<std::size_t>(y_rows), 1);
  std::vector<std::int64_t> escalated(static_cast<std::size_t>(y_rows), 0);
  parallel_for((y_rows + kMaxGroup - 1) / kMaxGroup, workers, [&](std::int64_t grp, unsigned w) {
    std::int64_t live[kMaxGroup];
    int count = 0;
    for (std::int64_t y = grp * kMaxGroup; y < std::min(y_rows, (grp + 1) * kMaxGroup); ++y) {
      if (stage.masked(y / s.q_len, y % s.q_len)) stage.write_masked(y / s.q_len, y % s.q_len);
      else live[count++] = y;
    }
    if (count == 0) return;
    double excess[kMaxGroup];
    stage.rows(live, count, pool[w].sums, excess);
    for (int r = 0; r < count; ++r) {
      if (excess[r] <= 1) continue;
      // Tighter head outputs for this row, then the row again.
      BlockRows& mp = mp_of(w);
      const std::int64_t y = live[r], b = y / s.q_len, t = y % s.q_len;
      escalated[static_cast<std::size_t>(y)] = 1;
      const double lower = std::isfinite(excess[r]) ? std::ceil(std::log2(excess[r])) + 4 : 1e9;
      bool ok = lower < 400;
      if (ok) {
        mp.target_log2 = opt.target_log2 - static_cast<int>(lower);
        for (std::int64_t h = 0; h < s.q_heads && ok; ++h) ok = mp.run((b * s.q_heads + h) * s.q_len + t, cref, nullptr, false);
        mp.target_log2 = opt.target_log2;
      }
      if (ok) {
        double again = 0;
        stage.rows(&live[r], 1, pool[w].sums, &again);
        ok = again <= 1;
      }
      row_ok[static_cast<std::size_t>(y)] = ok ? 1 : 0;
    }
  });

  std::vector<std::uint8_t> batch_ok(static_cast<std::size_t>(s.batch), 1);
  for (std::int64_t y = 0; y < y_rows; ++y) {
    if (row_ok[static_cast<std::size_t>(y)] == 0) batch_ok[static_cast<std::size_t>(y / s.q_len)] = 0;
    if (!stage.masked(y / s.q_len, y % s.q_len)) ++ref.stats.rows;
    ref.stats.escalated_rows += escalated[static_cast<std::size_t>(y)];
  }
  ref.fully_masked = cref.fully_masked;
  for (const Worker& w : pool) {
    if (!w.mp) continue;
    ref.stats.escalated_elements += w.mp->elements;
    ref.stats.max_precision = std::max(ref.stats.max_precision, w.mp->max_precision);
  }
  return batch_ok;
}

}  // namespace headroom::detail
