// headroom — gradient elements in MPFR interval arithmetic (see backward_mp.h).
//
// For an element at precision p, with intervals written [lo, hi]:
//   z_ij = s·(q_i·k_j) + β_ij     dot products of exact doubles summed with
//                                 every product and sum rounded down (lo) or
//                                 up (hi); ×s and +β likewise (s < 0 swaps)
//   lse_i = m + log Σ_j exp(z_ij − m)   m any double (the largest lo);
//                                 exp and log monotone: lo from the lo ends
//                                 rounded down, hi from the hi ends rounded up
//   P_ij = exp(z_ij − lse_i)      lo = exp↓(z_lo − lse_hi), hi = exp↑(z_hi − lse_lo)
//   dP_ij = dO_i·V_j              as the dot products above
//   D_i = Σ_j P_ij ⊗ dP_ij        ⊗: the four end products, min rounded down,
//                                 max rounded up (Moore 1966, Interval Analysis)
//   dS_ij = P_ij ⊗ (dP_ij ⊖ D_i)
//   dQ_id = s·Σ_j dS_ij K_jd,  dK_jd = s·Σ_{h∈group, i} dS_ij Q_id,  dV_jd = Σ_i P_ij dO_id
// Magnitudes from the lower ends, rounded down: A_ij = Σ_d |dO_id||V_jd|,
// A_i = Σ_j P_ij,lo A_ij and the sums of reference_backward.h.
// Row quantities (lse, D, A_i) are cached per row at the current precision,
// and P_ij, dS_ij and the lower end of P_ij (A_ij + A_i) per (row, key): the
// Dk elements of a dK row (the Dv of a dV row) share every pair's dot
// products instead of redoing them per element. The cached intervals are the
// very ones the element would compute, so results do not change.
#include "backward_mp.h"

#include <mpfr.h>

#include <algorithm>
#include <cmath>
#include <unordered_map>
#include <vector>

#include "bound_arith.h"
#include "input_check.h"
#include "mp_core.h"

namespace headroom::detail {
namespace {

struct Mp {
  mpfr_t x;
  explicit Mp(long p) { mpfr_init2(x, p); }
  ~Mp() { mpfr_clear(x); }
  Mp(const Mp&) = delete;
  Mp& operator=(const Mp&) = delete;
  Mp(Mp&& o) noexcept {
    mpfr_init2(x, mpfr_get_prec(o.x));
    mpfr_swap(x, o.x);
  }
};

struct Ival {
  Mp lo, hi;
  explicit Ival(long p) : lo(p), hi(p) {}
  void zero() {
    mpfr_set_zero(lo.x, 1);
    mpfr_set_zero(hi.x, 1);
  }
};

// Scratch for the interval product.
struct MulScratch {
  Mp a, b, c, d;
  explicit MulScratch(long p) : a(p), b(p), c(p), d(p) {}
};

// r = x ⊗ y (r may alias neither).
void imul(Ival& r, const Ival& x, const Ival& y, MulScratch& t) {
  for (mpfr_rnd_t rnd : {MPFR_RNDD, MPFR_RNDU}) {
    mpfr_mul(t.a.x, x.lo.x, y.lo.x, rnd);
    mpfr_mul(t.b.x, x.lo.x, y.hi.x, rnd);
    mpfr_mul(t.c.x, x.hi.x, y.lo.x, rnd);
    mpfr_mul(t.d.x, x.hi.x, y.hi.x, rnd);
    if (rnd == MPFR_RNDD) {
      mpfr_min(t.a.x, t.a.x, t.b.x, rnd);
      mpfr_min(t.c.x, t.c.x, t.d.x, rnd);
      mpfr_min(r.lo.x, t.a.x, t.c.x, rnd);
    } else {
      mpfr_max(t.a.x, t.a.x, t.b.x, rnd);
      mpfr_max(t.c.x, t.c.x, t.d.x, rnd);
      mpfr_max(r.hi.x, t.a.x, t.c.x, rnd);
    }
  }
}

// acc += x·c for an exact double c (sign decides which end pairs with which).
void iadd_mul_d(Ival& acc, const Ival& x, double c, Mp& t) {
  const mpfr_t& lo_src = c >= 0 ? x.lo.x : x.hi.x;
  const mpfr_t& hi_src = c >= 0 ? x.hi.x : x.lo.x;
  mpfr_mul_d(t.x, lo_src, c, MPFR_RNDD);
  mpfr_add(acc.lo.x, acc.lo.x, t.x, MPFR_RNDD);
  mpfr_mul_d(t.x, hi_src, c, MPFR_RNDU);
  mpfr_add(acc.hi.x, acc.hi.x, t.x, MPFR_RNDU);
}

// r = [Σ a_c b_c] for exact doubles, both ends.
void idot(Ival& r, const double* a, const double* b, std::int64_t n, Mp& t) {
  r.zero();
  for (std::int64_t c = 0; c < n; ++c) {
    mpfr_set_d(t.x, a[c], MPFR_RNDN);  // exact: p ≥ 53
    mpfr_mul_d(t.x, t.x, b[c], MPFR_RNDD);
    mpfr_add(r.lo.x, r.lo.x, t.x, MPFR_RNDD);
    mpfr_set_d(t.x, a[c], MPFR_RNDN);
    mpfr_mul_d(t.x, t.x, b[c], MPFR_RNDU);
    mpfr_add(r.hi.x, r.hi.x, t.x, MPFR_RNDU);
  }
}

// Returns: a lower bound of Σ |a_c||b_c|.
double abs_dot_down(const double* a, const double* b, std::int64_t n, Mp& acc, Mp& t) {
  mpfr_set_zero(acc.x, 1);
  for (std::int64_t c = 0; c < n; ++c) {
    mpfr_set_d(t.x, std::fabs(a[c]), MPFR_RNDN);
    mpfr_mul_d(t.x, t.x, std::fabs(b[c]), MPFR_RNDD);
    mpfr_add(acc.x, acc.x, t.x, MPFR_RNDD);
  }
  return mpfr_get_d(acc.x, MPFR_RNDD);
}

}  // namespace

struct MpBackward::Impl {
  const CoreProblem& p;
  const CoreInputs& in;
  const Tensor& d_o;
  int target_log2;
  long prec = 0, max_used = 0;
  std::vector<std::int64_t> keys;
  std::vector<double> bias;

