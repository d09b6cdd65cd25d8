// headroom — reference_block: projections, attention per head, output projection, certified.
//
// Method fast runs fast_block.cpp first; the batches it could not certify, and
// every batch with method multiprecision or the cpp_bin_float backend, take
// the multiprecision path below.
//
// Per batch, at working precision p (unit u, see mp_arith.h):
//
//  (1) Projections Q̂ = RN(Σ_m RN(X_tm·W_mc) + b_c), likewise K̂, V̂, kept in
//      multiprecision. A recursive dot product of Dm + 1 terms:
//        |Q̂_tc − Q_tc| ≤ γ' · a_q,tc,  γ' = γ_{Dm+1},  a_q,tc = Σ_m |X_tm||W_mc| + |b_c|,
//      and |Q_tc| ≤ a_q,tc. a_q (and a_k, a_v) are upper bounds in double.
//  (2) Attention per head and query row on Q̂, K̂, V̂ (mp_row.h, with γ' and
//      a = a_q, a_k, a_v): Ô_c, the concatenated head outputs, each with a
//      certified B_c ≥ |Ô_c − O_c|.
//  (3) Ŷ_tm = RN(Σ_c RN(Ô_c·W_o,cm) + b_o,m), C = Hq·Dv terms plus the bias:
//        |Ŷ − Y| ≤ Σ_c B_c|W_o,cm| + γ_{C+1}·(Σ_c |Ô_c||W_o,cm| + |b_o,m|)
//      (the propagated head errors, then the rounding of the dot product).
//      magnitude_tm = Σ_c |O_c||W_o,cm| + |b_o,m|, evaluated with Ô_c; it lies
//      within Σ_c B_c|W_o,cm| of the exact one, and the element is certified
//      when its bound is within 2^target of the magnitude's lower end.
// When an element misses the target, the whole batch is redone at a precision
// raised by the shortfall (mp_row.h: next_precision), up to kMaxBlockPrecision.
#include <algorithm>
#include <cmath>
#include <cstdint>
#include <limits>
#include <memory>
#include <vector>

#include "block_source.h"
#include "bound_arith.h"
#include "fast_block.h"
#include "headroom/reference.h"
#include "input_check.h"
#include "mp_arith.h"
#include "mp_row.h"
#include "parallel.h"

namespace headroom {
namespace {

using detail::add_up;
using detail::div_down;
using detail::gamma_up;
using detail::kInf;
using detail::mul_down;
using detail::mul_up;
using detail::nonneg_sum_up;
using detail::sub_down;

constexpr long kMaxBlockPrecision = 2048;
constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

// Returns: a lower bound of an exact sum of nonnegative terms computed in
// double as `computed` with at most `ops` roundings per path (bound_arith.h,
// nonneg_sum_up, read the other way).
double nonneg_sum_down(double computed, std::int64_t ops) {
  return sub_down(div_down(computed, add_up(1.0, gamma_up(ops, 0x1p-53))),
                  mul_up(static_cast<double>(ops), 0x1p-1074));
}

// A projected tensor of one batch: [rows, cols] numbers and their bounds a.
template <class Num>
struct Projected {
  std::vector<Num> value;
  std::vector<double> abs;  // a ≥ |exact| and |value − exact| ≤ γ'·a
  std::int64_t cols = 0;
};

template <class Ar>
struct Scratch {
  using Num = typename Ar::Num;
  detail::MpWorkspace<Ar> ws;
  std::vector<Num> xrow;
  Num acc, tmp;
  std::vector<std::int64_t> keys;
  std::vector<double> bias, abs_dot;
};

class BlockRun {
 public:
  BlockRun(const BlockProblem& p, const BlockInputs& in, const ReferenceOptions& opt, BlockReference& ref)
      : p_(p), in_(in), opt_(opt), ref_(ref) {}

