// headroom — the fast row kernels (forward, fast_row.h; backward, backward_kernels.h) compiled for AVX2 + FMA, chosen at run time.
#include <algorithm>
#include <bit>
#include <cmath>
#include <cstdint>
#include <type_traits>

#include "backward_kernels.h"
#include "fast_row.h"

#if (defined(__x86_64__) || defined(__i386__)) && (defined(__GNUC__) || defined(__clang__))
#include <immintrin.h>
#define HEADROOM_HAVE_AVX2_KERNEL 1
#endif

namespace headroom::detail::fast_avx2 {

#ifdef HEADROOM_HAVE_AVX2_KERNEL

// Every function below is compiled for AVX2 + FMA with contraction off: the
// error-free transformations need each operation rounded exactly as written.
#if defined(__clang__)
#pragma clang attribute push(__attribute__((target("avx2,fma"))), apply_to = function)
#pragma clang fp contract(off)
#else
#pragma GCC push_options
#pragma GCC target("avx2,fma")
#pragma GCC optimize("fp-contract=off")
#endif

namespace {

struct Vec {
  __m256d x;
};
inline Vec vadd(Vec a, Vec b) { return {_mm256_add_pd(a.x, b.x)}; }
inline Vec vsub(Vec a, Vec b) { return {_mm256_sub_pd(a.x, b.x)}; }
inline Vec vmul(Vec a, Vec b) { return {_mm256_mul_pd(a.x, b.x)}; }
inline Vec vfma(Vec a, Vec b, Vec c) { return {_mm256_fmadd_pd(a.x, b.x, c.x)}; }
inline Vec vfms(Vec a, Vec b, Vec c) { return {_mm256_fmsub_pd(a.x, b.x, c.x)}; }
inline Vec vabs(Vec a) { return {_mm256_andnot_pd(_mm256_set1_pd(-0.0), a.x)}; }
inline Vec vzero() { return {_mm256_setzero_pd()}; }
inline Vec vset1(double d) { return {_mm256_set1_pd(d)}; }
inline Vec vload(const double* p) { return {_mm256_loadu_pd(p)}; }
inline void vstore(double* p, Vec a) { _mm256_storeu_pd(p, a.x); }
inline double fma1(double a, double b, double c) { return __builtin_fma(a, b, c); }
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

#if defined(__clang__)
#pragma clang attribute pop
#else
#pragma GCC pop_options
#endif

bool available() { return __builtin_cpu_supports("avx2") && __builtin_cpu_supports("fma"); }

#else

bool available() { return false; }
void group(const FastRowArgs* rows, FastRowOut* outs, int count) { fast_baseline::group(rows, outs, count); }
void weighted(const FastRowArgs* rows, int count) { fast_baseline::weighted(rows, count); }
void backward_dp(const BackwardRowArgs& a) { fast_baseline::backward_dp(a); }
void backward_dq_grid(const BackwardRowArgs& a) { fast_baseline::backward_dq_grid(a); }
void backward_dq_cascade(const BackwardRowArgs& a) { fast_baseline::backward_dq_cascade(a); }
void backward_kv_scatter(const BackwardRowArgs* rows, int count, std::int64_t tk) {
  fast_baseline::backward_kv_scatter(rows, count, tk);
}
void backward_renormalise(double* hi, double* lo, std::int64_t count) { fast_baseline::backward_renormalise(hi, lo, count); }

#endif

}  // namespace headroom::detail::fast_avx2
