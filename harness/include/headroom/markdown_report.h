// headroom — the Markdown review report of a run, for a code review.
//
// Sections, in order: the run's facts and verdict; the worst figures; the
// error budget table (per family × format: worst ULP, scaled error, relative
// RMSE and ratio to plain, each beside the limit it was judged against);
// faults by class with their details; the five worst cases, each with the
// command that replays it; every failing case with its reasons; coverage —
// families, levels, shapes (Tq/Tk/D ranges, GQA), masks and formats tried and
// not tried, skipped cases — with an explicit caution wherever the verdict
// could mislead; and the statement that a pass is evidence, not proof.
// Every name from the record is escaped, so a hostile case name cannot break
// a table or open an HTML tag in a renderer.
#pragma once

#include <string>

#include "headroom/record.h"

namespace headroom {

/// Number of worst cases listed with their replay commands.
inline constexpr std::size_t kWorstCasesListed = 5;

/// Returns: the report as GitHub-flavoured Markdown (tables per GFM §4.10).
std::string markdown_report(const RunRecord& r);

}  // namespace headroom
