// headroom — a run record gathered for its reports: family × format groups, worst cases, coverage.
//
// Every face of a result (terminal, Markdown, HTML, JUnit, compare) reads the
// record through these summaries, so they agree on what "worst" means and on
// what was and was not tried. Figures that are NaN in a case ("not
// applicable", e.g. no plain-kernel ratio) are left out of a maximum; a maximum
// over no applicable figure is NaN. +inf counts (it is the worst figure).
#pragma once

#include <array>
#include <cstddef>
#include <cstdint>
#include <limits>
#include <map>
#include <optional>
#include <string>
#include <vector>

#include "headroom/record.h"

namespace headroom {

/// The smallest and largest of a set of values; empty() when there were none.
struct ValueRange {
  double low = 0, high = 0;
  std::size_t count = 0;
  bool empty() const { return count == 0; }
  void add(double x);  ///< NaN is ignored
};

/// The figures of a set of cases (a family × format group, or the whole run).
struct GroupSummary {
  std::string family;  ///< "" for the whole run
  std::string format;  ///< "" for the whole run
  std::size_t cases = 0;
  std::size_t failing = 0;          ///< cases not within budget
  double worst_ulp = 0;             ///< max of figures.max_ulp
  double worst_scaled_error = 0;    ///< max of figures.max_scaled_error
  double worst_rmse = 0;            ///< max of figures.rmse (per-case RMSE; not pooled)
  double worst_rel_rmse = 0;        ///< max of figures.relative_rmse
  double worst_ratio_to_plain = 0;  ///< max of figures.ratio_to_plain; NaN when no case has one
  /// Backward kernels: max over cases and gradient tensors of the max scaled
  /// error fed the exact O/lse, and end to end; NaN when no case judged the
  /// gradients (that way).
  double worst_gradient_fed_exact = 0, worst_gradient_end_to_end = 0;
  std::string worst_ulp_case, worst_scaled_case;  ///< names; "" when no case
  ValueRange ulp_limit, scaled_limit, rel_rmse_limit, ratio_limit;  ///< limits recorded for the cases (+inf = none)
  std::map<std::string, int> faults;                                ///< class → count
  /// The smallest margin (limit ÷ figure: > 1 within, < 1 outside) of any
  /// case, over every figure a limit applies to; NaN when no limit applies.
  double margin = std::numeric_limits<double>::quiet_NaN();
  std::string margin_figure, margin_case;  ///< the limit key ("max_scaled_error") and case of `margin`
  int fault_count() const;
};

/// The margin of one case: limit ÷ figure for its tightest limit.
struct CaseMargin {
  double value = std::numeric_limits<double>::quiet_NaN();  ///< NaN when no limit applies; +inf for a 0 figure
  std::string figure;  ///< "max_ulp", "max_scaled_error", "max_rel_rmse" or "max_ratio_to_plain"
};
/// Returns: the smallest limit ÷ figure of `c` over the figures whose limit is
/// recorded and finite (CaseLimits) and whose figure is not NaN.
CaseMargin case_margin(const CaseRecord& c);

/// Which figures of a run a limit applies to: a summary table shows those only.
struct LimitedFigures {
  bool ulp = false, scaled = false, rel_rmse = false, ratio = false;
};
/// Returns: the figures that have a finite limit in at least one case of `r`;
/// the ratio to plain only where some case has one (the plain kernel differs
/// from the kernel judged).
LimitedFigures limited_figures(const RunRecord& r);

/// The gradients of the cases whose backward was judged (docs/backward.md):
/// per tensor (d_q, d_k, d_v, d_bias: kGradientNames) the worst of each figure.
struct GradientSummary {
  std::size_t cases = 0;             ///< cases with gradients judged
  std::size_t end_to_end_cases = 0;  ///< of them, judged end to end too
  std::size_t bias_cases = 0;        ///< of them, with d(bias) judged (d_bias figures 0 when none)
  std::array<double, 4> worst_fed_exact{}, worst_end_to_end{};  ///< max scaled error
  std::array<double, 4> worst_rel_rmse{};                       ///< both ways
  std::array<double, 4> lowest_cosine{1, 1, 1, 1};              ///< both ways
  /// Returns: how many tensors the figures cover: 4 when some case judged d(bias), else 3.
  std::size_t tensors() const { return bias_cases > 0 ? 4 : 3; }
  double worst_ratio_to_plain = std::numeric_limits<double>::quiet_NaN();
  std::string worst_case;            ///< the case of the largest max scaled error
  std::map<std::string, std::size_t> upstream;  ///< dO kind ("case", "gaussian", ...) → cases
};
/// Returns: the gradients of `r` (cases = 0 when no case has any).
GradientSummary summarise_gradients(const RunRecord& r);

/// Returns: "1.56" for a margin, "inf" (nothing to lose), or "—" when none applies.
std::string margin_text(double m);

/// Returns: the quantisation split of a run whose kernel receives rounded or
/// quantised inputs (binary16, bfloat16, int8, e4m3, e5m2), as one line: the
/// largest scaled error that rounding the inputs cost (figures.input_error:
/// the exact attention of the received inputs against that of the source
/// values), that rounding P to 8 bits cost where the kernel declares it
/// (figures.p_rounding_error, modelled), and the kernel's own (figures.kernel_error),
/// e.g. "inputs rounded to e4m3 cost up to 1.7e+11, P rounded to 8 bits up to
/// 1.5e+06 (modelled), the kernel's own error up to 1.6e+06 (max scaled error
/// over 52 cases)"; "" for other input formats or a run of no case.
std::string quantisation_split_text(const RunRecord& r);

/// Returns: how many cases' reference missed its certification target, and
/// the one plain-words paragraph every report gives for them ("" when none).
std::size_t uncertified_cases(const RunRecord& r);
std::string uncertified_explanation(const RunRecord& r);

/// Returns: the summary of `cases` labelled family/format.
GroupSummary summarise(const std::vector<const CaseRecord*>& cases, std::string family = "",
                       std::string format = "");
/// Returns: one summary per (family, format) present in the record, families in
/// the order of families() (families.h) and unknown ones after them by name,
/// then formats by name.
std::vector<GroupSummary> summarise_groups(const RunRecord& r);
/// Returns: the summary of every case of the record.
GroupSummary summarise_run(const RunRecord& r);

/// Returns: the `n` worst cases, worst first: by max_scaled_error descending
/// (NaN as the least), ties by max_ulp descending, then by name ascending, so
/// the order is total and deterministic.
std::vector<const CaseRecord*> worst_cases(const RunRecord& r, std::size_t n);

/// One fault class and its totals over a run.
struct FaultTotal {
  std::string name;
  int count = 0;            ///< faults summed over cases
  std::size_t cases = 0;    ///< cases with at least one
  bool tolerated = false;   ///< named in RunRecord::tolerated_faults
};
/// Returns: every known fault class (faults.h, in its order) with its totals,
/// zeros included, then any other class the record names, by name.
std::vector<FaultTotal> fault_totals_by_class(const RunRecord& r);

/// Returns: the family of a RunRecord::skipped line ("name: reason"): the
/// longest family of families() that the case name starts with, followed by
/// '-' or the end of the name (case names begin with their family, generate.h);
/// "" when none does.
std::string skipped_family(const std::string& line);

/// The extents of a case, parsed from CaseRecord::shape.
struct ShapeExtents {
  std::int64_t batch = 0, q_heads = 0, kv_heads = 0, q_len = 0, kv_len = 0, key_dim = 0, value_dim = 0;
  std::int64_t model_dim = 0;  ///< block level only; 0 for core
};
/// Returns: the extents in `shape` for `level` ("core": "B,Hq,Hkv,Tq,Tk,Dk,Dv";
/// "block": "B,Tq,Tk,Dm,Hq,Hkv,Dk,Dv"), or nullopt when it does not parse
/// (wrong count, a non-number, an extent < 1, or an unknown level).
std::optional<ShapeExtents> parse_shape(const std::string& level, const std::string& shape);

/// What a run tried and did not try, and what a reader could wrongly conclude.
struct Coverage {
  std::map<std::string, std::size_t> families, masks, formats, levels;  ///< name → cases
  std::vector<std::string> families_not_tried;  ///< of families(), in its order
  std::vector<std::string> masks_not_tried;     ///< of the six mask kinds (problem.h)
  std::vector<std::string> formats_not_tried;   ///< of the five formats (format.h)
  std::vector<std::string> levels_not_tried;    ///< of "core", "block"
  ValueRange batch, q_heads, kv_heads, q_len, kv_len, key_dim, value_dim, model_dim;
  std::size_t grouped_query = 0;  ///< cases with 1 < Hkv < Hq
  std::size_t multi_query = 0;    ///< cases with Hkv = 1 < Hq
  std::size_t ragged = 0;         ///< cases with Tq ≠ Tk
  std::size_t ragged_causal = 0;  ///< ... under a causal mask (where the two alignments differ)
  std::size_t odd_head_dim = 0;   ///< cases with Dk or Dv not a multiple of 8 (vector tails)
  std::size_t unparsed_shapes = 0;
  ValueRange logit_scale;
  std::size_t skipped = 0;
  /// Skipped cases per reason (the text after "name: " in RunRecord::skipped), most frequent first.
  std::vector<std::pair<std::string, std::size_t>> skipped_reasons;
  std::size_t gradients_judged = 0;  ///< cases whose backward was judged (CaseRecord::backward)
  std::size_t gradients_end_to_end = 0;
  std::size_t gradients_bias = 0;  ///< of them, with d(bias) judged too
  std::map<std::string, std::size_t> upstream;  ///< dO kinds of those cases
  /// Plain statements of what a reader could wrongly conclude from the
  /// verdict (no masked case, no long sequence, no block level, ...), one each.
  std::vector<std::string> cautions;
};

/// Sequence length from which a case counts as long: our own choice (the
/// long_sequence family reaches 1028 at its default size).
inline constexpr std::int64_t kLongSequence = 1024;
/// ln(2^128) ≈ 88.72: exp overflows float32 beyond it (IEEE 754-2019 binary32
/// emax = 127), so logits past it expose a kernel that skips the max shift.
inline constexpr double kFloat32ExpOverflow = 88.72283905206835;

/// Returns: the coverage of the record.
Coverage coverage(const RunRecord& r);

/// Returns: empty when no case was skipped; else one line for a report's first
/// lines: "Skipped 14 of 80 cases (not run): key dim 80 not declared (64, 128):
/// 14 cases." — led by "MOST OF THE SUITE WAS SKIPPED" when skipped cases
/// outnumber those run, so a pass over the rest is not read as a pass over all.
std::string skipped_headline(const RunRecord& r);

/// The sentence every report carries (DESIGN.md: a pass is evidence, not proof).
inline constexpr const char* kEvidenceNotProof =
    "A pass is evidence over the cases tried, not a proof: it says nothing about shapes, masks, "
    "value distributions or formats that were not tried.";

/// Returns: x for a report: integers as such, others with 4 significant
/// digits ("1.234e-05", "12.5"), "inf", "-inf", "nan"; a limit of +inf reads "none".
std::string figure_text(double x);
std::string limit_text(double x);
/// Returns: the range of limits as "12.5" or "8.1–12.5", "none", or "—" when not recorded.
std::string limit_range_text(const ValueRange& r);

}  // namespace headroom
