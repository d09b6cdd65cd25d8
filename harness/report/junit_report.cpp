// headroom — JUnit XML (junit_report.h).
#include "headroom/junit_report.h"

#include <map>
#include <set>

#include <fmt/format.h>

#include "escape.h"
#include "sections.h"
#include "headroom/run_summary.h"
#include "headroom/terminal_report.h"

namespace headroom {
namespace {

using report_detail::xml_escape;

struct TestCase {
  std::string classname, name, out, failure_message, failure_text;
  bool skipped = false;
  std::string skipped_message;
};

// "gradients (N cases): d_q worst scaled error fed the exact O and lse X, end to
// end Y; d_k …; d_v …" for the cases of `r` whose backward was judged; "" when none.
std::string gradient_text(const RunRecord& r) {
  const GradientSummary g = summarise_gradients(r);
  if (g.cases == 0) return "";
  std::string s = fmt::format("gradients ({} case{}, {} end to end):", g.cases, g.cases == 1 ? "" : "s", g.end_to_end_cases);
  for (std::size_t t = 0; t < g.tensors(); ++t)
    s += fmt::format("{} {} worst scaled error fed the exact O and lse {}, end to end {}", t ? ";" : "",
                     kGradientNames[t], figure_text(g.worst_fed_exact[t]),
                     g.end_to_end_cases > 0 ? figure_text(g.worst_end_to_end[t]) : "—");
  return s + "\n";
}

}  // namespace

std::string junit_report(const RunRecord& r) {
  std::vector<TestCase> tests;
  for (const auto& g : summarise_groups(r)) {
    TestCase t;
    t.classname = "headroom." + r.kernel + "." + g.format;
    t.name = g.family;
    t.out = fmt::format("{} cases; margin {}{} (limit / worst figure, below 1 fails); worst ulp {} (case {}); worst "
                        "scaled error {} (case {}); worst rmse {}; faults {}\n",
                        g.cases, margin_text(g.margin), g.margin_figure.empty() ? "" : " on " + g.margin_figure,
                        figure_text(g.worst_ulp), g.worst_ulp_case, figure_text(g.worst_scaled_error),
                        g.worst_scaled_case, figure_text(g.worst_rmse), g.fault_count());
    RunRecord group = r;  // the group's cases only, for its gradient figures
    group.cases.clear();
    for (const auto& c : r.cases)
      if (c.family == g.family && c.format == g.format) group.cases.push_back(c);
    t.out += gradient_text(group);
    if (g.failing > 0) {
      t.failure_message = fmt::format("{} of {} cases outside budget", g.failing, g.cases);
      for (const auto& c : r.cases) {
        if (c.within_budget || c.family != g.family || c.format != g.format) continue;
        t.failure_text += failure_line(r, c) + "\n";
        for (const auto& reason : c.reasons) t.failure_text += "    " + reason + "\n";
        for (const auto& d : c.fault_details) t.failure_text += "    fault: " + d + "\n";
      }
    }
    tests.push_back(std::move(t));
  }
  // Families whose every case was skipped: visible as skipped, not as absent.
  std::set<std::string> run_families;
  for (const auto& c : r.cases) run_families.insert(c.family);
  std::map<std::string, std::size_t> skipped_only;
  for (const auto& line : r.skipped) {
    std::string family = skipped_family(line);
    if (family.empty()) family = "unknown family";
    if (!run_families.count(family)) ++skipped_only[family];
  }
  for (const auto& [family, n] : skipped_only) {
    TestCase t;
    t.classname = "headroom." + r.kernel + "." + r.input_format;
    t.name = family;
    t.skipped = true;
    t.skipped_message = fmt::format("{} cases skipped (not run)", n);
    tests.push_back(std::move(t));
  }

  std::size_t failures = 0, skipped = 0;
  for (const auto& t : tests) {
    failures += t.failure_message.empty() ? 0 : 1;
    skipped += t.skipped ? 1 : 0;
  }
  std::string x = "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n";
  x += fmt::format("<testsuites name=\"headroom\" tests=\"{}\" failures=\"{}\" errors=\"0\" skipped=\"{}\">\n",
                   tests.size(), failures, skipped);
  x += fmt::format("  <testsuite name=\"{}\" tests=\"{}\" failures=\"{}\" errors=\"0\" skipped=\"{}\">\n",
                   xml_escape("headroom." + r.kernel), tests.size(), failures, skipped);
  x += "    <properties>\n";
  const std::pair<std::string, std::string> props[] = {
      {"kernel", r.kernel}, {"input_format", r.input_format}, {"output_format", r.output_format},
      {"suite", r.suite},   {"shard", r.shard},               {"budget", r.budget},
      {"verdict", r.verdict()}, {"verdict_line", r.verdict_line()}, {"tool", r.tool}};
  for (const auto& [name, value] : props)
    x += fmt::format("      <property name=\"{}\" value=\"{}\"/>\n", name, xml_escape(value));
  // The backward (docs/backward.md): which gradients were judged, as the coverage section says it, and the
  // worst scaled error of each gradient tensor both ways ("—" where none was judged that way).
  for (const auto& line : report_detail::coverage_lines(coverage(r)))
    if (line.label == "Gradients judged")
      x += fmt::format("      <property name=\"gradients_judged\" value=\"{}\"/>\n", xml_escape(line.text));
  const GradientSummary grads = summarise_gradients(r);
  if (grads.cases > 0) {
    for (std::size_t t = 0; t < grads.tensors(); ++t) {
      x += fmt::format("      <property name=\"{}.fed_exact.max_scaled_error\" value=\"{}\"/>\n", kGradientNames[t],
                       xml_escape(figure_text(grads.worst_fed_exact[t])));
      x += fmt::format("      <property name=\"{}.end_to_end.max_scaled_error\" value=\"{}\"/>\n", kGradientNames[t],
                       xml_escape(grads.end_to_end_cases > 0 ? figure_text(grads.worst_end_to_end[t]) : "—"));
    }
  }
  x += "    </properties>\n";
  for (const auto& t : tests) {
    x += fmt::format("    <testcase classname=\"{}\" name=\"{}\">\n", xml_escape(t.classname), xml_escape(t.name));
    if (t.skipped) x += fmt::format("      <skipped message=\"{}\"/>\n", xml_escape(t.skipped_message));
    if (!t.failure_message.empty())
      x += fmt::format("      <failure message=\"{}\" type=\"budget\">{}</failure>\n", xml_escape(t.failure_message),
                       xml_escape(t.failure_text));
    if (!t.out.empty()) x += fmt::format("      <system-out>{}</system-out>\n", xml_escape(t.out));
    x += "    </testcase>\n";
  }
  x += "  </testsuite>\n</testsuites>\n";
  return x;
}

}  // namespace headroom