  struct Row {
    bool masked = false;
    std::vector<std::int64_t> keys;
    std::vector<double> bias;
    Ival lse, delta;
    double a_i = 0;  // A_i, lower bound
    explicit Row(long p) : lse(p), delta(p) {}
  };
  std::unordered_map<std::int64_t, Row> rows;

  struct Pair {
    Ival pr, ds;
    Mp mag;  // lower end of P_ij (A_ij + A_i)
    explicit Pair(long p) : pr(p), ds(p), mag(p) {}
  };
  std::unordered_map<std::int64_t, Pair> pairs;
  static constexpr std::size_t kMaxPairs = std::size_t{1} << 18;  // ~100 MiB at 192 bits, then start afresh

  // Scratch at the current precision.
  std::unique_ptr<Ival> z, pr, dp, ds, acc;
  std::unique_ptr<Mp> t, t2, t3, mag;
  std::unique_ptr<MulScratch> ms;

  Impl(const CoreProblem& pp, const CoreInputs& ii, const Tensor& dd, int target)
      : p(pp), in(ii), d_o(dd), target_log2(target) {}

  void set_precision(long np) {
    if (np == prec) return;
    prec = np;
    max_used = std::max(max_used, np);
    rows.clear();
    pairs.clear();
    z = std::make_unique<Ival>(np);
    pr = std::make_unique<Ival>(np);
    dp = std::make_unique<Ival>(np);
    ds = std::make_unique<Ival>(np);
    acc = std::make_unique<Ival>(np);
    t = std::make_unique<Mp>(np);
    t2 = std::make_unique<Mp>(np);
    t3 = std::make_unique<Mp>(np);
    mag = std::make_unique<Mp>(np);
    ms = std::make_unique<MulScratch>(np);
  }

  const double* q_row(std::int64_t b, std::int64_t h, std::int64_t i) const {
    return &in.q.values[static_cast<std::size_t>(in.q.offset(b, h, i, 0))];
  }
  const double* do_row(std::int64_t b, std::int64_t h, std::int64_t i) const {
    return &d_o.values[static_cast<std::size_t>(d_o.offset(b, h, i, 0))];
  }
  const double* k_row(std::int64_t b, std::int64_t g, std::int64_t j) const {
    return &in.k.values[static_cast<std::size_t>(in.k.offset(b, g, j, 0))];
  }
  const double* v_row(std::int64_t b, std::int64_t g, std::int64_t j) const {
    return &in.v.values[static_cast<std::size_t>(in.v.offset(b, g, j, 0))];
  }

