// headroom — comparing two run records: what got worse, what got better, and whether that fails CI.
//
// Figures are compared per family × format group (run_summary.h): worst ULP,
// worst scaled error, worst relative RMSE, for a backward kernel the worst
// gradient scaled error fed the exact O/lse and end to end (over dQ, dK, dV),
// the number of failing cases and the count of each fault class. An error figure regresses when
//   new > base · (1 + tolerance)  and  new − base > floor
// (tolerance relative, e.g. 0.10 = 10 %; floor absolute, per figure: the
// noise floor below) and improves when
//   new · (1 + tolerance) < base  and  base − new > floor.
// Noise floors (our own choice, one rounding unit of the output format F:
// a change that small is what reordering one sum gives): worst ULP 1 ULP,
// worst scaled error 1 (units of u_F·Σp|v|; the gradients' 1 unit of u_F
// times their natural magnitude), worst relative RMSE u_F.
// So 0 → 1 ULP is noise, 0 → 2 ULP regresses.
// Faults and failing cases regress on any increase, whatever the tolerance: a
// new fault is never noise. A group tried in BASE but absent from NEW is a
// regression too (coverage lost); one only in NEW is a note. NaN figures ("not
// applicable") are not compared; a figure going from finite to NaN is a note.
#pragma once

#include <filesystem>
#include <iosfwd>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>

#include "headroom/record.h"

namespace headroom {

/// The default relative tolerance of `headroom compare` (10 %: our choice,
/// about the spread of a worst-case figure between runs of different seeds).
inline constexpr double kDefaultCompareTolerance = 0.10;

struct FigureChange {
  std::string kernel;        ///< the kernel of NEW
  std::string family, format;
  std::string figure;        ///< "worst_ulp", "worst_scaled_error", "worst_rmse", "worst_gradient_scaled_error",
                             ///< "worst_gradient_scaled_error_end_to_end", "failing_cases",
                             ///< "fault:<class>", or "cases" (a group absent from NEW)
  double base = 0, next = 0;
  double relative = 0;       ///< (next − base) / base; ±inf when base = 0 ≠ next
  std::string text;          ///< one line, greppable: "REGRESSION kernel=... family=... format=... ..."
};

/// One family × format group of either record, for the summary table.
struct GroupComparison {
  std::string family, format;
  bool in_base = false, in_new = false;
  double base_cases = 0, new_cases = 0;
  double base_ulp = 0, new_ulp = 0, base_scaled = 0, new_scaled = 0, base_rel_rmse = 0, new_rel_rmse = 0;
  double base_failing = 0, new_failing = 0, base_faults = 0, new_faults = 0;
  std::string status;  ///< "worse", "better", "same", "lost" (only in BASE) or "new" (only in NEW)
};

/// The noise floor of each error figure (see above), for output format F.
struct NoiseFloors {
  double ulp = 1, scaled = 1, rel_rmse = 0;
};
/// Returns: the default floors for output format `output_format` (a format
/// name; an unknown one gets float32's u).
NoiseFloors default_noise_floors(const std::string& output_format);

struct Comparison {
  std::string base_file, new_file;
  NoiseFloors floors;
  std::vector<GroupComparison> groups;  ///< every group of either record, BASE's order then NEW's
  double tolerance = kDefaultCompareTolerance;
  std::vector<FigureChange> regressions, improvements;
  std::vector<std::string> notes;  ///< kernels or suites differ, groups only in NEW, figures no longer measured
  bool regressed() const { return !regressions.empty(); }
};

/// Returns: the comparison of `next` against `base`. The file names label the
/// output only. Preconditions: tolerance ≥ 0 and finite (run_compare checks).
Comparison compare_records(const RunRecord& base, const RunRecord& next, double tolerance,
                           const std::string& base_file = "BASE", const std::string& new_file = "NEW");

/// Returns: the comparison for a terminal: a header line, the per-group
/// summary table, one line per regression and per improvement, and a closing count.
std::string comparison_text(const Comparison& c);
/// Returns: the comparison as Markdown, for a pull request: verdict, notes,
/// the per-group table, regressions and improvements.
std::string comparison_markdown(const Comparison& c);
nlohmann::json to_json(const Comparison& c);

/// The `headroom compare` command: reads both records (InputError on a
/// malformed or schema-mismatched file, naming it), compares, prints
/// comparison_text to `out`, writes the JSON to `json_out` atomically unless
/// empty, and the Markdown to `markdown_out` unless empty. Returns: 1 when
/// anything regressed, else 0. Throws InputError (exit 2) also for a negative
/// or non-finite tolerance.
int run_compare(const std::filesystem::path& base, const std::filesystem::path& next, double tolerance,
                const std::filesystem::path& json_out, std::ostream& out,
                const std::filesystem::path& markdown_out = {});

}  // namespace headroom
