// headroom — comparing two run records (compare.h).
#include "headroom/compare.h"

#include <algorithm>
#include <cmath>
#include <limits>
#include <map>
#include <ostream>

#include <fmt/format.h>

#include "headroom/atomic_file.h"
#include "headroom/format.h"
#include "headroom/input_error.h"
#include "headroom/run_summary.h"

namespace headroom {
namespace {

using nlohmann::json;

json number(double x) { return json_number(x); }

double relative_change(double base, double next) {
  if (base == next) return 0;
  if (base == 0) return next > 0 ? std::numeric_limits<double>::infinity() : -std::numeric_limits<double>::infinity();
  if (std::isinf(base)) return std::isinf(next) ? 0 : -1;
  return (next - base) / std::fabs(base);
}

std::string percent(double rel) {
  if (std::isinf(rel)) return rel > 0 ? "from 0" : "to 0";
  return fmt::format("{:+.1f}%", 100 * rel);
}

class Comparer {
 public:
  Comparer(Comparison& out, const std::string& kernel) : out_(out), kernel_(kernel) {}

  // A figure of the error kind: compared with the tolerance.
  void error_figure(const GroupSummary& b, const GroupSummary& n, const std::string& figure, double base, double next) {
    if (std::isnan(base) && std::isnan(next)) return;
    if (std::isnan(next)) {
      out_.notes.push_back(fmt::format("family={} format={} {}: {} in BASE, not measured in NEW", b.family, b.format,
                                       figure, figure_text(base)));
      return;
    }
    if (std::isnan(base)) return;  // newly measured: nothing to compare against
    const double t = out_.tolerance, floor = floor_of(figure);
    if (next > base * (1 + t) && next - base > floor)
      add(out_.regressions, "REGRESSION", n, figure, base, next);
    else if (next * (1 + t) < base && base - next > floor)
      add(out_.improvements, "BETTER", n, figure, base, next);
  }
  // A count (faults, failing cases): any increase regresses.
  void count_figure(const GroupSummary& n, const std::string& figure, double base, double next) {
    if (next > base)
      add(out_.regressions, "REGRESSION", n, figure, base, next);
    else if (next < base)
      add(out_.improvements, "BETTER", n, figure, base, next);
  }
  void lost_group(const GroupSummary& b) {
    FigureChange c{kernel_, b.family, b.format, "cases", static_cast<double>(b.cases), 0, -1, ""};
    c.text = fmt::format("REGRESSION kernel={} family={} format={} cases {} → 0 (tried in BASE, not in NEW)", kernel_,
                         b.family, b.format, b.cases);
    out_.regressions.push_back(std::move(c));
  }