  // z = s·(q_i·k_j) + β.
  void score(Ival& out, std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t j, double beta) {
    const CoreShape& s = p.shape;
    idot(*acc, q_row(b, h, i), k_row(b, kv_head_of(s, h), j), s.key_dim, *t);
    const double sc = p.scale;
    if (sc >= 0) {
      mpfr_mul_d(out.lo.x, acc->lo.x, sc, MPFR_RNDD);
      mpfr_mul_d(out.hi.x, acc->hi.x, sc, MPFR_RNDU);
    } else {
      mpfr_mul_d(out.lo.x, acc->hi.x, sc, MPFR_RNDD);
      mpfr_mul_d(out.hi.x, acc->lo.x, sc, MPFR_RNDU);
    }
    mpfr_add_d(out.lo.x, out.lo.x, beta, MPFR_RNDD);
    mpfr_add_d(out.hi.x, out.hi.x, beta, MPFR_RNDU);
  }

  // P_ij into *pr, dP_ij into *dp, A_ij returned (lower bound), given the row's lse.
  double prob_and_dp(const Row& r, std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t j, double beta) {
    const CoreShape& s = p.shape;
    score(*z, b, h, i, j, beta);
    mpfr_sub(pr->lo.x, z->lo.x, r.lse.hi.x, MPFR_RNDD);
    mpfr_exp(pr->lo.x, pr->lo.x, MPFR_RNDD);
    mpfr_sub(pr->hi.x, z->hi.x, r.lse.lo.x, MPFR_RNDU);
    mpfr_exp(pr->hi.x, pr->hi.x, MPFR_RNDU);
    const std::int64_t g = kv_head_of(s, h);
    idot(*dp, do_row(b, h, i), v_row(b, g, j), s.value_dim, *t);
    return abs_dot_down(do_row(b, h, i), v_row(b, g, j), s.value_dim, *t3, *t);
  }

  const Row& row(std::int64_t b, std::int64_t h, std::int64_t i) {
    const CoreShape& s = p.shape;
    const std::int64_t id = (b * s.q_heads + h) * s.q_len + i;
    auto found = rows.find(id);
    if (found != rows.end()) return found->second;
    Row r(prec);
    visible_keys(s, p.mask, b, h, i, r.keys, r.bias);
    r.masked = r.keys.empty();
    if (!r.masked) {
      const auto n = r.keys.size();
      auto beta = [&](std::size_t idx) { return r.bias.empty() ? 0.0 : r.bias[idx]; };
      // m: the largest lower end, as a double (any number would do).
      double m = -INFINITY;
      std::vector<Ival> zs;
      zs.reserve(n);
      for (std::size_t idx = 0; idx < n; ++idx) {
        zs.emplace_back(prec);
        score(zs.back(), b, h, i, r.keys[idx], beta(idx));
        m = std::max(m, mpfr_get_d(zs.back().lo.x, MPFR_RNDD));
      }
      Ival sum(prec);
      sum.zero();
      for (const Ival& zz : zs) {
        mpfr_sub_d(t->x, zz.lo.x, m, MPFR_RNDD);
        mpfr_exp(t->x, t->x, MPFR_RNDD);
        mpfr_add(sum.lo.x, sum.lo.x, t->x, MPFR_RNDD);
        mpfr_sub_d(t->x, zz.hi.x, m, MPFR_RNDU);
        mpfr_exp(t->x, t->x, MPFR_RNDU);
        mpfr_add(sum.hi.x, sum.hi.x, t->x, MPFR_RNDU);
      }
      mpfr_log(r.lse.lo.x, sum.lo.x, MPFR_RNDD);
      mpfr_add_d(r.lse.lo.x, r.lse.lo.x, m, MPFR_RNDD);
      mpfr_log(r.lse.hi.x, sum.hi.x, MPFR_RNDU);
      mpfr_add_d(r.lse.hi.x, r.lse.hi.x, m, MPFR_RNDU);
      // D_i = Σ_j P_ij dP_ij and A_i = Σ_j P_ij,lo A_ij.
      r.delta.zero();
      Mp a_acc(prec);
      mpfr_set_zero(a_acc.x, 1);
      for (std::size_t idx = 0; idx < n; ++idx) {
        const double a = prob_and_dp(r, b, h, i, r.keys[idx], beta(idx));
        imul(*ds, *pr, *dp, *ms);
        mpfr_add(r.delta.lo.x, r.delta.lo.x, ds->lo.x, MPFR_RNDD);
        mpfr_add(r.delta.hi.x, r.delta.hi.x, ds->hi.x, MPFR_RNDU);
        mpfr_mul_d(t->x, pr->lo.x, a, MPFR_RNDD);
        mpfr_add(a_acc.x, a_acc.x, t->x, MPFR_RNDD);
      }
      r.a_i = mpfr_get_d(a_acc.x, MPFR_RNDD);
    }
    return rows.emplace(id, std::move(r)).first->second;
  }

