// headroom — the fast row kernel compiled for AVX2 + FMA (chosen at run time, see fast_row.h).
#include <algorithm>
#include <bit>
#include <cmath>
#include <cstdint>
#include <type_traits>

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

}  // namespace

void group(const FastRowArgs* rows, FastRowOut* outs, int count) { group_kernel(rows, outs, count); }
void weighted(const FastRowArgs* rows, int count) { weighted_group_kernel(rows, count); }

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

#endif

}  // namespace headroom::detail::fast_avx2
