// headroom — limits as functions of the case shape, and the built-in default budgets (budget.h).
#include <algorithm>
#include <cmath>
#include <cstdio>
#include <limits>
#include <stdexcept>
#include <string>

#include "headroom/budget.h"

namespace headroom {
namespace {

constexpr double kInf = std::numeric_limits<double>::infinity();

// Precision p of each output format (u = 2^-p; format.h), for working_bits = 0.
int output_bits(double u_output) { return -std::ilogb(u_output); }

Limit probabilistic(double lambda, int working_bits, std::string origin) {
  Limit l;
  l.kind = Limit::Kind::probabilistic;
  l.lambda = lambda;
  l.working_bits = working_bits;
  l.origin = std::move(origin);
  return l;
}

Limit fixed(double value, std::string origin) {
  Limit l;
  l.kind = Limit::Kind::fixed;
  l.value = value;
  l.origin = std::move(origin);
  return l;
}

Limit none(std::string origin) {
  Limit l;
  l.origin = std::move(origin);
  return l;
}

// λ for the maximum over a case. The Higham–Mary bound holds for one sum with
// probability ≥ 1 − 2n·exp(−λ²(1−u)²/2) under independent mean-zero rounding
// errors; λ = 4 is a few standard deviations of the observed errors (which
// typically sit near √n·u with a constant below one), and leaves the γ_n
// ceiling in charge for n < 16, where a worst case is cheap to allow.
constexpr double kLambdaMax = 4.0;
// λ for the RMS: the RMS is a typical error, not an extreme one, so one
// standard deviation of the model, λ = 1.
constexpr double kLambdaRms = 1.0;
// "No worse than k× the plain kernel" is a common rule of thumb; k = 4 with the
// plain figure floored at correct rounding (PlainRatio) leaves room for a
// different summation order (√-type noise of the same size) and refuses a
// kernel that loses two bits against the textbook method.
constexpr double kPlainRatio = 4.0;

}  // namespace

std::int64_t accumulation_length(const CoreShape& s) {
  // Dk products summed per score, Tk exponentials summed for the normaliser,
  // Tk products summed for P·V, and 5 single roundings on the way (scale
  // multiply, max subtraction, exp counted twice, division). Errors of a chain
  // add: γ_a + γ_b ≤ γ_{a+b} (Higham 2002, Lemma 3.3).
  return 2 * s.kv_len + s.key_dim + 5;
}

std::int64_t gradient_accumulation_length(const CoreShape& s) {
  const std::int64_t group = s.kv_heads > 0 ? s.q_heads / s.kv_heads : 1;
  return std::max(group * s.q_len, s.kv_len) + s.key_dim + s.value_dim + 5;
}

std::int64_t accumulation_length(const BlockShape& s) {
  return accumulation_length(s.core()) + s.model_dim + s.q_heads * s.value_dim;
}

std::int64_t accumulation_length(const Case& c) {
  return c.level == Level::core ? accumulation_length(c.core.shape) : accumulation_length(c.block.shape);
}

double gamma_n(std::int64_t n, double u) {
  const double nu = static_cast<double>(n) * u;
  return nu >= 1 ? kInf : nu / (1 - nu);
}

double gamma_tilde_n(double lambda, std::int64_t n, double u) {
  const double nd = static_cast<double>(n);
  return std::expm1(lambda * std::sqrt(nd) * u + nd * u * u / (1 - u));
}

double Limit::relative_at(std::int64_t n, double u_output) const {
  switch (kind) {
    case Kind::none: return kInf;
    case Kind::fixed: return value;
    case Kind::probabilistic: {
      const double u = std::ldexp(1.0, -(working_bits > 0 ? working_bits : output_bits(u_output)));
      const double prob = gamma_tilde_n(lambda, n, u);
      return ceiling ? std::min(prob, gamma_n(n, u)) : prob;
    }
  }
  return kInf;
}

std::string Limit::describe(std::int64_t n, double u_output) const {
  char buf[160];
  switch (kind) {
    case Kind::none: return "none";
    case Kind::fixed:
      std::snprintf(buf, sizeof buf, "%.6g%s", value, score_conditioned ? " plus worst-case score conditioning" : "");
      return buf;
    case Kind::probabilistic: {
      const int bits = working_bits > 0 ? working_bits : output_bits(u_output);
      const double u = std::ldexp(1.0, -bits);
      const bool capped = ceiling && gamma_n(n, u) < gamma_tilde_n(lambda, n, u);
      std::snprintf(buf, sizeof buf, "%s with lambda %g, n = %lld, u = 2^-%d",
                    capped ? "gamma_n (the worst-case ceiling)" : "the probabilistic bound", lambda,
                    static_cast<long long>(n), bits);
      return buf;
    }
  }
  return "?";
}

bool KernelBudget::tolerates(FaultClass c) const {
  return std::find(tolerated_faults.begin(), tolerated_faults.end(), c) != tolerated_faults.end();
}

double KernelBudget::scaled_error_limit(std::int64_t n, Format output_format) const {
  const double u = unit_roundoff(output_format);
  if (max_scaled_error.kind != Limit::Kind::probabilistic) return max_scaled_error.relative_at(n, u);
  return max_scaled_error.relative_at(n, u) / u;
}

double KernelBudget::score_conditioning(const CaseScore& s, double lambda) const {
  if (s.score_terms <= 0) return 0.0;
  const double us = std::ldexp(1.0, -score_bits);
  return 2.0 * std::min(gamma_tilde_n(lambda, s.score_terms, us), gamma_n(s.score_terms, us)) / s.unit_roundoff;
}

double KernelBudget::fp8_score_conditioning(const CaseScore& s) const {
  if (s.score_terms <= 0) return 0.0;
  return 2.0 * gamma_n(s.score_terms + 2, std::ldexp(1.0, -score_bits)) / s.unit_roundoff;
}

double KernelBudget::p_floor(const CaseScore& s, std::size_t r) {
  // A none limit stays +inf; a finite one may not be relaxed by an infinite floor.
  return r < s.row_p_floor.size() && std::isfinite(s.row_p_floor[r]) ? s.row_p_floor[r] : 0.0;
}

double KernelBudget::row_scaled_error_limit(std::int64_t n, const CaseScore& s, std::size_t r) const {
  const double base = scaled_error_limit(n, s.format) + p_floor(s, r);
  if (r >= s.row_score_magnitude.size()) return base;
  if (max_scaled_error.kind == Limit::Kind::probabilistic)
    return base + score_conditioning(s, max_scaled_error.lambda) * s.row_score_magnitude[r];
  if (max_scaled_error.kind == Limit::Kind::fixed && max_scaled_error.score_conditioned)
    return base + fp8_score_conditioning(s) * s.row_score_magnitude[r];
  return base;
}

double KernelBudget::rel_rmse_limit(std::int64_t n, const CaseScore& s) const {
  if (max_rel_rmse.kind != Limit::Kind::probabilistic) return max_rel_rmse.relative_at(n, s.unit_roundoff);
  const double kappa = s.rms_expected > 0 ? std::max(1.0, s.rms_magnitude / s.rms_expected) : kInf;
  double z_max = 0;
  for (double z : s.row_score_magnitude) z_max = std::max(z_max, z);
  const double conditioning = score_conditioning(s, max_rel_rmse.lambda) * s.unit_roundoff * z_max;
  return (max_rel_rmse.relative_at(n, s.unit_roundoff) + conditioning) * kappa;
}

double KernelBudget::gradient_scaled_error_limit(std::int64_t n, const CaseScore& fwd, int paths) const {
  const double u = unit_roundoff(fwd.format);
  if (max_gradient_scaled_error.kind != Limit::Kind::probabilistic) return max_gradient_scaled_error.relative_at(n, u);
  double z_max = 0;
  for (double z : fwd.row_score_magnitude) z_max = std::max(z_max, z);
  return max_gradient_scaled_error.relative_at(n, u) / u +
         paths * score_conditioning(fwd, max_gradient_scaled_error.lambda) * z_max;
}

KernelBudget default_budget(Format input) {
  const std::string origin = "default for " + std::string(format_name(input));
  KernelBudget b;
  // ULP distance punishes cancellation: an output near zero from cancelling
  // values has a huge ULP error at a tiny scaled error, so no default — the
  // scaled error is the figure that transfers across shapes (DESIGN.md). Set
  // max_ulp in a file for suites without cancellation.
  b.max_ulp = none(origin);
  b.max_ratio_to_plain = fixed(kPlainRatio, origin);
  b.max_gradient_ratio_to_plain = fixed(kPlainRatio, origin);
  b.tolerated_origin = origin;
  // Scores formed in float32 (float64 for float64 inputs): float32 kernels;
  // half-precision kernels accumulating QKᵀ in float32, as tensor-core kernels
  // do (common practice); int8 kernels, whose int32 dot products are exact and
  // are scaled in float32. A kernel forming scores in binary16 sets
  // score_bits = 11 in its budget section.
  b.score_bits = input == Format::float64 ? 53 : 24;
  b.score_bits_origin = origin;
  switch (input) {
    // float64, float32: the kernel computes in its output format; u_w = u_F.
    case Format::float64:
    case Format::float32:
    // binary16, bfloat16: u_w = u_F covers both a kernel accumulating in the
    // half format (errors ~√n·u_F) and one accumulating in float32 (errors
    // ~1 unit, the final rounding). γ_n has no finite value once n·u ≥ 1
    // (binary16 n ≥ 2048, bfloat16 n ≥ 256): there the λ√n·u bound stands alone.
    case Format::binary16:
    case Format::bfloat16:
      b.max_scaled_error = probabilistic(kLambdaMax, 0, origin);
      b.max_rel_rmse = probabilistic(kLambdaRms, 0, origin);
      // Gradients: the same bound at the backward's own accumulation length
      // (gradient_accumulation_length), in units of each element's magnitude.
      b.max_gradient_scaled_error = probabilistic(kLambdaMax, 0, origin);
      break;
    // int8: the output is float32, but an int8 kernel may also quantise the
    // probabilities to 8-bit codes for an integer P·V (as i8_tokenwise does):
    // rounding p̃_j to a multiple of max p̃ / 255 costs up to max p̃ / 510 ≈
    // 2^-9 of the row's largest weight per key. So u_w = 2^-9: the working
    // precision of such a product, not float32's.
    case Format::int8:
      b.max_scaled_error = probabilistic(kLambdaMax, 9, origin);
      b.max_rel_rmse = probabilistic(kLambdaRms, 9, origin);
      b.max_gradient_scaled_error = probabilistic(kLambdaMax, 9, origin);  // no int8 backward is judged yet
      break;
    // e4m3, e5m2: the output is float32 and the inputs are exact once decoded
    // (the reference judges the received values), but such kernels commonly
    // round the probabilities to 8 bits before P·V (p_quant). Rounding each
    // weight costs at most u_P of it (u_P = 2^-4 E4M3, 2^-3 E5M2; fp8.h), and
    // normalising by the rounded or the unrounded sum adds at most u_P more:
    // 2·u_P·Σ_j p_j|v_j| per element, whatever Tk, i.e. a scaled error of
    // 2·u_P / 2^-24 = 2^21 (E4M3) or 2^22 (E5M2). The per-element figure is
    // the right one here (it holds under cancellation); the relative RMSE has
    // no default. Kernels that keep P in float32 should set tighter limits.
    // Each row adds what forming its scores in float32 may cost (score
    // conditioning; scores.h row_score_magnitude, docs/budget-format.md). The
    // E4M3/E5M2 rounding of Q and K is not in it: the reference judges the
    // received (decoded) values, so that rounding is the input's error, shown
    // by the quantisation split. What the kernel adds: a score z_j =
    // s·sq·sk·Σ_d c_qd·c_kjd (+ bias) from codes c; each code product is exact
    // (4 + 4 ≤ 24 bits, 3 + 3 for E5M2), the float32 sum of Dk of them costs
    // γ_{Dk−1}(u_s)·Σ_d |c_qd c_kjd|, and the products s·sq·sk·dot and the bias
    // add four roundings: |δz_j| ≤ γ_{Dk+3}(u_s)·Z_r = γ_{m+2}(u_s)·Z_r with
    // m = Dk + 1 (scores.h score_terms) and Z_r = max_j |s|·Σ_d|q_d||k_jd| +
    // |bias_j| over the decoded values (Higham 2002, §3.1 and Lemma 3.3). An
    // absolute error δ in every score moves each weight by a relative e^{±2δ}−1
    // and the row by up to 2δ·Σ_j p_j|v_j| (score_magnitude.cpp), so the row's
    // limit grows by 2·γ_{m+2}(u_s)·Z_r / u_F: worst-case γ, like the fixed
    // 2·u_P it sits beside. It matters where Z_r is large: a key entry of
    // 5000 (fp8_scales, outlier_tensor) met by a query entry of 3 at Dk = 128
    // gives Z ≈ 5000·3/√128 ≈ 1300 and a term of 2·131·1300 ≈ 3.4e5 ≈ 2^18.4,
    // a sixth of 2^21 (computed from the formula, not measured).
    case Format::e4m3:
    case Format::e5m2:
      b.max_scaled_error = fixed(input == Format::e4m3 ? 0x1p21 : 0x1p22, origin);
      b.max_scaled_error.score_conditioned = true;
      b.max_rel_rmse = none(origin);
      break;
  }
  return b;
}

}  // namespace headroom