 private:
  double floor_of(const std::string& figure) const {
    if (figure == "worst_ulp") return out_.floors.ulp;
    if (figure == "worst_scaled_error" || figure.starts_with("worst_gradient_scaled_error")) return out_.floors.scaled;
    if (figure == "worst_rel_rmse") return out_.floors.rel_rmse;
    return 0;
  }
  void add(std::vector<FigureChange>& list, const char* word, const GroupSummary& g, const std::string& figure,
           double base, double next) {
    FigureChange c{kernel_, g.family, g.format, figure, base, next, relative_change(base, next), ""};
    c.text = fmt::format("{} kernel={} family={} format={} {} {} → {} ({})", word, kernel_, g.family, g.format, figure,
                         figure_text(base), figure_text(next), percent(c.relative));
    list.push_back(std::move(c));
  }
  Comparison& out_;
  std::string kernel_;
};

std::map<std::pair<std::string, std::string>, GroupSummary> by_group(const RunRecord& r) {
  std::map<std::pair<std::string, std::string>, GroupSummary> out;
  for (auto& g : summarise_groups(r)) out[{g.family, g.format}] = g;
  return out;
}

// The summary table: one row per group of either record, with its status.
std::vector<GroupComparison> group_rows(const RunRecord& base, const RunRecord& next, const Comparison& c) {
  std::vector<GroupComparison> rows;
  std::map<std::pair<std::string, std::string>, std::size_t> at;
  auto row = [&](const GroupSummary& g) -> GroupComparison& {
    const auto key = std::make_pair(g.family, g.format);
    if (auto it = at.find(key); it != at.end()) return rows[it->second];
    at[key] = rows.size();
    GroupComparison fresh;
    fresh.family = g.family;
    fresh.format = g.format;
    rows.push_back(std::move(fresh));
    return rows.back();
  };
  // One side's figures into a row: BASE's or NEW's members.
  auto fill = [&](const RunRecord& rec, bool GroupComparison::*present, double GroupComparison::*cases,
                  double GroupComparison::*ulp, double GroupComparison::*scaled, double GroupComparison::*rel_rmse,
                  double GroupComparison::*failing, double GroupComparison::*faults) {
    for (const auto& g : summarise_groups(rec)) {
      GroupComparison& r = row(g);
      r.*present = true;
      r.*cases = static_cast<double>(g.cases);
      r.*ulp = g.worst_ulp;
      r.*scaled = g.worst_scaled_error;
      r.*rel_rmse = g.worst_rel_rmse;
      r.*failing = static_cast<double>(g.failing);
      r.*faults = g.fault_count();
    }
  };
  using G = GroupComparison;
  fill(base, &G::in_base, &G::base_cases, &G::base_ulp, &G::base_scaled, &G::base_rel_rmse, &G::base_failing,
       &G::base_faults);
  fill(next, &G::in_new, &G::new_cases, &G::new_ulp, &G::new_scaled, &G::new_rel_rmse, &G::new_failing, &G::new_faults);
  for (auto& r : rows) {
    auto any = [&](const std::vector<FigureChange>& list) {
      for (const auto& f : list)
        if (f.family == r.family && f.format == r.format) return true;
      return false;
    };
    r.status = !r.in_new ? "lost" : !r.in_base ? "new" : any(c.regressions) ? "worse" : any(c.improvements) ? "better" : "same";
  }
  return rows;
}

// "7 → 10.5", or "7" when unchanged, "—" for a side that lacks the group.
std::string change_text(bool in_base, double base, bool in_new, double next) {
  const std::string b = in_base ? figure_text(base) : "—", n = in_new ? figure_text(next) : "—";
  if (b == n) return b;
  return b + " → " + n;
}

std::vector<std::vector<std::string>> table_cells(const Comparison& c) {
  std::vector<std::vector<std::string>> out;
  for (const auto& r : c.groups) {
    out.push_back({r.family, r.format, change_text(r.in_base, r.base_cases, r.in_new, r.new_cases),
                   change_text(r.in_base, r.base_ulp, r.in_new, r.new_ulp),
                   change_text(r.in_base, r.base_scaled, r.in_new, r.new_scaled),
                   change_text(r.in_base, r.base_rel_rmse, r.in_new, r.new_rel_rmse),
                   change_text(r.in_base, r.base_failing, r.in_new, r.new_failing),
                   change_text(r.in_base, r.base_faults, r.in_new, r.new_faults), r.status});
  }
  return out;
}

const std::vector<std::string> kTableHead{"family", "format", "cases", "worst ulp", "worst scaled", "worst rel rmse",
                                          "failing", "faults", "change"};

}  // namespace

NoiseFloors default_noise_floors(const std::string& output_format) {
  NoiseFloors f;
  const auto parsed = parse_format(output_format);
  // int8 kernels write float32 (format.h); an unknown name gets float32's u too.
  f.rel_rmse = unit_roundoff(parsed && *parsed != Format::int8 ? *parsed : Format::float32);
  return f;
}

Comparison compare_records(const RunRecord& base, const RunRecord& next, double tolerance, const std::string& base_file,
                           const std::string& new_file) {
  Comparison out;
  out.base_file = base_file;
  out.new_file = new_file;
  out.tolerance = tolerance;
  out.floors = default_noise_floors(next.output_format.empty() ? base.output_format : next.output_format);
  if (base.kernel != next.kernel)
    out.notes.push_back(fmt::format("kernels differ: BASE {}, NEW {}", base.kernel, next.kernel));
  if (base.suite != next.suite)
    out.notes.push_back(fmt::format("suites differ: BASE {}, NEW {}; the groups hold different cases", base.suite, next.suite));
  if (base.budget != next.budget)
    out.notes.push_back(fmt::format("budgets differ: BASE {}, NEW {}; failing-case counts are not like for like",
                                    base.budget, next.budget));
  const auto b_groups = by_group(base), n_groups = by_group(next);
  Comparer cmp(out, next.kernel);
  for (const auto& g : summarise_groups(base)) {
    const auto it = n_groups.find({g.family, g.format});
    if (it == n_groups.end()) {
      cmp.lost_group(g);
      continue;
    }
    const GroupSummary& n = it->second;
    cmp.error_figure(g, n, "worst_ulp", g.worst_ulp, n.worst_ulp);
    cmp.error_figure(g, n, "worst_scaled_error", g.worst_scaled_error, n.worst_scaled_error);
    cmp.error_figure(g, n, "worst_rel_rmse", g.worst_rel_rmse, n.worst_rel_rmse);
    cmp.error_figure(g, n, "worst_gradient_scaled_error", g.worst_gradient_fed_exact, n.worst_gradient_fed_exact);
    cmp.error_figure(g, n, "worst_gradient_scaled_error_end_to_end", g.worst_gradient_end_to_end,
                     n.worst_gradient_end_to_end);
    cmp.count_figure(n, "failing_cases", static_cast<double>(g.failing), static_cast<double>(n.failing));
    std::map<std::string, int> classes = g.faults;
    for (const auto& [name, k] : n.faults) classes.emplace(name, 0);
    for (const auto& [name, unused] : classes) {
      const auto bf = g.faults.find(name), nf = n.faults.find(name);
      cmp.count_figure(n, "fault:" + name, bf == g.faults.end() ? 0 : bf->second, nf == n.faults.end() ? 0 : nf->second);
    }
  }
  for (const auto& g : summarise_groups(next))
    if (!b_groups.count({g.family, g.format}))
      out.notes.push_back(fmt::format("family={} format={}: {} cases in NEW only, not compared", g.family, g.format, g.cases));
  out.groups = group_rows(base, next, out);
  return out;
}

std::string comparison_text(const Comparison& c) {
  std::string s = fmt::format("compare {} → {} (tolerance {:g}%; changes under 1 ULP, 1 scaled-error unit or {} of "
                              "relative RMSE are noise)\n",
                              c.base_file, c.new_file, 100 * c.tolerance, figure_text(c.floors.rel_rmse));
  for (const auto& n : c.notes) s += "  note: " + n + "\n";
  // The per-group table, columns padded to their widest cell (counted in code points: "→" is one column).
  const auto cells = table_cells(c);
  auto width_of = [](const std::string& t) {
    std::size_t w = 0;
    for (unsigned char ch : t) w += (ch & 0xC0) != 0x80;
    return w;
  };
  std::vector<std::size_t> width(kTableHead.size());
  for (std::size_t i = 0; i < kTableHead.size(); ++i) width[i] = width_of(kTableHead[i]);
  for (const auto& row : cells)
    for (std::size_t i = 0; i < row.size(); ++i) width[i] = std::max(width[i], width_of(row[i]));
  auto line = [&](const std::vector<std::string>& row) {
    std::string l = " ";
    for (std::size_t i = 0; i < row.size(); ++i) l += " " + row[i] + std::string(width[i] - width_of(row[i]), ' ');
    while (!l.empty() && l.back() == ' ') l.pop_back();
    return l + "\n";
  };
  s += line(kTableHead);
  for (const auto& row : cells) s += line(row);
  for (const auto& r : c.regressions) s += r.text + "\n";
  for (const auto& i : c.improvements) s += i.text + "\n";
  s += fmt::format("{} regression(s), {} improvement(s): {}\n", c.regressions.size(), c.improvements.size(),
                   c.regressed() ? "worse" : "no regression");
  return s;
}

std::string comparison_markdown(const Comparison& c) {
  auto cell = [](const std::string& t) {
    std::string out;
    for (char ch : t) out += ch == '|' ? std::string("\\|") : std::string(1, ch);
    return out;
  };
  std::string md = fmt::format("## headroom compare: {}\n\n", c.regressed() ? "REGRESSION" : "no regression");
  md += fmt::format("`{}` → `{}`: {} regression(s), {} improvement(s); tolerance {:g} %, changes under 1 ULP, 1 "
                    "scaled-error unit or {} of relative RMSE are noise.\n\n",
                    c.base_file, c.new_file, c.regressions.size(), c.improvements.size(), 100 * c.tolerance,
                    figure_text(c.floors.rel_rmse));
  for (const auto& n : c.notes) md += "> note: " + cell(n) + "\n>\n";
  if (!c.notes.empty()) md += "\n";
  md += "|";
  for (const auto& h : kTableHead) md += " " + h + " |";
  md += "\n|";
  for (std::size_t i = 0; i < kTableHead.size(); ++i) md += i < 2 ? "---|" : i + 1 == kTableHead.size() ? "---|" : "---:|";
  md += "\n";
  for (const auto& row : table_cells(c)) {
    md += "|";
    for (std::size_t i = 0; i < row.size(); ++i) {
      const bool worse = i + 1 == row.size() && (row[i] == "worse" || row[i] == "lost");
      md += " " + (worse ? "**" + cell(row[i]) + "**" : cell(row[i])) + " |";
    }
    md += "\n";
  }
  auto list = [&](const char* title, const std::vector<FigureChange>& changes) {
    if (changes.empty()) return;
    md += fmt::format("\n### {}\n\n", title);
    for (const auto& f : changes) md += "- `" + f.text + "`\n";
  };
  list("Regressions", c.regressions);
  list("Improvements", c.improvements);
  return md;
}

json to_json(const Comparison& c) {
  auto changes = [](const std::vector<FigureChange>& list) {
    json a = json::array();
    for (const auto& f : list)
      a.push_back({{"kernel", f.kernel}, {"family", f.family}, {"format", f.format}, {"figure", f.figure},
                   {"base", number(f.base)}, {"new", number(f.next)}, {"relative", number(f.relative)}, {"text", f.text}});
    return a;
  };
  return {{"base", c.base_file},
          {"new", c.new_file},
          {"tolerance", c.tolerance},
          {"regressed", c.regressed()},
          {"regressions", changes(c.regressions)},
          {"improvements", changes(c.improvements)},
          {"notes", c.notes}};
}

int run_compare(const std::filesystem::path& base, const std::filesystem::path& next, double tolerance,
                const std::filesystem::path& json_out, std::ostream& out, const std::filesystem::path& markdown_out) {
  if (!std::isfinite(tolerance) || tolerance < 0)
    throw InputError("command line", "--tolerance", fmt::format("is {}, not a finite number ≥ 0", tolerance),
                     "give a relative tolerance such as 0.10 for 10 %");
  const RunRecord b = read_run_record(base);
  const RunRecord n = read_run_record(next);
  const Comparison c = compare_records(b, n, tolerance, base.string(), next.string());
  out << comparison_text(c);
  if (!json_out.empty()) write_file_atomically(json_out, to_json(c).dump(2) + "\n");
  if (!markdown_out.empty()) write_file_atomically(markdown_out, comparison_markdown(c));
  return c.regressed() ? 1 : 0;
}

}  // namespace headroom
