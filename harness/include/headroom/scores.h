// headroom — error scores of a kernel's output against the certified reference.
//
// Every figure is of an obtained output o against the exact value o* (the
// reference's `out`, certified to |out − o*| ≤ bound + 2^-53·|out|), in the
// kernel's output format F with unit roundoff u = unit_roundoff(F):
//   absolute error   |o − o*|
//   relative error   |o − o*| / |o*|                 (0 when both are 0, +inf when only o* is)
//   ULP distance     steps between o and round_F(o*)  (see ulp_distance)
//   scaled error     |o − o*| / max(u·M, η_F)         M = Σ_j p_j |v_j| (reference.magnitude),
//                                                     η_F = smallest positive subnormal of F
// A result correctly rounded to F has scaled error ≤ 1: |round_F(x) − x| ≤ u·|x|
// in the normal range (Higham 2002, Thm 2.2) and ≤ η_F/2 in the subnormal range,
// and |o*| ≤ M. The η_F floor is the guard for M = 0 (o* = 0 exactly): there a
// kernel's error is counted in subnormal steps of F, never divided by zero.
//
// Excluded from every statistic and counted instead: elements of fully masked
// rows (judged by the convention detector, faults.h) and non-finite outputs
// where the reference is finite (a non_finite fault). A fault is never averaged
// into an error figure.
#pragma once

#include <array>
#include <cstdint>
#include <limits>
#include <optional>
#include <string>
#include <vector>

#include "headroom/case.h"
#include "headroom/format.h"
#include "headroom/reference.h"
#include "headroom/reference_backward.h"
#include "headroom/tensor.h"

namespace headroom {

/// Returns: the rank of round_F(x) among the values of F in increasing order,
/// counted from zero: +0 and −0 are 0, the smallest positive subnormal 1, the
/// largest finite value M_F, +inf M_F + 1; negative values mirror (rank −k).
/// For IEEE formats this is the magnitude of the bit pattern, signed.
/// Preconditions: x is not NaN. Exact (integer arithmetic on exact doubles).
std::int64_t format_rank(double x, Format f);

/// Returns: |format_rank(a) − format_rank(b)|, the number of steps between
/// round_F(a) and round_F(b): 0 for equal values (and for +0 against −0), 1 for
/// neighbours, 2 from the smallest negative subnormal to the smallest positive
/// one (through zero), 1 from 2^k to its successor and from 2^k to its
/// predecessor even though those gaps differ by a factor 2.
/// Preconditions: a and b not NaN.
std::int64_t ulp_distance(double a, double b, Format f);

/// The error of one output element.
struct ElementError {
  double abs = 0;              ///< |o − o*|
  double rel = 0;              ///< |o − o*| / |o*|
  double scaled = 0;           ///< |o − o*| / max(u·M, η_F)
  std::int64_t ulp = 0;        ///< ulp_distance(o, o*, F)
  bool ulp_uncertain = false;  ///< the certified interval of o* straddles a rounding boundary of F:
                               ///< the ULP figure may be off by one
};

/// Returns: the error of o against a reference value `ref` with certified bound
/// `bound` and magnitude M = `magnitude`, in output format f.
/// Preconditions: o, ref finite; bound, magnitude ≥ 0.
ElementError element_error(double o, double ref, double bound, double magnitude, Format f);

/// Upper edges of ulp_histogram's buckets: 0, 0.5, 1, 2, 4, …, 2^20, +inf
/// (the result record's buckets; ULP distances are integers, so the 0.5 bucket
/// stays empty).
std::vector<double> ulp_histogram_edges();

/// One element of the output, located, for a failure line.
struct WorstElement {
  std::vector<std::int64_t> index;  ///< (b, h, i, d) core, (b, i, m) block; empty when no element scored
  double expected = 0;              ///< the reference o* (rounded to double)
  double expected_in_format = 0;    ///< round_F(o*)
  double obtained = 0;              ///< o
  ElementError error;
};

/// The scores of one output against its reference.
struct CaseScore {
  Format format = Format::float32;  ///< the output format F
  double unit_roundoff = 0;         ///< u_F
  bool reference_certified = true;  ///< every reference bound met its target

  std::int64_t elements = 0;        ///< elements scored (in every statistic below)
  std::int64_t masked_rows = 0;     ///< fully masked query rows (excluded)
  std::int64_t masked_elements = 0; ///< output elements excluded because a row they depend on is fully masked
  std::int64_t non_finite = 0;      ///< NaN/Inf outputs where the reference is finite (excluded)
  std::vector<std::int64_t> first_non_finite;  ///< index of the first, empty when none