  // dS_ij into *ds (and P_ij in *pr); returns the lower end of P_ij (A_ij + A_i)
  // as an MPFR number in *t2. Key j must be visible to the row.
  void d_score(const Row& r, std::int64_t b, std::int64_t h, std::int64_t i, std::size_t idx) {
    const CoreShape& s = p.shape;
    const std::int64_t id = ((b * s.q_heads + h) * s.q_len + i) * s.kv_len + r.keys[idx];
    if (const auto found = pairs.find(id); found != pairs.end()) {
      const Pair& c = found->second;
      mpfr_set(pr->lo.x, c.pr.lo.x, MPFR_RNDD);
      mpfr_set(pr->hi.x, c.pr.hi.x, MPFR_RNDU);
      mpfr_set(ds->lo.x, c.ds.lo.x, MPFR_RNDD);
      mpfr_set(ds->hi.x, c.ds.hi.x, MPFR_RNDU);
      mpfr_set(t2->x, c.mag.x, MPFR_RNDD);
      return;
    }
    d_score_fresh(r, b, h, i, idx);
    if (pairs.size() >= kMaxPairs) pairs.clear();
    Pair& c = pairs.emplace(id, Pair(prec)).first->second;
    mpfr_set(c.pr.lo.x, pr->lo.x, MPFR_RNDD);
    mpfr_set(c.pr.hi.x, pr->hi.x, MPFR_RNDU);
    mpfr_set(c.ds.lo.x, ds->lo.x, MPFR_RNDD);
    mpfr_set(c.ds.hi.x, ds->hi.x, MPFR_RNDU);
    mpfr_set(c.mag.x, t2->x, MPFR_RNDD);
  }

  void d_score_fresh(const Row& r, std::int64_t b, std::int64_t h, std::int64_t i, std::size_t idx) {
    const double a = prob_and_dp(r, b, h, i, r.keys[idx], r.bias.empty() ? 0.0 : r.bias[idx]);
    mpfr_sub(dp->lo.x, dp->lo.x, r.delta.hi.x, MPFR_RNDD);
    mpfr_sub(dp->hi.x, dp->hi.x, r.delta.lo.x, MPFR_RNDU);
    imul(*ds, *pr, *dp, *ms);
    mpfr_set_d(t2->x, a, MPFR_RNDD);
    mpfr_add_d(t2->x, t2->x, r.a_i, MPFR_RNDD);
    mpfr_mul(t2->x, t2->x, pr->lo.x, MPFR_RNDD);
  }

