// headroom — error budgets: what a kernel may not exceed, read from a TOML file, and the verdict.
//
// A budget gives, per kernel name and per input format, four limits and the
// fault classes tolerated (docs/budget-format.md):
//   max_ulp             ULP distance, integer
//   max_scaled_error    |o − o*| / (u_F · Σ p|v|), in output rounding units (scores.h)
//   max_rel_rmse        relative RMSE, RMSE / RMS(o*)
//   max_ratio_to_plain  both ratios to the textbook kernel of the format (PlainRatio)
//   tolerated_faults    fault classes that do not fail the case (normally none)
//   max_growth_exponent the largest error growth exponent of the run (error_growth.h;
//                       a fixed number or none, the default): fails the run, not a case
// and, for a kernel whose backward is judged (docs/backward.md):
//   max_gradient_scaled_error    dQ, dK, dV scaled error (each element against
//                                u_F times its natural magnitude), both ways
//   max_gradient_ratio_to_plain  against the plain same-precision backward
// A limit is fixed (a number), absent ("none"), or probabilistic: it grows with
// the case's accumulation length n like λ·√n·u_w — the probabilistic rounding
// error bound of Higham & Mary (SIAM J. Sci. Comput. 41(5), 2019, Thm 3.1:
// γ̃_n(λ) = exp(λ√n·u + n·u²/(1 − u)) − 1, quoted from memory) — with the
// worst-case γ_n = n·u/(1 − n·u) (Higham 2002, §3.1, Lemma 3.1) as the hard
// ceiling. u_w = 2^-working_bits is the unit roundoff of the arithmetic the
// kernel does (by default that of its output format).
#pragma once

#include <cstdint>
#include <map>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "headroom/case.h"
#include "headroom/faults.h"
#include "headroom/kernel.h"
#include "headroom/scores.h"

namespace headroom {

/// Returns: the accumulation length n the probabilistic limits grow with:
/// core n = 2·Tk + Dk + 5 — the Dk-term dot product of a score, the Tk-term
/// normaliser Σ e_j and the Tk-term P·V sum, plus the scale multiply, the max
/// subtraction, exp (counted as two roundings: libm is faithful, not correctly
/// rounded), and the division; block n = that + Dm (the projections) + Hq·Dv
/// (the output projection). Preconditions: extents ≥ 1.
std::int64_t accumulation_length(const CoreShape& s);
std::int64_t accumulation_length(const BlockShape& s);
std::int64_t accumulation_length(const Case& c);
/// Returns: the accumulation length of the backward fed the exact O and lse:
/// max(G·Tq, Tk) + Dk + Dv + 5 with G = Hq/Hkv — dK and dV sum G·Tq terms
/// (every query row of the group), dQ sums Tk, the recomputed score Dk
/// products, dP and D_i Dv each (one chain: the longer counted), and 5 single
/// roundings (scale, lse subtraction, exp counted twice, the product P·(dP − D)).
/// End to end the forward's chain is added: gradient_accumulation_length +
/// accumulation_length (errors of a chain add, Higham 2002, Lemma 3.3).
std::int64_t gradient_accumulation_length(const CoreShape& s);

/// Returns: γ_n = n·u / (1 − n·u) (Higham 2002, §3.1), +inf when n·u ≥ 1.
double gamma_n(std::int64_t n, double u);
/// Returns: γ̃_n(λ) = exp(λ√n·u + n·u²/(1 − u)) − 1 (Higham & Mary 2019).
double gamma_tilde_n(double lambda, std::int64_t n, double u);

struct Limit {
  enum class Kind : unsigned char { none, fixed, probabilistic };
  Kind kind = Kind::none;
  double value = 0;         ///< fixed: the limit, in the figure's own unit
  double lambda = 0;        ///< probabilistic: λ > 0
  int working_bits = 0;     ///< probabilistic: u_w = 2^-working_bits; 0 = the output format's p
  bool ceiling = true;      ///< probabilistic: cap at γ_n(u_w)
  /// fixed max_scaled_error: each row's limit adds the worst-case score
  /// conditioning 2·γ_{m+2}(u_s)·Z_r / u_F (KernelBudget::row_scaled_error_limit;
  /// set by the 8-bit float defaults, whose scores carry two scale roundings more).
  bool score_conditioned = false;
  std::string origin;       ///< where it was set: "default for float32", "budget.toml line 12"

