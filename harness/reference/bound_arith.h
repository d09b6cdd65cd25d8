// headroom — directed-rounding helpers for error bounds computed in double.
//
// Every error bound the reference reports is computed in binary64 from
// nonnegative quantities. To keep a bound an upper bound although the double
// arithmetic that computes it rounds, each operation is done in the default
// round-to-nearest mode and then stepped one ulp towards +inf: for an exact
// real x and its rounding RN(x), |RN(x) − x| ≤ ½ ulp, so nextafter(RN(x), +inf)
// ≥ x — also in the subnormal range, where ulp is the constant 2^-1074, and at
// a power of two (where the ulp below is half the ulp above: the step is still
// at least the rounding error). Lower bounds step towards 0 the same way and
// are clamped at 0. This is the whole rounding analysis of the bound
// arithmetic; nothing here relies on the rounding mode being changed.
#pragma once

#include <bit>
#include <cmath>
#include <cstdint>
#include <limits>

namespace headroom::detail {

inline constexpr double kInf = std::numeric_limits<double>::infinity();

/// Returns: std::nextafter(x, +inf), inline: for x > 0 finite the next
/// encoding up (IEEE 754-2019 §3.4: positive doubles are ordered as their bit
/// patterns, +inf just after the largest finite), for ±0 the smallest
/// subnormal; anything else (negative, inf, NaN) as the library does it.
inline double step_up(double x) {
  if (x > 0 && x < kInf) return std::bit_cast<double>(std::bit_cast<std::uint64_t>(x) + 1);
  if (x == 0) return std::numeric_limits<double>::denorm_min();
  return std::nextafter(x, kInf);
}
/// Returns: the double just below x > 0 (std::nextafter(x, 0)), 0 otherwise (NaN included).
inline double step_down_clamped(double x) {
  return x > 0 ? std::bit_cast<double>(std::bit_cast<std::uint64_t>(x) - 1) : 0.0;
}

/// Returns: an upper bound of a + b (a, b ≥ 0).
inline double add_up(double a, double b) { return step_up(a + b); }
/// Returns: an upper bound of a · b (a, b ≥ 0).
inline double mul_up(double a, double b) { return step_up(a * b); }
/// Returns: an upper bound of a / b (a ≥ 0, b > 0).
inline double div_up(double a, double b) { return step_up(a / b); }
/// Returns: a lower bound ≥ 0 of a · b (a, b ≥ 0).
inline double mul_down(double a, double b) { return step_down_clamped(a * b); }
/// Returns: a lower bound ≥ 0 of a / b (a ≥ 0, b > 0).
inline double div_down(double a, double b) { return step_down_clamped(a / b); }
/// Returns: a lower bound ≥ 0 of a − b (a, b ≥ 0); 0 when b ≥ a.
inline double sub_down(double a, double b) { return step_down_clamped(a - b); }

/// Returns: an upper bound of the unit roundoff 2^-p of a p-bit format.
inline double unit(long p) { return std::ldexp(1.0, static_cast<int>(-p)); }

/// Returns: an upper bound of γ_n = n·u / (1 − n·u) (Higham 2002, Accuracy and
/// Stability of Numerical Algorithms, 2nd ed., §3.1, eq. 3.8), the bound of n
/// relative rounding errors: |Π(1+δ_i)^{±1} − 1| ≤ γ_n when |δ_i| ≤ u and n·u < 1.
/// Returns +inf when n·u ≥ 1/2 (no useful bound).
inline double gamma_up(std::int64_t n, double u) {
  const double nu = mul_up(static_cast<double>(n), u);  // n < 2^53: exact conversion
  if (!(nu < 0.5)) return kInf;
  return div_up(nu, std::nextafter(1.0 - nu, 0.0));
}

/// nonneg_sum_up (below) with its two constants computed once for a fixed `ops`, for
/// loops over many sums: NonnegSumUp(ops)(computed) is nonneg_sum_up(computed, ops), bit for bit.
struct NonnegSumUp {
  double slack, factor;
  explicit NonnegSumUp(std::int64_t ops)
      : slack(mul_up(static_cast<double>(ops), 0x1p-1074)), factor(add_up(1.0, gamma_up(ops, 0x1p-53))) {}
  double operator()(double computed) const { return mul_up(add_up(computed, slack), factor); }
};

/// Returns: an upper bound of a sum of n nonnegative exact terms whose values
/// (each a product or sum of doubles) were computed in round-to-nearest double
/// as `computed` with at most `ops` operations on any path. Each operation
/// errs by a factor (1+δ), |δ| ≤ 2^-53, in the normal range, or by at most
/// 2^-1075 absolutely in the subnormal range (IEEE 754-2019 §4.3.1, §7.5), so
/// exact ≤ (computed + ops·2^-1074)·(1 + γ_ops).
inline double nonneg_sum_up(double computed, std::int64_t ops) { return NonnegSumUp(ops)(computed); }

/// Returns: an upper bound of sqrt(Σ x_c²) for n values `stride` apart.
inline double norm_up(const double* x, std::int64_t n, std::int64_t stride = 1) {
  double s = 0;
  for (std::int64_t c = 0; c < n; ++c) s += x[c * stride] * x[c * stride];
  return std::nextafter(std::sqrt(nonneg_sum_up(s, 2 * n)), kInf);  // sqrt is correctly rounded (IEEE 754 §5.4.1)
}

/// Returns: an upper bound of e^r − 1 for 0 ≤ r ≤ 2^-10, via e^r − 1 ≤ r + r²
/// (the series r + r²/2 + r³/6 + … is below r + r²(e − 2) for r ≤ 1); +inf
/// beyond 2^-10, where the reference treats the quantity as uncertifiable
/// instead of trusting a library exp.
inline double expm1_up(double r) {
  if (!(r <= 0x1p-10)) return kInf;
  return add_up(r, mul_up(r, r));
}

/// Returns: an upper bound of e^r/(1 − u) − 1 (0 ≤ r ≤ 2^-10, u ≤ 2^-53): the
/// relative uncertainty of a weight ŵ = RN(exp(t̂)) whose true exponent is
/// within r of t̂ — the exact weight lies in ŵ·[e^-r/(1+u), e^r/(1−u)], and
/// the upper deviation is the larger one. Computed as (e^r − 1 + u)/(1 − u).
inline double weight_uncertainty_up(double r, double u) {
  return div_up(add_up(expm1_up(r), u), std::nextafter(1.0 - u, 0.0));
}

}  // namespace headroom::detail