  // Computes batch b at the arithmetic's precision into ref_.
  // Returns: the worst bound/allowed over its finite elements (≤ 1: certified).
  template <class Ar>
  double batch(const Ar& ar, std::int64_t b) {
    using Num = typename Ar::Num;
    const BlockShape& s = p_.shape;
    const std::int64_t dm = s.model_dim, hq = s.q_heads, dk = s.key_dim, dv = s.value_dim;
    const std::int64_t cat = hq * dv;
    const unsigned workers = detail::worker_count(std::max(s.q_len, s.kv_len) * hq, opt_.threads);
    std::vector<std::unique_ptr<Scratch<Ar>>> scratch(workers);
    auto scratch_of = [&](unsigned w) -> Scratch<Ar>& {
      if (!scratch[w]) {
        scratch[w] = std::make_unique<Scratch<Ar>>();
        scratch[w]->xrow.resize(static_cast<std::size_t>(dm));
        for (auto& x : scratch[w]->xrow) ar.init(x);
        ar.init(scratch[w]->acc);
        ar.init(scratch[w]->tmp);
        scratch[w]->abs_dot.resize(static_cast<std::size_t>(s.kv_len));
      }
      return *scratch[w];
    };
    const double gin = gamma_up(dm + 1, ar.unit());

    // (1) projections.
    auto project = [&](const Tensor& x, std::int64_t rows, const Tensor& w, const Tensor& bias) {
      Projected<Num> out;
      out.cols = w.shape[1];
      out.value.resize(static_cast<std::size_t>(rows * out.cols));
      out.abs.resize(out.value.size());
      detail::parallel_for(rows, workers, [&](std::int64_t t, unsigned wk) {
        Scratch<Ar>& sc = scratch_of(wk);
        const double* xr = &x.values[static_cast<std::size_t>(x.offset(b, t, 0))];
        for (std::int64_t m = 0; m < dm; ++m) ar.set_d(sc.xrow[static_cast<std::size_t>(m)], xr[m]);
        for (std::int64_t c = 0; c < out.cols; ++c) {
          Num& acc = out.value[static_cast<std::size_t>(t * out.cols + c)];
          ar.init(acc);
          ar.zero(acc);
          double a = 0;
          for (std::int64_t m = 0; m < dm; ++m) {
            const double wmc = w.values[static_cast<std::size_t>(m * out.cols + c)];
            ar.add_prod_d(acc, sc.tmp, sc.xrow[static_cast<std::size_t>(m)], wmc);
            a += std::fabs(xr[m] * wmc);
          }
          if (!bias.values.empty()) {
            ar.add_d(acc, bias.values[static_cast<std::size_t>(c)]);
            a += std::fabs(bias.values[static_cast<std::size_t>(c)]);
          }
          out.abs[static_cast<std::size_t>(t * out.cols + c)] = nonneg_sum_up(a, 2 * dm + 2);
        }
      });
      return out;
    };
    const Projected<Num> q = project(in_.x_q, s.q_len, in_.w_q, in_.b_q);
    const Projected<Num> k = project(in_.x_kv, s.kv_len, in_.w_k, in_.b_k);
    const Projected<Num> v = project(in_.x_kv, s.kv_len, in_.w_v, in_.b_v);

    // (2) attention per head and row.
    std::vector<Num> o(static_cast<std::size_t>(s.q_len * cat));
    std::vector<double> o_near(o.size()), o_bound(o.size());
    const CoreShape cs = s.core();
    detail::parallel_for(hq * s.q_len, workers, [&](std::int64_t item, unsigned wk) {
      Scratch<Ar>& sc = scratch_of(wk);
      const std::int64_t h = item / s.q_len, i = item % s.q_len, g = kv_head_of(cs, h);
      const std::size_t flag = static_cast<std::size_t>((b * hq + h) * s.q_len + i);
      detail::visible_keys(cs, p_.mask, b, h, i, sc.keys, sc.bias);
      const auto n = static_cast<std::int64_t>(sc.keys.size());
      ref_.fully_masked[flag] = n == 0 ? 1 : 0;
      if (n == 0) return;
      const double* aq = &q.abs[static_cast<std::size_t>(i * q.cols + h * dk)];
      for (std::int64_t j : sc.keys) {
        const double* ak = &k.abs[static_cast<std::size_t>(j * k.cols + g * dk)];
        double a = 0;
        for (std::int64_t c = 0; c < dk; ++c) a += aq[c] * ak[c];
        sc.abs_dot[static_cast<std::size_t>(j)] = nonneg_sum_up(a, 2 * dk);
      }
      const detail::BlockSource<Ar> src{&q.value[static_cast<std::size_t>(i * q.cols + h * dk)],
                                aq,
                                &k.value[static_cast<std::size_t>(g * dk)],
                                &k.abs[static_cast<std::size_t>(g * dk)],
                                k.cols,
                                &v.value[static_cast<std::size_t>(g * dv)],
                                &v.abs[static_cast<std::size_t>(g * dv)],
                                v.cols,
                                dk,
                                dv,
                                gin,
                                sc.abs_dot.data()};
      detail::RowSpec spec;
      spec.keys = sc.keys.data();
      spec.bias = sc.bias.empty() ? nullptr : sc.bias.data();
      spec.n = n;
      spec.scale = p_.scale;
      spec.target_log2 = opt_.target_log2;
      const std::size_t at = static_cast<std::size_t>(i * cat + h * dv);
      detail::RowOut<Num> out;
      out.out = &o_near[at];
      out.bound = &o_bound[at];
      out.keep = &o[at];
      detail::mp_row(ar, sc.ws, src, spec, out);
    });

    // (3) output projection.
    std::vector<double> excess(static_cast<std::size_t>(s.q_len), 0.0);
    const double g_out = gamma_up(cat + 1, ar.unit());
    const double allowed_rel = std::ldexp(1.0, opt_.target_log2);
    detail::parallel_for(s.q_len, workers, [&](std::int64_t t, unsigned wk) {
      Scratch<Ar>& sc = scratch_of(wk);
      bool masked = false;
      for (std::int64_t h = 0; h < hq; ++h)
        masked = masked || ref_.fully_masked[static_cast<std::size_t>((b * hq + h) * s.q_len + t)] != 0;
      for (std::int64_t m = 0; m < dm; ++m) {
        const std::size_t y_at = static_cast<std::size_t>(ref_.out.offset(b, t, m));
        if (masked) {
          ref_.out.values[y_at] = ref_.bound.values[y_at] = ref_.magnitude.values[y_at] = kNaN;
          continue;
        }
        ar.zero(sc.acc);
        double prop = 0, abs_hat = 0, mag = 0;
        for (std::int64_t c = 0; c < cat; ++c) {
          const std::size_t oc = static_cast<std::size_t>(t * cat + c);
          const double w = in_.w_o.values[static_cast<std::size_t>(c * dm + m)];
          ar.add_prod_d(sc.acc, sc.tmp, o[oc], w);
          prop += o_bound[oc] * std::fabs(w);
          abs_hat += ar.abs_up(o[oc]) * std::fabs(w);
          mag += std::fabs(o_near[oc] * w);
        }
        if (!in_.b_o.values.empty()) {
          const double bo = in_.b_o.values[static_cast<std::size_t>(m)];
          ar.add_d(sc.acc, bo);
          abs_hat += std::fabs(bo);
          mag += std::fabs(bo);
        }
        const double prop_up = nonneg_sum_up(prop, 2 * cat);
        const double bound = add_up(prop_up, mul_up(g_out, nonneg_sum_up(abs_hat, 2 * cat + 2)));
        ref_.out.values[y_at] = ar.nearest(sc.acc);
        ref_.bound.values[y_at] = bound;
        ref_.magnitude.values[y_at] = mag;
        // |nearest(Ô_c)| ≤ |Ô_c|(1 + 2^-53), and |O_c| ≥ |Ô_c| − B_c.
        const double mag_low =
            sub_down(div_down(nonneg_sum_down(mag, 2 * cat + 2), add_up(1.0, 0x1p-53)), prop_up);
        const double allowed = mul_down(allowed_rel, mag_low);
        const double e = allowed > 0 ? bound / allowed : (bound > 0 ? kInf : 0.0);
        excess[static_cast<std::size_t>(t)] =
            std::max(excess[static_cast<std::size_t>(t)], std::isnan(e) ? kInf : e);
      }
    });
    return *std::max_element(excess.begin(), excess.end());
  }