  /// Returns: the limit for a case of accumulation length n, output unit
  /// roundoff u_F, as a relative error: none +inf; fixed `value`;
  /// probabilistic min(γ̃_n(λ) at u_w, γ_n(u_w) if ceiling). Callers divide by
  /// u_F for a scaled-error limit.
  double relative_at(std::int64_t n, double u_output) const;
  /// Returns: e.g. "4·sqrt(n)·u (n = 1029, u = 2^-24, ceiling gamma_n)" or "12.5".
  std::string describe(std::int64_t n, double u_output) const;
};

/// The limits for one kernel, all sections resolved.
struct KernelBudget {
  Limit max_ulp, max_scaled_error, max_rel_rmse, max_ratio_to_plain;
  Limit max_growth_exponent;  ///< fixed or none; checked over the run (RunRecord::growth_limit)
  Limit max_gradient_scaled_error, max_gradient_ratio_to_plain;
  std::vector<FaultClass> tolerated_faults;
  std::string tolerated_origin;
  /// Precision p_s of the arithmetic the kernel forms scores in (u_s = 2^-p_s).
  /// Probabilistic limits add, per output row r, the error that forming scores
  /// of magnitude Z_r costs whatever the rest of the kernel does (scores.h,
  /// row_score_magnitude): 2·min(γ̃_m(λ, u_s), γ_m(u_s))·Z_r in units of Σ p|v|.
  int score_bits = 24;
  std::string score_bits_origin;

  bool tolerates(FaultClass c) const;
  /// Returns: the max_scaled_error limit at accumulation length n (fixed: as
  /// given; probabilistic: relative_at(n, u_F) / u_F).
  double scaled_error_limit(std::int64_t n, Format output_format) const;
  /// Returns: the scaled-error limit of output row r: scaled_error_limit(n, F)
  /// plus p_floor(s, r), plus, for a probabilistic max_scaled_error,
  /// score_conditioning(s, λ)·Z_r (Z_r = s.row_score_magnitude[r], 0 when not
  /// filled), or for a fixed one marked score_conditioned, fp8_score_conditioning(s)·Z_r.
  double row_scaled_error_limit(std::int64_t n, const CaseScore& s, std::size_t r) const;
  /// Returns: s.row_p_floor[r], what the underflow of P rounded to 8 bits may
  /// cost in row r (scores.h, condition_on_p_rounding); 0 when not filled.
  static double p_floor(const CaseScore& s, std::size_t r);
  /// Returns: 2·min(γ̃_m(λ, u_s), γ_m(u_s)) / u_F, m = s.score_terms: the scaled
  /// error per unit of score magnitude that forming the scores may cost.
  double score_conditioning(const CaseScore& s, double lambda) const;
  /// Returns: 2·γ_{m+2}(u_s) / u_F, m = s.score_terms: the worst-case scaled
  /// error per unit of score magnitude for a kernel forming each score from
  /// 8-bit codes as s·sq·sk·(codes dot product) (defaults.cpp).
  double fp8_score_conditioning(const CaseScore& s) const;
  /// Returns: the max_rel_rmse limit: fixed as given; probabilistic
  /// relative_at(n, u_F) · κ with κ = RMS(Σp|v|)/RMS(o*) ≥ 1 the case's
  /// cancellation factor (+inf when RMS(o*) = 0), so that on cancelling rows the
  /// default bounds RMSE against the row magnitudes, as max_scaled_error does;
  /// plus the score-conditioning term at the case's largest Z, times u_F·κ.
  double rel_rmse_limit(std::int64_t n, const CaseScore& s) const;
  /// Returns: the max_gradient_scaled_error limit of a case whose forward
  /// score is `fwd` (for its largest score magnitude Z), at gradient
  /// accumulation length n: fixed as given; probabilistic relative_at(n, u_F)
  /// / u_F plus `paths` × score_conditioning × Z — a relative error δ in P
  /// moves a gradient element by at most 2δ of its natural magnitude (through
  /// dS = P(dP − D) and through D), so paths = 2 fed the exact O and lse and 3
  /// end to end (the forward's P as well).
  double gradient_scaled_error_limit(std::int64_t n, const CaseScore& fwd, int paths) const;
};

/// Returns: the built-in defaults for a kernel of input format `input` (the
/// rationale of each is beside its definition in harness/budget/defaults.cpp).
KernelBudget default_budget(Format input);

/// Any subset of the keys, as one section of a budget file sets them.
struct BudgetSection {
  std::optional<Limit> max_ulp, max_scaled_error, max_rel_rmse, max_ratio_to_plain, max_growth_exponent;
  std::optional<Limit> max_gradient_scaled_error, max_gradient_ratio_to_plain;
  std::optional<std::vector<FaultClass>> tolerated_faults;
  std::string tolerated_origin;
  std::optional<int> score_bits;
  std::string score_bits_origin;
};

struct Budget {
  std::string source = "defaults";                ///< the file, or "defaults"
  std::map<Format, BudgetSection> formats;         ///< [format.<input format>]
  std::map<std::string, BudgetSection> kernels;    ///< [kernel.<name>]
  std::map<std::string, int> kernel_lines;         ///< [kernel.<name>] → its line in the file

