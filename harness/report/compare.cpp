// headroom — comparing two run records (compare.h).
#include "headroom/compare.h"

#include <cmath>
#include <limits>
#include <map>
#include <ostream>

#include <fmt/format.h>

#include "headroom/atomic_file.h"
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
    const double t = out_.tolerance;
    if (next > base * (1 + t))
      add(out_.regressions, "REGRESSION", n, figure, base, next);
    else if (next * (1 + t) < base)
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

}  // namespace

Comparison compare_records(const RunRecord& base, const RunRecord& next, double tolerance, const std::string& base_file,
                           const std::string& new_file) {
  Comparison out;
  out.base_file = base_file;
  out.new_file = new_file;
  out.tolerance = tolerance;
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
    cmp.error_figure(g, n, "worst_rmse", g.worst_rmse, n.worst_rmse);
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
  return out;
}

std::string comparison_text(const Comparison& c) {
  std::string s = fmt::format("compare {} → {} (tolerance {:g}%)\n", c.base_file, c.new_file, 100 * c.tolerance);
  for (const auto& n : c.notes) s += "  note: " + n + "\n";
  for (const auto& r : c.regressions) s += r.text + "\n";
  for (const auto& i : c.improvements) s += i.text + "\n";
  s += fmt::format("{} regression(s), {} improvement(s): {}\n", c.regressions.size(), c.improvements.size(),
                   c.regressed() ? "worse" : "no regression");
  return s;
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
                const std::filesystem::path& json_out, std::ostream& out) {
  if (!std::isfinite(tolerance) || tolerance < 0)
    throw InputError("command line", "--tolerance", fmt::format("is {}, not a finite number ≥ 0", tolerance),
                     "give a relative tolerance such as 0.10 for 10 %");
  const RunRecord b = read_run_record(base);
  const RunRecord n = read_run_record(next);
  const Comparison c = compare_records(b, n, tolerance, base.string(), next.string());
  out << comparison_text(c);
  if (!json_out.empty()) write_file_atomically(json_out, to_json(c).dump(2) + "\n");
  return c.regressed() ? 1 : 0;
}

}  // namespace headroom