 private:
  const BlockProblem& p_;
  const BlockInputs& in_;
  const ReferenceOptions& opt_;
  BlockReference& ref_;
};

}  // namespace

BlockReference reference_block(const BlockProblem& p, const BlockInputs& in, const ReferenceOptions& opt) {
  detail::require_valid(p, in);
  const BlockShape& s = p.shape;
  BlockReference ref;
  ref.out = Tensor({s.batch, s.q_len, s.model_dim});
  ref.bound = Tensor(ref.out.shape);
  ref.magnitude = Tensor(ref.out.shape);
  ref.fully_masked.assign(static_cast<std::size_t>(s.batch * s.q_heads * s.q_len), 0);
  std::vector<std::uint8_t> fast_ok(static_cast<std::size_t>(s.batch), 0);
  if (opt.method == ReferenceMethod::fast && opt.backend == ReferenceBackend::mpfr)
    fast_ok = detail::fast_block(p, in, opt, ref);
  BlockRun run(p, in, opt, ref);
  for (std::int64_t b = 0; b < s.batch; ++b) {
    if (fast_ok[static_cast<std::size_t>(b)] != 0) continue;
    if (opt.method == ReferenceMethod::fast && opt.backend == ReferenceBackend::mpfr) ++ref.stats.redone_batches;
    bool ok = false;
    if (opt.backend == ReferenceBackend::mpfr) {
      for (long prec = 192;;) {
        const double excess = run.batch(detail::MpfrArith(prec), b);
        ok = excess <= 1;
        if (ok || prec >= kMaxBlockPrecision) break;
        prec = detail::next_precision(prec, excess, kMaxBlockPrecision);
      }
    } else {
      ok = run.batch(detail::BinFloatArith<256>(), b) <= 1 || run.batch(detail::BinFloatArith<512>(), b) <= 1;
    }
    ref.certified = ref.certified && ok;
  }
  return ref;
}

}  // namespace headroom