  // acc (value), mag (magnitude) of the element at the current precision.
  void compute(GradKind kind, std::int64_t b, std::int64_t head, std::int64_t tt, std::int64_t d) {
    const CoreShape& s = p.shape;
    acc->zero();
    mpfr_set_zero(mag->x, 1);
    Ival sum(prec);
    sum.zero();
    auto add_mag = [&](const mpfr_t& w, double c) {
      mpfr_mul_d(t->x, w, std::fabs(c), MPFR_RNDD);
      mpfr_add(mag->x, mag->x, t->x, MPFR_RNDD);
    };
    auto add = [&](const Ival& x, double c) {
      Mp tmp(prec);
      iadd_mul_d(sum, x, c, tmp);
    };
    if (kind == GradKind::d_q || kind == GradKind::d_s) {
      const std::int64_t h = head, i = tt;
      const Row& r = row(b, h, i);
      for (std::size_t idx = 0; idx < r.keys.size(); ++idx) {
        if (kind == GradKind::d_s && r.keys[idx] != d) continue;
        d_score(r, b, h, i, idx);
        if (kind == GradKind::d_s) {
          mpfr_set(sum.lo.x, ds->lo.x, MPFR_RNDD);
          mpfr_set(sum.hi.x, ds->hi.x, MPFR_RNDU);
          mpfr_set(mag->x, t2->x, MPFR_RNDD);
        } else {
          const double kc = k_row(b, kv_head_of(s, h), r.keys[idx])[d];
          add(*ds, kc);
          add_mag(t2->x, kc);
        }
      }
    } else {
      const std::int64_t g = head, j = tt, group = s.q_heads / s.kv_heads;
      for (std::int64_t h = g * group; h < (g + 1) * group; ++h) {
        for (std::int64_t i = 0; i < s.q_len; ++i) {
          const Row& r = row(b, h, i);
          const auto at = std::lower_bound(r.keys.begin(), r.keys.end(), j);
          if (at == r.keys.end() || *at != j) continue;
          const auto idx = static_cast<std::size_t>(at - r.keys.begin());
          if (kind == GradKind::d_k) {
            d_score(r, b, h, i, idx);
            const double qc = q_row(b, h, i)[d];
            add(*ds, qc);
            add_mag(t2->x, qc);
          } else {
            d_score(r, b, h, i, idx);  // P_ij in *pr
            const double oc = do_row(b, h, i)[d];
            add(*pr, oc);
            add_mag(pr->lo.x, oc);
          }
        }
      }
    }
    if (kind == GradKind::d_q || kind == GradKind::d_k) {
      // × s, exact double; the magnitude × |s|.
      const double sc = p.scale;
      if (sc >= 0) {
        mpfr_mul_d(acc->lo.x, sum.lo.x, sc, MPFR_RNDD);
        mpfr_mul_d(acc->hi.x, sum.hi.x, sc, MPFR_RNDU);
      } else {
        mpfr_mul_d(acc->lo.x, sum.hi.x, sc, MPFR_RNDD);
        mpfr_mul_d(acc->hi.x, sum.lo.x, sc, MPFR_RNDU);
      }
      mpfr_mul_d(mag->x, mag->x, std::fabs(sc), MPFR_RNDD);
    } else {
      mpfr_set(acc->lo.x, sum.lo.x, MPFR_RNDD);
      mpfr_set(acc->hi.x, sum.hi.x, MPFR_RNDU);
    }
  }
};

namespace {
constexpr double kSmallestSubnormal = 0x1p-1074;  // IEEE 754 binary64
}  // namespace

MpBackward::MpBackward(const CoreProblem& p, const CoreInputs& in, const Tensor& d_o, int target_log2)
    : impl_(std::make_unique<Impl>(p, in, d_o, target_log2)) {}
MpBackward::~MpBackward() = default;
long MpBackward::max_precision_used() const { return impl_->max_used; }

MpBackward::Element MpBackward::element(GradKind kind, std::int64_t b, std::int64_t head, std::int64_t t,
                                        std::int64_t d) {
  Impl& m = *impl_;
  const double allowed_rel = std::ldexp(1.0, m.target_log2);
  Element e;
  for (long prec = 192;; prec = std::min(kMaxPrecision, 2 * prec)) {
    m.set_precision(prec);
    m.compute(kind, b, head, t, d);
    Mp mid(prec), up(prec), down(prec);
    mpfr_add(mid.x, m.acc->lo.x, m.acc->hi.x, MPFR_RNDN);
    mpfr_div_2ui(mid.x, mid.x, 1, MPFR_RNDN);
    mpfr_sub(up.x, m.acc->hi.x, mid.x, MPFR_RNDU);
    mpfr_sub(down.x, mid.x, m.acc->lo.x, MPFR_RNDU);
    mpfr_max(up.x, up.x, down.x, MPFR_RNDU);
    e.out = mpfr_get_d(mid.x, MPFR_RNDN);
    e.bound = mpfr_get_d(up.x, MPFR_RNDU);
    e.magnitude = mpfr_get_d(m.mag->x, MPFR_RNDD);
    if (mpfr_nan_p(m.acc->lo.x) || mpfr_nan_p(m.acc->hi.x)) e.bound = kInf;
    // Where 2^target·magnitude is below the smallest subnormal (magnitude <
    // 2^(-1074 - target)), no double bound can be smaller than that subnormal:
    // the element is certified at it — the resolution its double `out` has
    // there anyway — rather than raising the precision to the cap in vain.
    const double allowed = std::max(mul_down(allowed_rel, e.magnitude), e.magnitude > 0 ? kSmallestSubnormal : 0.0);
    e.certified = e.bound <= allowed || (e.bound == 0 && e.magnitude == 0);
    // A magnitude below the double range (0 here) cannot be met by any precision.
    if (e.certified || prec >= kMaxPrecision || e.magnitude == 0) return e;
  }
}

}  // namespace headroom::detail