  /// A [kernel.<name>] section that names no kernel of the run.
  struct Unmatched {
    std::string name;
    int line = 0;
    std::string suggestion;  ///< the nearest known kernel name, or ""
    /// "<file> line L: [kernel.X] names no kernel of this run, so it is not
    /// applied (did you mean [kernel.Y]?)"
    std::string text() const;
    std::string source;
  };
  /// Returns: every [kernel.<name>] section that names none of `run_kernels`
  /// (the kernels of this run) nor of `also_known` (kernels the file may
  /// address legitimately, e.g. the bundled ones), in file order. Such a
  /// section is never applied: most often a misspelling, which would leave the
  /// intended limits silently unused.
  std::vector<Unmatched> unmatched_kernel_sections(const std::vector<std::string>& run_kernels,
                                                   const std::vector<std::string>& also_known) const;

  /// Returns: default_budget(input), then [format.<input>] over it key by key,
  /// then [kernel.<name>] over that.
  KernelBudget for_kernel(std::string_view name, Format input) const;
  KernelBudget for_kernel(const KernelDeclaration& d) const { return for_kernel(d.name, d.input_format); }
};

/// Returns: the budget in `text`, read as the file `path` (for messages).
/// Throws InputError(path, "line L, column C", problem, fix) for a TOML syntax
/// error, an unknown key or section, a value of the wrong type, a negative or
/// NaN limit, λ ≤ 0, an unknown fault class or format, or a section given twice.
Budget parse_budget(std::string_view text, const std::string& path);
/// Returns: the budget in the file at `path`. Throws InputError as
/// parse_budget, and when the file cannot be read.
Budget load_budget(const std::string& path);

/// One reason a case is outside its budget.
struct VerdictReason {
  std::string what;    ///< the limit key ("max_scaled_error"), or a fault class name, or "bad_output"
  double value = 0;    ///< the figure (faults: the count)
  double limit = 0;    ///< the limit it broke (faults: 0)
  std::string text;    ///< one line: what, by how much, the limit's origin, where
};

struct Verdict {
  bool pass = true;
  bool scored = true;                 ///< false when there was no output to score
  std::vector<VerdictReason> reasons; ///< empty when pass
  std::vector<std::string> notes;     ///< tolerated faults, uncertainty, skipped checks
};

/// Returns: the verdict on one case. `score` null means no output (the first
/// run was not ok); `ratio` null means no plain-kernel run to compare with (a
/// max_ratio_to_plain limit is then noted as unchecked). A fault fails the case
/// unless tolerated; non-finite outputs counted by `score` fail it even when
/// `faults` lacks them. bad_output always fails; unsupported is not scored and
/// does not fail. max_ulp fails only when exceeded by a certain figure
/// (CaseScore::max_ulp_certain); an excess within the reference's ±1 is noted.
Verdict judge(const CaseScore* score, const CaseFaults& faults, const KernelBudget& budget, std::int64_t n,
              const PlainRatio* ratio = nullptr);

}  // namespace headroom