  std::int64_t max_ulp = 0;
  std::int64_t max_ulp_certain = 0; ///< max of (ulp − 1 when uncertain, else ulp): certainly reached
  std::int64_t ulp_uncertain = 0;   ///< elements whose ULP figure is uncertain by one
  double max_scaled_error = 0;
  double max_abs_error = 0;
  double rmse = 0;                  ///< √(mean (o − o*)²)
  double relative_rmse = 0;         ///< rmse / RMS(o*); 0 when both 0, +inf when only RMS(o*) is
  double relative_l1 = 0;           ///< Σ|o − o*| / Σ|o*|; 0 when both 0, +inf when only Σ|o*| is
  double cosine = 1;                ///< Σ o·o* / (‖o‖‖o*‖); 1 when both are zero vectors, 0 when one is
  double rms_expected = 0;          ///< RMS(o*)
  double rms_magnitude = 0;         ///< RMS(M): RMS(M)/RMS(o*) ≥ 1 measures the case's cancellation
  std::optional<double> lse_error;  ///< max |L − L*| over rows not fully masked; absent when no lse given
  double lse_magnitude = 0;         ///< max |L*| over the rows lse_error covers
  std::int64_t lse_non_finite = 0;  ///< non-finite L where L* is finite (excluded from lse_error)

  std::vector<double> row_max_scaled;  ///< max scaled error per output row (core (b,h,i), block (b,i)); 0 if none scored
  /// Per output row, the score magnitude Z_r = max over visible keys j of
  /// |s|·Σ_d |q_d||k_jd| + |bias_j| (block: over every head, with |q|, |k| the
  /// projections' absolute sums): a score formed in arithmetic of unit roundoff
  /// u_s is off by up to about γ_m(u_s)·Z_r, and softmax carries that error to
  /// the output as up to 2·γ_m(u_s)·Z_r·Σ_j p_j|v_j| — conditioning no kernel
  /// escapes. Empty until condition_on_scores fills it.
  std::vector<double> row_score_magnitude;
  std::int64_t score_terms = 0;      ///< m: roundings in forming one score (Dk + 1; block + Dm)
  /// Per output row, for a kernel that rounds P to 8 bits (p_quant): the
  /// scaled error that weights below the format's normal range may cost beyond
  /// the relative u_P every normal weight costs (condition_on_p_rounding).
  /// Empty when P is not rounded.
  std::vector<double> row_p_floor;

