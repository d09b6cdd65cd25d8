// headroom — the operands of one block attention row for the multiprecision row (mp_row.h).
#pragma once

#include <cstdint>

#include "mp_row.h"

namespace headroom::detail {

// The operands of one block attention row for mp_row (see mp_row.h): held
// values q̂, k̂, v̂ (rows of k and v `k_stride`, `v_stride` apart) and bounds a
// with a ≥ |exact| and |held − exact| ≤ γ'·a (γ' = gin); abs_dot[j] ≥ Σ_c a_q,c·a_k,jc.
template <class Ar>
struct BlockSource {
  using Num = typename Ar::Num;
  const Num* q;
  const double* aq;
  const Num* k;
  const double* ak;
  std::int64_t k_stride;
  const Num* v;
  const double* av;
  std::int64_t v_stride;
  std::int64_t dk, dv;
  double gin;
  const double* abs_dot;

  std::int64_t key_dim() const { return dk; }
  std::int64_t value_dim() const { return dv; }
  double gamma_in() const { return gin; }
  double abs_dot_up(std::int64_t j) const { return abs_dot[j]; }
  double abs_v(std::int64_t j, std::int64_t d) const { return av[j * v_stride + d]; }
  void begin_row(const Ar&, MpWorkspace<Ar>&) const {}
  void dot(const Ar& ar, MpWorkspace<Ar>& ws, Num& acc, std::int64_t j) const {
    ar.zero(acc);
    for (std::int64_t c = 0; c < dk; ++c) ar.add_prod(acc, ws.tmp, q[c], k[j * k_stride + c]);
  }
  void add_v(const Ar& ar, Num& acc, Num& tmp, const Num& w, std::int64_t j, std::int64_t d) const {
    ar.add_prod(acc, tmp, w, v[j * v_stride + d]);
  }
};

}  // namespace headroom::detail
