// headroom — the Markdown review report (markdown_report.h).
#include "headroom/markdown_report.h"

#include <cmath>

#include <fmt/format.h>

#include "escape.h"
#include "headroom/run_summary.h"
#include "sections.h"

namespace headroom {
namespace {

using report_detail::markdown_cell;
using report_detail::markdown_code;

// Details and failing cases are capped so a run with thousands of failures
// still gives a readable review; the JSON record keeps them all.
constexpr std::size_t kDetailsListed = 50;
constexpr std::size_t kFailuresListed = 100;

std::string row(const std::vector<std::string>& cells) {
  std::string s = "|";
  for (const auto& c : cells) s += " " + c + " |";
  return s + "\n";
}

// `align` has one letter per column: 'l' left, 'r' right.
std::string rule(const std::string& align) {
  std::string s = "|";
  for (char a : align) s += a == 'r' ? "---:|" : "---|";
  return s + "\n";
}

// A replay command as a fenced block: commands may hold characters that
// inline code would mangle, and a reader copies a block whole.
// Every line is indented by `indent` so the block stays inside a list item
// (CommonMark 0.30 §5.2); line ends in the command become spaces.
std::string command_block(const std::string& command, const std::string& indent) {
  std::string fence = "```";
  while (command.find(fence) != std::string::npos) fence += '`';
  std::string body = command.empty() ? "# no replay command recorded" : command;
  for (char& ch : body)
    if (ch == '\n' || ch == '\r') ch = ' ';
  return indent + fence + "sh\n" + indent + body + "\n" + indent + fence + "\n";
}

}  // namespace

std::string markdown_report(const RunRecord& r) {
  const GroupSummary total = summarise_run(r);
  const Coverage cov = coverage(r);
  // "PASS", or "PASS on 2 of 21 block cases" when the kernel took little of a level (record.h).
  std::string md = fmt::format("# headroom review: {} — {}{}\n\n", markdown_cell(r.kernel),
                               r.verdict() == "pass" ? "PASS" : "FAIL", r.verdict_line().substr(r.verdict().size()));

  if (const std::string skipped = skipped_headline(r); !skipped.empty()) md += "**" + markdown_cell(skipped) + "**\n\n";
  md += row({"", ""}) + rule("ll");
  for (const auto& f : report_detail::run_facts(r)) md += row({"**" + f.label + "**", markdown_cell(f.text)});
  md += fmt::format("\n> {}\n\n", kEvidenceNotProof);

  if (!std::isnan(total.margin))
    md += fmt::format("**Smallest margin: {}** ({} in case {}; margin = limit ÷ worst figure: above 1 is within "
                      "budget, below 1 fails).\n\n",
                      margin_text(total.margin), total.margin_figure, markdown_code(total.margin_case));
  for (const auto& w : r.warnings) md += "> **Warning:** " + markdown_cell(w) + "\n>\n";
  if (!r.warnings.empty()) md += "\n";

  // Only the figures a limit applies to: a worst figure beside no limit says
  // nothing about the verdict.
  const LimitedFigures shown = limited_figures(r);
  md += "## Worst figures\n\n";
  if (r.cases.empty()) {
    md += "No case was run.\n\n";
  } else {
    if (shown.ulp)
      md += fmt::format("- worst ULP distance: **{}** (case {})\n", figure_text(total.worst_ulp),
                        markdown_code(total.worst_ulp_case));
    if (shown.scaled)
      md += fmt::format("- worst scaled error: **{}** rounding units of the row magnitude (case {})\n",
                        figure_text(total.worst_scaled_error), markdown_code(total.worst_scaled_case));
    if (shown.rel_rmse) md += fmt::format("- worst relative RMSE: **{}**\n", figure_text(total.worst_rel_rmse));
    if (shown.ratio) md += fmt::format("- worst ratio to the plain kernel: **{}**\n", figure_text(total.worst_ratio_to_plain));
    std::string unlimited;
    if (!shown.ulp) unlimited += "ULP distance";
    if (!shown.scaled) unlimited += std::string(unlimited.empty() ? "" : ", ") + "scaled error";
    if (!shown.rel_rmse) unlimited += std::string(unlimited.empty() ? "" : ", ") + "relative RMSE";
    if (!shown.ratio) unlimited += std::string(unlimited.empty() ? "" : ", ") + "ratio to plain";
    if (!unlimited.empty())
      md += "- not shown: " + unlimited +
            " — no limit applies to them in this run (the budget sets none, or, for the ratio, the kernel is its own "
            "plain kernel), so they do not bear on the verdict; the JSON record keeps them\n";
    md += "\n";
  }
  if (const std::string why = uncertified_explanation(r); !why.empty()) md += "> " + markdown_cell(why) + "\n\n";

  md += "## Error budget\n\n"
        "Worst figure seen against its limit, per family and format, for each figure a limit applies to. Limits are "
        "resolved at each case's shape, so a range means they differ between the cases of a row; \"—\" means the "
        "record does not carry it. Margin is the smallest limit ÷ figure of any case of the row (below 1 fails).\n\n";
  std::vector<std::string> head{"family", "format", "cases", "failing"};
  std::string align = "llrr";
  auto column = [&](bool on, const char* worst, const char* limit) {
    if (!on) return;
    head.insert(head.end(), {worst, limit});
    align += "rr";
  };
  column(shown.ulp, "worst ULP", "ULP limit");
  column(shown.scaled, "worst scaled error", "scaled limit");
  column(shown.rel_rmse, "worst rel. RMSE", "rel. RMSE limit");
  column(shown.ratio, "worst ratio to plain", "ratio limit");
  head.push_back("margin");
  align += "r";
  md += row(head) + rule(align);
  for (const auto& g : summarise_groups(r)) {
    std::vector<std::string> cells{markdown_cell(g.family), markdown_cell(g.format), fmt::format("{}", g.cases),
                                   g.failing ? fmt::format("**{}**", g.failing) : "0"};
    if (shown.ulp) cells.insert(cells.end(), {figure_text(g.worst_ulp), limit_range_text(g.ulp_limit)});
    if (shown.scaled) cells.insert(cells.end(), {figure_text(g.worst_scaled_error), limit_range_text(g.scaled_limit)});
    if (shown.rel_rmse) cells.insert(cells.end(), {figure_text(g.worst_rel_rmse), limit_range_text(g.rel_rmse_limit)});
    if (shown.ratio)
      cells.insert(cells.end(), {std::isnan(g.worst_ratio_to_plain) ? "—" : figure_text(g.worst_ratio_to_plain),
                                 limit_range_text(g.ratio_limit)});
    cells.push_back(g.margin < 1 ? "**" + margin_text(g.margin) + "**" : margin_text(g.margin));
    md += row(cells);
  }
  md += "\n## Faults\n\n";
  md += row({"class", "faults", "cases", "tolerated"}) + rule("lrrl");
  for (const auto& t : fault_totals_by_class(r))
    md += row({markdown_cell(t.name), fmt::format("{}", t.count), fmt::format("{}", t.cases), t.tolerated ? "yes" : "no"});
  std::size_t details = 0, all_details = 0;
  std::string detail_lines;
  for (const auto& c : r.cases)
    for (const auto& d : c.fault_details)
      if (++all_details <= kDetailsListed) detail_lines += fmt::format("- {}: {}\n", markdown_code(c.name), markdown_cell(d)), ++details;
  if (all_details == 0) {
    md += total.fault_count() == 0 ? "\nNo fault of any class was detected.\n" : "\nThe record carries no fault details.\n";
  } else {
    md += "\n" + detail_lines;
    if (all_details > details)
      md += fmt::format("- … and {} more in the JSON record\n", all_details - details);
  }

  md += fmt::format("\n## The {} worst cases\n\nBy scaled error, worst first; each with the command that replays it.\n\n",
                    kWorstCasesListed);
  const auto worst = worst_cases(r, kWorstCasesListed);
  if (worst.empty()) md += "No case was run.\n";
  for (std::size_t i = 0; i < worst.size(); ++i) {
    const CaseRecord& c = *worst[i];
    md += fmt::format("{}. {} — {}\n", i + 1, markdown_code(c.name), markdown_cell(report_detail::case_headline(c)));
    if (const auto w = report_detail::worst_element_text(c); !w.empty()) md += "   " + markdown_cell(w) + "\n";
    md += "\n" + command_block(c.replay, "   ") + "\n";
  }

  md += "## Failing cases\n\n";
  std::size_t failing = 0;
  for (const auto& c : r.cases) {
    if (c.within_budget) continue;
    if (++failing > kFailuresListed) continue;
    md += fmt::format("- {} ({}, seed {}): {}\n", markdown_code(c.name), markdown_cell(c.family), c.seed,
                      c.reasons.empty() ? "no reason recorded" : markdown_cell(c.reasons.front()));
    for (std::size_t k = 1; k < c.reasons.size(); ++k) md += "  " + markdown_cell(c.reasons[k]) + "\n";
    md += fmt::format("  replay: {}\n", markdown_code(c.replay));
  }
  if (failing == 0) md += "None: every case tried is within budget.\n";
  if (failing > kFailuresListed) md += fmt::format("- … and {} more in the JSON record\n", failing - kFailuresListed);

  md += "\n## Error growth with Tk\n\n";
  const auto growth = error_growth(r.cases);
  if (growth.empty()) md += report_detail::no_growth_fit_text() + "\n";
  for (const auto& line : growth_lines(growth)) md += "- **" + markdown_cell(line) + "**\n";
  for (const auto& f : r.growth_failures()) md += "- **Fails the budget:** " + markdown_cell(f) + "\n";
  if (!growth.empty()) {
    md += fmt::format("\n{}\n\n", report_detail::kGrowthNote);
    const auto table = report_detail::growth_table(growth);
    for (std::size_t i = 0; i < table.size(); ++i) {
      std::vector<std::string> cells;
      for (const auto& c : table[i]) cells.push_back(markdown_cell(c));
      md += row(cells) + (i == 0 ? rule("llrrrrr") : "");
    }
  }

  if (const auto lines = report_detail::gradient_lines(summarise_gradients(r)); !lines.empty()) {
    md += "\n## Gradients (the backward)\n\n";
    for (const auto& line : lines) md += fmt::format("- **{}**: {}\n", line.label, markdown_cell(line.text));
  }

  md += "\n## Coverage\n\n";
  for (const auto& line : report_detail::coverage_lines(cov))
    md += fmt::format("- **{}**: {}\n", line.label, markdown_cell(line.text));
  if (!r.skipped.empty()) {
    md += "\nSkipped cases:\n\n";
    for (std::size_t i = 0; i < r.skipped.size() && i < kFailuresListed; ++i)
      md += "- " + markdown_cell(r.skipped[i]) + "\n";
    if (r.skipped.size() > kFailuresListed)
      md += fmt::format("- … and {} more in the JSON record\n", r.skipped.size() - kFailuresListed);
  }
  md += "\n### Where this result could mislead\n\n";
  if (cov.cautions.empty()) md += "Nothing stands out: every aspect listed above was tried.\n";
  for (const auto& c : cov.cautions) md += "- " + markdown_cell(c) + "\n";
  md += fmt::format("\n**{}**\n", kEvidenceNotProof);
  return md;
}

}  // namespace headroom
