// headroom — the plain-text pieces the Markdown and HTML reports share (internal to the report stage).
//
// Both reports say the same things in the same words; only the markup
// differs. Every string here is plain text: the caller escapes it.
#pragma once

#include <map>
#include <string>
#include <vector>

#include "headroom/error_growth.h"
#include "headroom/record.h"
#include "headroom/run_summary.h"

namespace headroom::report_detail {

struct Line {
  std::string label;  ///< e.g. "Families tried"
  std::string text;
};

/// Returns: "gaussian (4), masks (2)": each name with its count, in map order.
std::string counted(const std::map<std::string, std::size_t>& items);
/// Returns: the same, names in `order` first (those present), then the rest.
std::string counted_in_order(const std::map<std::string, std::size_t>& items, const std::vector<std::string>& order);
/// Returns: "16" or "1–64" for an integer range, "—" when empty.
std::string range_text(const ValueRange& r);
/// Returns: "a, b, c", or `none` when empty.
std::string list_or(const std::vector<std::string>& items, const std::string& none);

/// Returns: the coverage statement, one line per aspect: families, levels,
/// shapes, head sharing, masks, formats, logit scale, skipped cases.
std::vector<Line> coverage_lines(const Coverage& cov);

/// Returns: the gradient rows of a report ("" labels none when no case had
/// its backward judged): one line per tensor with its worst figures both ways,
/// then the worst ratio to the plain backward and the case of the worst error.
std::vector<Line> gradient_lines(const GradientSummary& g);

/// Returns: the facts of the run for a report's heading table (kernel, method,
/// formats, suite, shard, budget, tool, cases run/failing/skipped, verdict).
std::vector<Line> run_facts(const RunRecord& r);

/// Returns: one line describing a case: family, seed, size, level, shape,
/// mask, and its figures (scaled error, ULP, relative RMSE) with the verdict.
std::string case_headline(const CaseRecord& c);
/// Returns: "at b,h,i,d expected <hexfloat> obtained <hexfloat>", or "" when
/// no element was scored.
std::string worst_element_text(const CaseRecord& c);

/// What a growth exponent means, with its source, for the error growth section.
inline constexpr const char* kGrowthNote =
    "Each family's scaled error fitted against Tk on log-log axes, through the median and through the worst error at "
    "each Tk; ± is the standard error of the slope. A sound kernel's roundings accumulate like a random walk, an "
    "exponent about 0.5 (Higham & Mary, SIAM J. Sci. Comput. 41(5), 2019); about 1 is an error that grows with every "
    "key.";

/// Returns: the header and one row per fitted family: family, format, Tk range,
/// lengths, cases, "0.52 ± 0.04" through the median and through the worst.
std::vector<std::vector<std::string>> growth_table(const std::vector<FormatGrowth>& g);
/// Returns: the line saying why no fit was made (no family spans enough lengths).
std::string no_growth_fit_text();

}  // namespace headroom::report_detail
