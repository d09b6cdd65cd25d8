// headroom — the terminal summary and the FAIL lines (terminal_report.h).
#include "headroom/terminal_report.h"

#include <unistd.h>

#include <algorithm>
#include <cstdlib>
#include <vector>

#include <fmt/format.h>

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
  return fmt::format("FAIL kernel={} family={} seed={} case={} expected={} obtained={} ulp={} replay: {}", r.kernel,
                     c.family, c.seed, c.name, hex_float(c.figures.worst_expected),
                     hex_float(c.figures.worst_obtained), figure_text(c.figures.max_ulp),
                     c.replay.empty() ? "(none recorded)" : c.replay);
}

std::string terminal_summary(const RunRecord& r, bool colour) {
  const std::string verdict = r.verdict();
  const char* verdict_colour = verdict == "pass" ? kGreen : kRed;
  std::string out = fmt::format("{} {} ({} → {}), suite {}, shard {}, budget {}: {}\n", paint("headroom", kBold, colour),
                                r.kernel, r.input_format, r.output_format, r.suite, r.shard, r.budget,
                                paint(verdict, verdict_colour, colour) + r.verdict_line().substr(verdict.size()));

  const std::vector<std::string> header{"family", "format", "cases", "worst ulp", "worst scaled", "worst rmse",
                                        "faults", "verdict"};
  std::vector<Row> rows;
  auto row_of = [](const GroupSummary& g, std::string family) {
    Row row;
    row.pass = g.failing == 0;
    row.cells = {std::move(family),
                 g.format.empty() ? "all" : g.format,
                 fmt::format("{}", g.cases),
                 figure_text(g.worst_ulp),
                 figure_text(g.worst_scaled_error),
                 figure_text(g.worst_rmse),
                 faults_text(g.faults),
                 row.pass ? "pass" : fmt::format("fail ({})", g.failing)};
    return row;
  };
  for (const auto& g : summarise_groups(r)) rows.push_back(row_of(g, g.family));
  const GroupSummary total = summarise_run(r);
  rows.push_back(row_of(total, "total"));

  std::vector<std::size_t> width(header.size());
  for (std::size_t i = 0; i < header.size(); ++i) width[i] = header[i].size();
  for (const auto& row : rows)
    for (std::size_t i = 0; i < row.cells.size(); ++i) width[i] = std::max(width[i], row.cells[i].size());
  // Numbers align right, names left; the verdict cell is painted after padding
  // so escape codes do not upset the column widths.
  auto line = [&](const std::vector<std::string>& cells, bool pass, bool is_header) {
    std::string s = " ";
    for (std::size_t i = 0; i < cells.size(); ++i) {
      const bool left = i < 2 || i >= 6;
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
    out += fmt::format("  worst ulp {} (case {}); worst scaled error {} (case {})\n", figure_text(total.worst_ulp),
                       total.worst_ulp_case.empty() ? "-" : total.worst_ulp_case,
                       figure_text(total.worst_scaled_error),
                       total.worst_scaled_case.empty() ? "-" : total.worst_scaled_case);
  }
  if (!r.skipped.empty()) out += fmt::format("  {} case(s) skipped (not run)\n", r.skipped.size());
  for (const auto& c : r.cases) {
    if (c.within_budget) continue;
    out += failure_line(r, c) + "\n";  // never painted: greppable whatever the terminal
    for (const auto& reason : c.reasons) out += "    " + reason + "\n";
  }
  return out;
}

void print_summary(std::FILE* stream, const RunRecord& r) {
  const std::string text = terminal_summary(r, colour_wanted(stream));
  std::fwrite(text.data(), 1, text.size(), stream);
  std::fflush(stream);
}

}  // namespace headroom
