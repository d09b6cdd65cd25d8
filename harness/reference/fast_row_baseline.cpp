// headroom — the fast row kernel for the baseline instruction set (no AVX2 assumed).
//
// Same source as fast_row_avx2.cpp (fast_row.inc), with Vec a plain array of
// kLanes doubles and std::fma, which is exact everywhere (ISO C 7.12.13.1):
// the two builds perform the same IEEE operations and return the same bits.
#include <algorithm>
#include <bit>
#include <cmath>
#include <cstdint>
#include <type_traits>

#include "backward_kernels.h"
#include "fast_row.h"

namespace headroom::detail::fast_baseline {

#if defined(__clang__)
#pragma clang fp contract(off)
#else
#pragma GCC push_options
#pragma GCC optimize("fp-contract=off")
#endif

namespace {

struct Vec {
  double x[kLanes];
};
template <class F>
inline Vec lanes(F f) {
  Vec r;
  for (std::int64_t l = 0; l < kLanes; ++l) r.x[l] = f(l);
  return r;
}
inline Vec vadd(Vec a, Vec b) { return lanes([&](std::int64_t l) { return a.x[l] + b.x[l]; }); }
inline Vec vsub(Vec a, Vec b) { return lanes([&](std::int64_t l) { return a.x[l] - b.x[l]; }); }
inline Vec vmul(Vec a, Vec b) { return lanes([&](std::int64_t l) { return a.x[l] * b.x[l]; }); }
inline Vec vfma(Vec a, Vec b, Vec c) { return lanes([&](std::int64_t l) { return std::fma(a.x[l], b.x[l], c.x[l]); }); }
// a·b − c as a·b + (−c): the same exact value rounded once, so the same bits as
// the AVX2 fmsub (IEEE 754-2019 §5.4.1: subtraction is addition of the negation).
inline Vec vfms(Vec a, Vec b, Vec c) { return lanes([&](std::int64_t l) { return std::fma(a.x[l], b.x[l], -c.x[l]); }); }
inline Vec vabs(Vec a) { return lanes([&](std::int64_t l) { return std::fabs(a.x[l]); }); }
inline Vec vzero() { return lanes([](std::int64_t) { return 0.0; }); }
inline Vec vset1(double d) { return lanes([&](std::int64_t) { return d; }); }
inline Vec vload(const double* p) { return lanes([&](std::int64_t l) { return p[l]; }); }
inline void vstore(double* p, Vec a) {
  for (std::int64_t l = 0; l < kLanes; ++l) p[l] = a.x[l];
}
inline double fma1(double a, double b, double c) { return std::fma(a, b, c); }
inline Vec fma1(Vec a, Vec b, Vec c) { return vfma(a, b, c); }
inline double abs1(double a) { return std::fabs(a); }
inline Vec abs1(Vec a) { return vabs(a); }
inline Vec operator+(Vec a, Vec b) { return vadd(a, b); }
inline Vec operator-(Vec a, Vec b) { return vsub(a, b); }
inline Vec operator*(Vec a, Vec b) { return vmul(a, b); }
inline Vec operator+(Vec a, double b) { return vadd(a, vset1(b)); }

#include "fast_row.inc"
#include "backward_row.inc"

}  // namespace

void group(const FastRowArgs* rows, FastRowOut* outs, int count) { group_kernel(rows, outs, count); }
void weighted(const FastRowArgs* rows, int count) { weighted_group_kernel(rows, count); }
void backward_dp(const BackwardRowArgs& a) { backward_dp_kernel(a); }
void backward_dq_grid(const BackwardRowArgs& a) { backward_dq_grid_kernel(a); }
void backward_dq_cascade(const BackwardRowArgs& a) { backward_dq_cascade_kernel(a); }
void backward_kv_scatter(const BackwardRowArgs* rows, int count, std::int64_t tk) {
  backward_kv_scatter_kernel(rows, count, tk);
}
void backward_renormalise(double* hi, double* lo, std::int64_t count) { backward_renormalise_kernel(hi, lo, count); }

#if !defined(__clang__)
#pragma GCC pop_options
#endif

}  // namespace headroom::detail::fast_baseline
