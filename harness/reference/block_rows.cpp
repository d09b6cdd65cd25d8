// headroom — block attention rows in MPFR on double-double inputs (see block_rows.h, fast_block.cpp (2)).
#include "block_rows.h"

#include <algorithm>
#include <cmath>

#include "block_source.h"
#include "bound_arith.h"
#include "input_check.h"

namespace headroom::detail {

bool BlockRows::run(std::int64_t row, CoreReference& ref, const std::uint8_t* want, bool with_lse) {
  const CoreShape& s = p_.shape;
  const std::int64_t i = row % s.q_len, h = (row / s.q_len) % s.q_heads, b = row / (s.q_len * s.q_heads);
  const std::int64_t g = kv_head_of(s, h), dk = s.key_dim, dv = s.value_dim;
  visible_keys(s, p_.mask, b, h, i, keys_, bias_);
  const auto n = static_cast<std::int64_t>(keys_.size());
  if (n == 0) {
    write_fully_masked(row, ref);
    return true;
  }
  const auto qat = static_cast<std::size_t>(hi_.q.offset(b, h, i, 0));
  const auto kat = static_cast<std::size_t>(hi_.k.offset(b, g, 0, 0));
  const auto vat = static_cast<std::size_t>(hi_.v.offset(b, g, 0, 0));
  const double* aq = &aq_[qat];
  const double* ak = &ak_[kat];
  // Prepass in double: Ā_j, and rough scores that only steer the precision (as mp_core.cpp).
  abs_dot_.resize(static_cast<std::size_t>(s.kv_len));
  double a_max = 0, z_max = -kInf, z_min = kInf;
  for (std::int64_t idx = 0; idx < n; ++idx) {
    const std::int64_t j = keys_[static_cast<std::size_t>(idx)];
    double a = 0, z = 0;
    for (std::int64_t c = 0; c < dk; ++c) {
      a += aq[c] * ak[j * dk + c];
      z += hi_.q.values[qat + static_cast<std::size_t>(c)] * hi_.k.values[kat + static_cast<std::size_t>(j * dk + c)];
    }
    abs_dot_[static_cast<std::size_t>(j)] = nonneg_sum_up(a, 2 * dk);
    const double beta = bias_.empty() ? 0.0 : bias_[static_cast<std::size_t>(idx)];
    z = p_.scale * z + beta;
    a_max = std::max(a_max, std::fabs(p_.scale) * abs_dot_[static_cast<std::size_t>(j)] + std::fabs(beta));
    z_max = std::max(z_max, z);
    z_min = std::min(z_min, z);
  }
  const double r = 2.0 * static_cast<double>(dk + 3) * a_max + 2.0 * (z_max - z_min) + 2.0 * static_cast<double>(n) + 8;
  long prec = a_priori_precision(target_log2, r, kMaxBlockRowPrecision);

  RowSpec spec;
  spec.keys = keys_.data();
  spec.bias = bias_.empty() ? nullptr : bias_.data();
  spec.n = n;
  spec.scale = p_.scale;
  spec.target_log2 = target_log2;
  for (;;) {
    const MpfrArith ar(prec);
    max_precision = std::max(max_precision, prec);
    load(ar, q_, qat, dk, 1, nullptr, hi_.q, wide_.q_lo);
    load(ar, k_, kat, dk, s.kv_len, &keys_, hi_.k, wide_.k_lo);
    load(ar, v_, vat, dv, s.kv_len, &keys_, hi_.v, wide_.v_lo);
    keep_.resize(static_cast<std::size_t>(dv));
    const BlockSource<MpfrArith> src{q_.data(), aq, k_.data(), ak, dk, v_.data(), &av_[vat], dv, dk, dv, gin_,
                                     abs_dot_.data()};
    RowOut<Num> o;
    const auto at = static_cast<std::size_t>(row * dv);
    o.out = &ref.out.values[at];
    o.bound = &ref.bound.values[at];
    o.magnitude = &ref.magnitude.values[at];
    if (with_lse) {
      o.lse = &ref.lse.values[static_cast<std::size_t>(row)];
      o.lse_bound = &ref.lse_bound.values[static_cast<std::size_t>(row)];
    }
    o.want = want;
    o.keep = keep_.data();
    const RowVerdict verdict = mp_row(ar, ws_, src, spec, o);
    if (verdict.certified || prec >= kMaxBlockRowPrecision) {
      for (std::int64_t d = 0; d < dv; ++d) {
        if (want != nullptr && want[d] == 0) continue;
        ++elements;
        // keep − hi is exact at p bits (|keep − hi| ≤ ½ulp₅₃(hi)); lo = RN of it.
        const double hi = ref.out.values[at + static_cast<std::size_t>(d)];
        mpfr_sub_d(MpfrArith::raw(keep_[static_cast<std::size_t>(d)]), MpfrArith::raw(keep_[static_cast<std::size_t>(d)]),
                   hi, MPFR_RNDN);
        wide_.out_lo[at + static_cast<std::size_t>(d)] = ar.nearest(keep_[static_cast<std::size_t>(d)]);
        double& bound = ref.bound.values[at + static_cast<std::size_t>(d)];
        bound = add_up(bound, add_up(mul_up(0x1p-105, std::fabs(hi)), 0x1p-1074));
      }
      return verdict.certified;
    }
    prec = next_precision(prec, verdict.worst_excess, kMaxBlockRowPrecision);
  }
}

// Sets dst's rows (row 0 when `keys` is null, else the rows in keys) of
// `cols` values, hi and lo read from `at` with row stride cols, to hi + lo
// at the arithmetic's precision.
void BlockRows::load(const MpfrArith& ar, std::vector<Num>& dst, std::size_t at, std::int64_t cols, std::int64_t rows,
                 const std::vector<std::int64_t>* keys, const Tensor& hi, const Tensor& lo) {
  if (dst.size() < static_cast<std::size_t>(rows * cols)) dst.resize(static_cast<std::size_t>(rows * cols));
  auto one = [&](std::int64_t j) {
    for (std::int64_t c = 0; c < cols; ++c) {
      const auto e = static_cast<std::size_t>(j * cols + c);
      ar.init(dst[e]);
      ar.set_d(dst[e], hi.values[at + e]);
      ar.add_d(dst[e], lo.values[at + e]);
    }
  };
  if (keys == nullptr) one(0);
  else for (const std::int64_t j : *keys) one(j);
}


}  // namespace headroom::detail