  WorstElement worst_scaled;        ///< the element of max_scaled_error
  WorstElement worst_ulp;           ///< the element of max_ulp
  std::array<std::int64_t, 24> ulp_histogram{};  ///< elements per bucket of ulp_histogram_edges()
};

/// Returns: the scores of core output `out` [B, Hq, Tq, Dv] (and, when `lse`
/// is non-null and non-empty, of log-sum-exp [B, Hq, Tq]) against `ref`, in
/// output format f. Throws std::invalid_argument when shapes differ from the
/// reference's (a caller's error: attach rejects mis-shaped output as bad_output).
CaseScore score_core(const Tensor& out, const Tensor* lse, const CoreReference& ref, Format f);

/// Returns: the scores of block output `out` [B, Tq, Dm] against `ref`. A row
/// Y[b, i, :] is excluded when query i is fully masked in any head of batch b.
/// Throws std::invalid_argument on a shape mismatch.
CaseScore score_block(const Tensor& out, const BlockReference& ref, Format f);

/// Returns: the scores of one gradient tensor `out` (dQ, dK, dV, or d(bias)
/// per query head) against its certified reference (reference_backward.h), in
/// output format f: the same figures, the scaled error in units of the
/// gradient's natural magnitude. No element is excluded: the gradient of a
/// fully masked row, or of a key no query sees, is exactly 0 and scored as
/// such (any other value is counted in subnormal steps of F).
/// Throws std::invalid_argument on a shape mismatch.
CaseScore score_gradient(const Tensor& out, const GradientReference& ref, bool certified, Format f);

/// Fills s.row_score_magnitude and s.score_terms from the values the kernel
/// received (double arithmetic: a budget coordinate, relative error ≤ 2^-50).
/// Preconditions: s scores the output of `received`.
void condition_on_scores(CaseScore& s, const Case& received);

/// Returns: "[0,1,5,3] expected 0x1.8p-3 (in format 0x1.8p-3) obtained 0x1.9p-3,
/// 2 ulp, scaled 3.1": one line, hex floats exact (STYLE.md: failure lines).
std::string describe(const WorstElement& w);
/// Returns: x as a C99 hex float ("%a"), e.g. "0x1.8p-3".
std::string hex_float(double x);

/// Ratios of a kernel's figures to those of the bundled textbook (plain) kernel
/// of the same output format on the same case.
struct PlainRatio {
  double max_scaled_error = 0;  ///< kernel / max(plain, 1): the plain kernel is credited with at
                                ///< least correct rounding (scaled error 1), so an exact plain result
                                ///< does not turn a correctly rounded one into an infinite ratio
  double rmse = 0;              ///< kernel / max(plain, u_F·RMS(M)), M = Σ_j p_j|v_j| per element: the
                                ///< same floor for RMSE (correct rounding of the row magnitude), so a
                                ///< nearly exact plain kernel on cancelling rows does not make a sound
                                ///< kernel fail; 0 when both are 0 and the floor is 0, +inf when only
                                ///< the kernel's is
  double lse = std::numeric_limits<double>::quiet_NaN();  ///< the kernel's lse_error / max(the plain
                                ///< kernel's, 8·2^-24·max(1, max|L*|)): the plain kernel is credited
                                ///< with 8 float32 roundings of the largest |L*| (the log-sum-exp is
                                ///< float32 in the ABI; 8 is common practice, no source), so a plain
                                ///< result that happens to be nearly exact does not fail a sound
                                ///< kernel; NaN when either returns no log-sum-exp
};

/// Returns: the ratios of `kernel` to `plain`.
/// Throws std::invalid_argument when the two are of different output formats.
PlainRatio ratio_to_plain(const CaseScore& kernel, const CaseScore& plain);

/// A half-precision or int8 kernel's error against the exact result on the
/// ORIGINAL source values, split into what input rounding/quantisation cost and
/// what the kernel's own arithmetic cost. The statistics do not add (maxima and
/// RMS of sums), so all three are given.
struct QuantSplit {
  CaseScore total;       ///< kernel output vs reference(source)
  CaseScore input;       ///< reference(received) vs reference(source): input-quantisation error
  CaseScore arithmetic;  ///< kernel output vs reference(received): the kernel's arithmetic error
};

/// Returns: the split for core output `out` (and optional `lse`), with
/// `of_received` the reference on what the kernel received and `of_source` the
/// reference on the case's source values (same problem, same mask).
/// Throws std::invalid_argument on a shape mismatch.
QuantSplit split_quantisation(const Tensor& out, const Tensor* lse, const CoreReference& of_received,
                              const CoreReference& of_source, Format f);
QuantSplit split_quantisation(const Tensor& out, const BlockReference& of_received,
                              const BlockReference& of_source, Format f);

/// Returns: the core attention of `in` computed in double with each
/// normalised weight p_j rounded as a kernel declaring P quantisation does:
/// p_j ← decode(fp8(p_j·p_scale)) / p_scale in `p_format` (e4m3 or e5m2),
/// saturating or not (fp8.h). Scored against the certified reference of the
/// same inputs, it is what rounding P costs apart from the rest of the
/// kernel's arithmetic: a model (double arithmetic, error ~2^-50 relative,
/// far below the 2^-4 being measured), not a certified enclosure. Fully
/// masked rows are left 0 (the scorer skips them). A saturating model of a
/// weight that overflows gives the largest finite value; a non-saturating
/// one gives NaN or infinity, as the format's conversion does.
/// Preconditions: validate(p, in) is empty.
/// Fills s.row_p_floor for a kernel rounding the probabilities to `p_format`
/// (e4m3 or e5m2) after multiplying by `p_scale`. Rounding to nearest moves a
/// weight p_j by at most u_P·p_j when p_j·p_scale is normal (≥ 2^-6 E4M3,
/// 2^-14 E5M2), in the default budget (2·u_P, defaults.cpp), and by at most
/// a_j = min(η/p_scale, p_j) below that, η half the format's smallest
/// subnormal (2^-10 E4M3, 2^-17 E5M2; OFP8 rev 1.0; derivation in
/// p_rounding.cpp). Element d of row r then moves by at most
/// Σ_j a_j|v_jd| + (Σ_j a_j)·Σ_j p_j|v_jd|, the second term for a kernel
/// normalising by the sum of the rounded weights. row_p_floor[r] is the largest over
/// d of that bound in units of u_F·Σ_j p_j|v_jd| (scores.h), computed in double
/// from the values the kernel received (a budget coordinate, relative error
/// ≤ 2^-50; elements whose Σ_j p_j|v_jd| is 0 are left out: their exact value
/// is 0 and every weight times 0 is 0).
/// Preconditions: s scores the core output of `received`; p_scale > 0.
void condition_on_p_rounding(CaseScore& s, const Case& received, Format p_format, float p_scale);

Tensor p_rounded_attention(const CoreProblem& p, const CoreInputs& in, Format p_format, float p_scale, bool saturating);

}  // namespace headroom
