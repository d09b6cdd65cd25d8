// headroom — the terminal summary and the FAIL lines (terminal_report.h).
#include "headroom/terminal_report.h"

#include <unistd.h>

#include <algorithm>
#include <cmath>
#include <cstdlib>
#include <map>
#include <vector>

#include <fmt/format.h>

#include "headroom/error_growth.h"
#include "headroom/run_summary.h"
#include "headroom/scores.h"

namespace headroom {
namespace {

// SGR codes (ECMA-48 §8.3.117): bold, red, green, yellow, reset.
constexpr const char* kBold = "\x1b[1m";
constexpr const char* kRed = "\x1b[31m";
constexpr const char* kGreen = "\x1b[32m";
constexpr const char* kReset = "\x1b[0m";

std::string paint(const std::string& text, const char* code, bool colour) {
  return colour ? std::string(code) + text + kReset : text;
}

std::string faults_text(const std::map<std::string, int>& faults) {
  std::string out;
  for (const auto& [name, n] : faults) out += (out.empty() ? "" : " ") + fmt::format("{}={}", name, n);
  return out.empty() ? "-" : out;
}

struct Row {
  std::vector<std::string> cells;
  bool pass = true;
};

}  // namespace

bool colour_wanted(bool is_terminal, const char* no_color) {
  return is_terminal && (no_color == nullptr || *no_color == '\0');
}

bool colour_wanted(std::FILE* stream) {
  return colour_wanted(::isatty(::fileno(stream)) == 1, std::getenv("NO_COLOR"));
}

std::string failure_line(const RunRecord& r, const CaseRecord& c) {
  std::string line = fmt::format("FAIL kernel={} family={} seed={} case={}", r.kernel, c.family, c.seed, c.name);
  std::string faults;
  for (const auto& [name, n] : c.faults)
    if (n > 0) faults += (faults.empty() ? "" : ",") + name;
  if (!faults.empty()) line += " fault=" + faults;
  // Every figure here is of the one element printed: the worst scaled error's.
  // A case with no scored element (a crash, a timeout, bad output) has none to print.
  const CaseFigures& f = c.figures;
  // Element figures only where a limit on the output's figures failed the
  // case: beside a fault alone (a leak, a crash), a gradient limit or the
  // log-sum-exp's, the output's worst element would explain nothing (and may
  // well be within budget); the log-sum-exp's own worst error is given instead.
  bool figure_failed = c.reasons.empty(), lse_failed = false;
  for (const auto& reason : c.reasons) {
    if (reason.rfind("max_", 0) != 0 || reason.rfind("max_gradient", 0) == 0) continue;
    if (reason.find("(log-sum-exp error") != std::string::npos) lse_failed = true;
    else figure_failed = true;
  }
  if (lse_failed && !figure_failed && !std::isnan(f.lse_error)) line += " lse_error=" + figure_text(f.lse_error);
  if (!f.worst_index.empty() && f.elements > 0 && figure_failed) {
    const int digits = r.output_format == "float64" ? 17 : 9;  // enough to round-trip the format (IEEE 754 §5.12.2)
    line += fmt::format(" at=[{}] expected={:.{}g} ({}) obtained={:.{}g} ({})", f.worst_index, f.worst_expected, digits,
                        hex_float(f.worst_expected), f.worst_obtained, digits, hex_float(f.worst_obtained));
    if (!std::isnan(f.worst_ulp_at)) line += " ulp=" + figure_text(f.worst_ulp_at);
    line += " scaled=" + figure_text(f.max_scaled_error);
  }
  return line + " replay: " + (c.replay.empty() ? "(none recorded)" : c.replay);
}

std::string terminal_summary(const RunRecord& r, bool colour) {
  const std::string verdict = r.verdict();
  const char* verdict_colour = verdict == "pass" ? kGreen : kRed;
  std::string out = fmt::format("{} {} ({} → {}), suite {}, shard {}, budget {}: {}\n", paint("headroom", kBold, colour),
                                r.kernel, r.input_format, r.output_format, r.suite, r.shard, r.budget,
                                paint(verdict, verdict_colour, colour) + r.verdict_line().substr(verdict.size()));
  if (const std::string skipped = skipped_headline(r); !skipped.empty()) out += "  " + skipped + "\n";

  // Only the figures a limit applies to: a worst figure beside no limit says
  // nothing about the verdict (an int8 kernel's ULP error, say).
  const LimitedFigures shown = limited_figures(r);
  std::vector<std::string> header{"family", "format", "cases"};
  if (shown.ulp) header.push_back("worst ulp");
  if (shown.scaled) header.push_back("worst scaled");
  if (shown.rel_rmse) header.push_back("worst rel rmse");
  if (shown.ratio) header.push_back("worst ratio");
  header.insert(header.end(), {"margin", "faults", "verdict"});
  std::vector<Row> rows;
  auto row_of = [&](const GroupSummary& g, std::string family) {
    Row row;
    row.pass = g.failing == 0;
    row.cells = {std::move(family), g.format.empty() ? "all" : g.format, fmt::format("{}", g.cases)};
    if (shown.ulp) row.cells.push_back(figure_text(g.worst_ulp));
    if (shown.scaled) row.cells.push_back(figure_text(g.worst_scaled_error));
    if (shown.rel_rmse) row.cells.push_back(figure_text(g.worst_rel_rmse));
    // "-" where a figure is undefined (bytes = columns, unlike "—").
    if (shown.ratio) row.cells.push_back(std::isnan(g.worst_ratio_to_plain) ? "-" : figure_text(g.worst_ratio_to_plain));
    row.cells.insert(row.cells.end(), {std::isnan(g.margin) ? "-" : margin_text(g.margin), faults_text(g.faults),
                                       row.pass ? "pass" : fmt::format("fail ({})", g.failing)});
    return row;
  };
  for (const auto& g : summarise_groups(r)) rows.push_back(row_of(g, g.family));
  const GroupSummary total = summarise_run(r);
  rows.push_back(row_of(total, "total"));
  // The headroom left, first: margin = limit ÷ worst, < 1 fails.
  if (!std::isnan(total.margin))
    out += fmt::format("  smallest margin {} ({} in case {}; margin = limit / worst figure, below 1 fails)\n",
                       margin_text(total.margin), total.margin_figure, total.margin_case);
  if (const std::string split = quantisation_split_text(r); !split.empty()) out += "  quantisation split: " + split + "\n";
  for (const auto& w : r.warnings) out += "  warning: " + w + "\n";

  std::vector<std::size_t> width(header.size());
  for (std::size_t i = 0; i < header.size(); ++i) width[i] = header[i].size();
  for (const auto& row : rows)
    for (std::size_t i = 0; i < row.cells.size(); ++i) width[i] = std::max(width[i], row.cells[i].size());
  // Numbers align right, names left; the verdict cell is painted after padding
  // so escape codes do not upset the column widths.
  auto line = [&](const std::vector<std::string>& cells, bool pass, bool is_header) {
    std::string s = " ";
    for (std::size_t i = 0; i < cells.size(); ++i) {
      const bool left = i < 2 || i + 2 >= cells.size();
      std::string cell = left ? fmt::format("{:<{}}", cells[i], width[i]) : fmt::format("{:>{}}", cells[i], width[i]);
      if (i == cells.size() - 1 && !is_header) cell = paint(cell, pass ? kGreen : kRed, colour);
      if (is_header) cell = paint(cell, kBold, colour);
      s += " " + cell;
    }
    // Trailing blanks of the last padded column help nobody.
    while (!s.empty() && s.back() == ' ') s.pop_back();
    return s + "\n";
  };
  out += line(header, true, true);
  for (const auto& row : rows) out += line(row.cells, row.pass, false);

  // The worst figures, always, pass or fail (STYLE.md).
  if (r.cases.empty()) {
    out += "  no case was run\n";
  } else {
    // The worst of each figure a limit applies to, pass or fail (STYLE.md).
    std::string worst;
    auto add = [&](const char* what, double x, const std::string& name) {
      worst += fmt::format("{}worst {} {} (case {})", worst.empty() ? "  " : "; ", what, figure_text(x),
                           name.empty() ? "-" : name);
    };
    if (shown.ulp) add("ulp", total.worst_ulp, total.worst_ulp_case);
    if (shown.scaled || !shown.rel_rmse) add("scaled error", total.worst_scaled_error, total.worst_scaled_case);
    if (shown.rel_rmse) worst += fmt::format("{}worst relative rmse {}", worst.empty() ? "  " : "; ",
                                             figure_text(total.worst_rel_rmse));
    out += worst + "\n";
    // The backward's gradients, when judged: the worst of each tensor both ways (docs/backward.md).
    const GradientSummary g = summarise_gradients(r);
    if (g.cases > 0) {
      out += fmt::format("  gradients judged on {} case(s), worst scaled error fed exact O/lse: dQ {}, dK {}, dV {}",
                         g.cases, figure_text(g.worst_fed_exact[0]), figure_text(g.worst_fed_exact[1]),
                         figure_text(g.worst_fed_exact[2]));
      if (g.bias_cases > 0) out += fmt::format(", d(bias) {}", figure_text(g.worst_fed_exact[3]));
      if (g.end_to_end_cases > 0)
        out += fmt::format("; end to end: dQ {}, dK {}, dV {}", figure_text(g.worst_end_to_end[0]),
                           figure_text(g.worst_end_to_end[1]), figure_text(g.worst_end_to_end[2]));
      if (g.end_to_end_cases > 0 && g.bias_cases > 0)
        out += fmt::format(", d(bias) {}", figure_text(g.worst_end_to_end[3]));
      if (!std::isnan(g.worst_ratio_to_plain))
        out += "; worst ratio to the plain backward " + figure_text(g.worst_ratio_to_plain);
      out += " (case " + g.worst_case + ")\n";
    }
  }
  for (const auto& g : growth_lines(error_growth(r.cases))) out += "  " + g + "\n";
  for (const auto& f : r.growth_failures()) out += "  " + paint("fails the budget: " + f, kRed, colour) + "\n";
  if (!r.skipped.empty()) {
    // Why, not only how many: the reasons, most frequent first.
    std::map<std::string, std::size_t> why;
    for (const auto& line : r.skipped) {
      const auto colon = line.find(": ");
      ++why[colon == std::string::npos ? std::string("no reason recorded") : line.substr(colon + 2)];
    }
    std::vector<std::pair<std::size_t, std::string>> sorted;
    for (const auto& [reason, n] : why) sorted.emplace_back(n, reason);
    std::stable_sort(sorted.begin(), sorted.end(), [](const auto& a, const auto& b) { return a.first > b.first; });
    out += fmt::format("  {} case(s) skipped (not run):", r.skipped.size());
    for (std::size_t i = 0; i < sorted.size() && i < 3; ++i)
      out += fmt::format("{} {} × {}", i ? ";" : "", sorted[i].first, sorted[i].second);
    if (sorted.size() > 3) out += fmt::format("; {} other reasons (see the record)", sorted.size() - 3);
    out += "\n";
  }
  for (const auto& c : r.cases) {
    if (c.within_budget) continue;
    out += failure_line(r, c) + "\n";  // never painted: greppable whatever the terminal
    for (const auto& reason : c.reasons) out += "    " + reason + "\n";
    for (const auto& d : c.fault_details)
      if (d.rfind("note: limit", 0) == 0) out += "    " + d.substr(6) + "\n";
  }
  return out;
}

void print_summary(std::FILE* stream, const RunRecord& r) {
  const std::string text = terminal_summary(r, colour_wanted(stream));
  std::fwrite(text.data(), 1, text.size(), stream);
  std::fflush(stream);
}

}  // namespace headroom
