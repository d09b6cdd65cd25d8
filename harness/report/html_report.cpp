// headroom — the self-contained HTML report (html_report.h).
#include "headroom/html_report.h"

#include <cmath>
#include <map>

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include "escape.h"
#include "headroom/markdown_report.h"
#include "headroom/run_summary.h"
#include "headroom/scores.h"
#include "html_plot_script.h"
#include "sections.h"

namespace headroom {
namespace {

using nlohmann::json;
using report_detail::xml_escape;

constexpr const char* kStyle = R"CSS(
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; margin: 2em auto; max-width: 1360px;
       padding: 0 1.5em; color: #1d2330; line-height: 1.45; }
h1 { font-size: 1.6em; margin-bottom: 0.3em; }
h2 { font-size: 1.25em; border-bottom: 1px solid #d6dae3; padding-bottom: 0.2em; margin-top: 1.8em; }
table { border-collapse: collapse; margin: 0.6em 0; font-size: 0.92em; }
th, td { border: 1px solid #d6dae3; padding: 0.25em 0.6em; text-align: left; vertical-align: top; }
th { background: #f2f4f8; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
code, pre { font-family: ui-monospace, "DejaVu Sans Mono", monospace; font-size: 0.9em; }
pre { background: #f5f6f9; border: 1px solid #e1e4ea; padding: 0.5em 0.8em; overflow-x: auto; white-space: pre-wrap; }
.verdict-pass { color: #17702d; } .verdict-fail { color: #b3261e; }
td.fail, span.fail { color: #b3261e; font-weight: 600; }
line.limit { stroke: #4a5263; stroke-width: 2; } .key.limit-key { border-top: 2px solid #4a5263; height: 0; }
line.fit { stroke: #e08a1e; stroke-width: 1.5; stroke-dasharray: 5 3; } .key.fit-key { border-top: 2px dashed #e08a1e; height: 0; }
blockquote { border-left: 4px solid #8a94a8; margin: 1em 0; padding: 0.3em 1em; background: #f7f8fb; }
.plots { display: grid; grid-template-columns: repeat(auto-fill, minmax(660px, 1fr)); gap: 1em; }
figure { margin: 0; border: 1px solid #e1e4ea; padding: 0.6em; background: #fff; }
figcaption { font-size: 0.88em; color: #4a5263; }
svg text { font-family: system-ui, sans-serif; }
svg .tick { font-size: 11px; fill: #4a5263; }
svg .axis-label { font-size: 12px; fill: #1d2330; }
svg .plot-area { fill: #fbfcfe; stroke: #c3c9d5; }
svg .grid { stroke: #e3e7ee; stroke-width: 1; }
svg .axis { stroke: #8a94a8; }
svg circle.pass { fill: #2f62c8; fill-opacity: 0.65; stroke: #1c3f86; stroke-width: 0.6; }
svg circle.fail { fill: #d23b2f; fill-opacity: 0.85; stroke: #7a1a13; stroke-width: 0.6; }
svg rect.bar { fill: #5b7fcf; }
.key { display: inline-block; width: 0.8em; height: 0.8em; margin: 0 0.25em 0 0.7em; vertical-align: -0.05em; }
.fault-0 { fill: #d23b2f; background: #d23b2f; } .fault-1 { fill: #e08a1e; background: #e08a1e; }
.fault-2 { fill: #7b3fb4; background: #7b3fb4; } .fault-3 { fill: #b4407b; background: #b4407b; }
.fault-4 { fill: #2a9d8f; background: #2a9d8f; } .fault-5 { fill: #c7a415; background: #c7a415; }
.fault-6 { fill: #3d3d3d; background: #3d3d3d; } .fault-7 { fill: #8c6d4f; background: #8c6d4f; }
.pass-key { background: #2f62c8; } .fail-key { background: #d23b2f; }
)CSS";

// Finite figures as numbers; NaN and infinities as null (JSON has neither,
// and a plot cannot place them).
json plot_number(double x) { return std::isfinite(x) ? json(x) : json(nullptr); }

// The label of histogram bucket k, from its upper edge (scores.h).
std::string bucket_label(const std::vector<double>& edges, std::size_t k) {
  if (k >= edges.size()) return fmt::format("#{}", k);
  const double e = edges[k];
  if (std::isinf(e)) return "more";
  if (e == 0.5) return "½";
  if (e < 1024 * 2) return figure_text(e);
  if (e < 1024.0 * 1024) return fmt::format("{}k", static_cast<long long>(e / 1024));
  return fmt::format("{}M", static_cast<long long>(e / (1024.0 * 1024)));
}

json plot_data(const RunRecord& r) {
  json cases = json::array();
  for (const auto& c : r.cases) {
    cases.push_back({{"name", c.name},
                     {"family", c.family},
                     {"kv_len", c.kv_len},
                     {"logit_scale", plot_number(c.logit_scale)},
                     {"scaled", plot_number(c.figures.max_scaled_error)},
                     {"limit", plot_number(c.limits.max_scaled_error)},
                     {"ulp", plot_number(c.figures.max_ulp)},
                     {"pass", c.within_budget}});
  }
  std::vector<double> counts;
  for (const auto& c : r.cases) {
    if (c.ulp_histogram.size() > counts.size()) counts.resize(c.ulp_histogram.size(), 0.0);
    for (std::size_t k = 0; k < c.ulp_histogram.size(); ++k)
      if (std::isfinite(c.ulp_histogram[k])) counts[k] += c.ulp_histogram[k];
  }
  const auto edges = ulp_histogram_edges();
  json labels = json::array();
  for (std::size_t k = 0; k < counts.size(); ++k) labels.push_back(bucket_label(edges, k));

  json classes = json::array();
  for (const auto& t : fault_totals_by_class(r)) classes.push_back(t.name);
  // One row per family tried (over every format), faults by class.
  std::vector<std::string> family_order;
  std::map<std::string, std::map<std::string, int>> by_family;
  for (const auto& g : summarise_groups(r)) {
    if (!by_family.count(g.family)) family_order.push_back(g.family);
    auto& row = by_family[g.family];
    for (const auto& [name, n] : g.faults) row[name] += n;
  }
  json faults = json::array();
  for (const auto& family : family_order) faults.push_back({{"family", family}, {"counts", by_family[family]}});
  // Each family's fit through its median error (error_growth.h), drawn over the error-vs-Tk plot.
  json fits = json::array();
  for (const auto& g : error_growth(r.cases))
    for (const auto& f : g.families)
      fits.push_back({{"format", f.format}, {"family", f.family}, {"exponent", plot_number(f.median.exponent)},
                      {"intercept", plot_number(f.median.intercept)}, {"spread", plot_number(f.median.spread)},
                      {"from", f.min_kv_len}, {"to", f.max_kv_len}});
  return {{"cases", cases}, {"histogram", {{"counts", counts}, {"labels", labels}}},
          {"fault_classes", classes}, {"faults", faults}, {"growth", fits}};
}

std::string h(const std::string& s) { return xml_escape(s); }

std::string table_row(const std::vector<std::string>& cells, const std::string& tag = "td") {
  std::string s = "<tr>";
  for (const auto& c : cells) s += "<" + tag + ">" + c + "</" + tag + ">";
  return s + "</tr>\n";
}

std::string num(const std::string& text, bool fail = false) {
  return std::string("<td class=\"num") + (fail ? " fail" : "") + "\">" + h(text) + "</td>";
}

}  // namespace

std::string html_report(const RunRecord& r) {
  const bool pass = r.verdict() == "pass";
  const GroupSummary total = summarise_run(r);
  const Coverage cov = coverage(r);
  std::string o = "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n";
  // No fetch of any kind: only the inline script and styles may run.
  o += "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; script-src 'unsafe-inline'; "
       "style-src 'unsafe-inline'\">\n";
  o += "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n";
  o += fmt::format("<title>headroom review: {} — {}</title>\n<style>{}</style>\n</head>\n<body>\n", h(r.kernel),
                   pass ? "PASS" : "FAIL", kStyle);
  o += fmt::format("<h1>headroom review: {} — <span class=\"verdict-{}\">{}</span>{}</h1>\n", h(r.kernel),
                   pass ? "pass" : "fail", pass ? "PASS" : "FAIL", h(r.verdict_line().substr(r.verdict().size())));
  if (const std::string skipped = skipped_headline(r); !skipped.empty()) o += "<p><b>" + h(skipped) + "</b></p>\n";
  o += "<table>\n";
  for (const auto& f : report_detail::run_facts(r)) o += table_row({"<b>" + h(f.label) + "</b>", h(f.text)}, "td");
  o += "</table>\n";
  o += fmt::format("<blockquote>{}</blockquote>\n", h(kEvidenceNotProof));

  if (!std::isnan(total.margin))
    o += fmt::format("<p><b>Smallest margin: {}</b> ({} in case <code>{}</code>; margin = limit ÷ worst figure: above "
                     "1 is within budget, below 1 fails).</p>\n",
                     h(margin_text(total.margin)), h(total.margin_figure), h(total.margin_case));
  for (const auto& w : r.warnings) o += "<p class=\"fail\"><b>Warning:</b> " + h(w) + "</p>\n";

  // Only the figures a limit applies to (as in the Markdown report).
  const LimitedFigures shown = limited_figures(r);
  o += "<h2>Worst figures</h2>\n";
  if (r.cases.empty()) {
    o += "<p>No case was run.</p>\n";
  } else {
    o += "<ul>";
    if (shown.ulp)
      o += fmt::format("<li>worst ULP distance: <b>{}</b> (case <code>{}</code>)</li>", h(figure_text(total.worst_ulp)),
                       h(total.worst_ulp_case));
    if (shown.scaled)
      o += fmt::format("<li>worst scaled error: <b>{}</b> rounding units of the row magnitude (case <code>{}</code>)</li>",
                       h(figure_text(total.worst_scaled_error)), h(total.worst_scaled_case));
    if (shown.rel_rmse) o += fmt::format("<li>worst relative RMSE: <b>{}</b></li>", h(figure_text(total.worst_rel_rmse)));
    if (shown.ratio)
      o += fmt::format("<li>worst ratio to the plain kernel: <b>{}</b></li>", h(figure_text(total.worst_ratio_to_plain)));
    o += "</ul>\n";
  }
  if (const std::string why = uncertified_explanation(r); !why.empty()) o += "<blockquote>" + h(why) + "</blockquote>\n";

  o += "<h2>Plots</h2>\n<div class=\"plots\">\n";
  const std::pair<const char*, const char*> figures[] = {
      {"kv-len", "Error against sequence length: each case's largest scaled error against its Tk."},
      {"logit-scale", "Error against logit scale: each case's largest scaled error against its largest |scaled score|."},
      {"ulp-histogram", "Histogram of ULP errors: output elements per ULP-distance bucket, over all cases."},
      {"faults", "Faults by family, stacked by class."}};
  std::string fault_keys;
  const auto classes = fault_totals_by_class(r);
  for (std::size_t i = 0; i < classes.size(); ++i)
    fault_keys += fmt::format("<span class=\"key fault-{}\"></span>{}", i % 8, h(classes[i].name));
  for (const auto& [id, text] : figures) {
    std::string keys;
    if (std::string(id) == "kv-len" || std::string(id) == "logit-scale")
      keys = "<br><span class=\"key pass-key\"></span>within budget<span class=\"key fail-key\"></span>failing"
             "<span class=\"key limit-key\"></span>the case's scaled-error limit";
    if (std::string(id) == "kv-len") keys += "<span class=\"key fit-key\"></span>each family's growth fit (median error)";
    if (std::string(id) == "faults") keys = "<br>" + fault_keys;
    o += fmt::format("<figure id=\"fig-{0}\"><figcaption>{1} <span id=\"note-{0}\"></span>{2}</figcaption></figure>\n",
                     id, h(text), keys);
  }
  o += "</div>\n<noscript><p>The plots are drawn by the page's inline script; enable scripts to see them.</p></noscript>\n";

  o += "<h2>Error growth with Tk</h2>\n";
  const auto growth = error_growth(r.cases);
  if (growth.empty()) o += "<p>" + h(report_detail::no_growth_fit_text()) + "</p>\n";
  o += "<ul>";
  for (const auto& line : growth_lines(growth)) o += "<li><b>" + h(line) + "</b></li>";
  for (const auto& f : r.growth_failures()) o += "<li class=\"fail\"><b>Fails the budget:</b> " + h(f) + "</li>";
  o += "</ul>\n";
  if (!growth.empty()) {
    o += "<p>" + h(report_detail::kGrowthNote) + "</p>\n<table class=\"growth\">\n";
    const auto table = report_detail::growth_table(growth);
    for (std::size_t i = 0; i < table.size(); ++i) {
      std::vector<std::string> cells;
      for (const auto& c : table[i]) cells.push_back(h(c));
      o += table_row(cells, i == 0 ? "th" : "td");
    }
    o += "</table>\n";
  }

  o += "<h2>Error budget</h2>\n<p>Worst figure seen against its limit, per family and format, for each figure a "
       "limit applies to. Limits are resolved at each case's shape, so a range means they differ between the cases of a "
       "row; &ldquo;—&rdquo; means the record does not carry it. Margin is the smallest limit ÷ figure of any case of "
       "the row (below 1 fails).</p>\n<table>\n";
  std::vector<std::string> head{"family", "format", "cases", "failing"};
  if (shown.ulp) head.insert(head.end(), {"worst ULP", "ULP limit"});
  if (shown.scaled) head.insert(head.end(), {"worst scaled error", "scaled limit"});
  if (shown.rel_rmse) head.insert(head.end(), {"worst rel. RMSE", "rel. RMSE limit"});
  if (shown.ratio) head.insert(head.end(), {"worst ratio to plain", "ratio limit"});
  head.push_back("margin");
  o += table_row(head, "th");
  for (const auto& g : summarise_groups(r)) {
    o += "<tr><td>" + h(g.family) + "</td><td>" + h(g.format) + "</td>" + num(fmt::format("{}", g.cases)) +
         num(fmt::format("{}", g.failing), g.failing > 0);
    if (shown.ulp) o += num(figure_text(g.worst_ulp)) + num(limit_range_text(g.ulp_limit));
    if (shown.scaled) o += num(figure_text(g.worst_scaled_error)) + num(limit_range_text(g.scaled_limit));
    if (shown.rel_rmse) o += num(figure_text(g.worst_rel_rmse)) + num(limit_range_text(g.rel_rmse_limit));
    if (shown.ratio)
      o += num(std::isnan(g.worst_ratio_to_plain) ? "—" : figure_text(g.worst_ratio_to_plain)) +
           num(limit_range_text(g.ratio_limit));
    o += num(margin_text(g.margin), g.margin < 1) + "</tr>\n";
  }
  o += "</table>\n<h2>Faults</h2>\n<table>\n" + table_row({"class", "faults", "cases", "tolerated"}, "th");
  for (const auto& t : classes)
    o += "<tr><td>" + h(t.name) + "</td>" + num(fmt::format("{}", t.count), t.count > 0 && !t.tolerated) +
         num(fmt::format("{}", t.cases)) + "<td>" + (t.tolerated ? "yes" : "no") + "</td></tr>\n";
  o += "</table>\n";
  std::string details;
  for (const auto& c : r.cases)
    for (const auto& d : c.fault_details) details += "<li><code>" + h(c.name) + "</code>: " + h(d) + "</li>\n";
  if (details.empty())
    o += total.fault_count() == 0 ? "<p>No fault of any class was detected.</p>\n" : "<p>The record carries no fault details.</p>\n";
  else
    o += "<ul>\n" + details + "</ul>\n";

  o += fmt::format("<h2>The {} worst cases</h2>\n<p>By scaled error, worst first; each with the command that replays "
                   "it.</p>\n<ol>\n",
                   kWorstCasesListed);
  for (const CaseRecord* c : worst_cases(r, kWorstCasesListed)) {
    o += "<li class=\"worst\"><code>" + h(c->name) + "</code> — " + h(report_detail::case_headline(*c));
    if (const auto w = report_detail::worst_element_text(*c); !w.empty()) o += "<br>" + h(w);
    o += "<pre class=\"replay\">" + h(c->replay.empty() ? "# no replay command recorded" : c->replay) + "</pre></li>\n";
  }
  o += "</ol>\n<h2>Failing cases</h2>\n";
  std::string failing;
  for (const auto& c : r.cases) {
    if (c.within_budget) continue;
    failing += "<li><code>" + h(c.name) + "</code> (" + h(c.family) + fmt::format(", seed {})", c.seed) + "<ul>";
    for (const auto& reason : c.reasons) failing += "<li>" + h(reason) + "</li>";
    failing += "<li>replay: <code>" + h(c.replay) + "</code></li></ul></li>\n";
  }
  o += failing.empty() ? "<p>None: every case tried is within budget.</p>\n" : "<ul>\n" + failing + "</ul>\n";

  if (const auto lines = report_detail::gradient_lines(summarise_gradients(r)); !lines.empty()) {
    o += "<h2>Gradients (the backward)</h2>\n<table>\n";
    for (const auto& line : lines) o += table_row({"<b>" + h(line.label) + "</b>", h(line.text)});
    o += "</table>\n";
  }

  o += "<h2>Coverage</h2>\n<table>\n";
  for (const auto& line : report_detail::coverage_lines(cov)) o += table_row({"<b>" + h(line.label) + "</b>", h(line.text)});
  o += "</table>\n";
  if (!r.skipped.empty()) {
    o += "<p>Skipped cases:</p>\n<ul>\n";
    for (const auto& line : r.skipped) o += "<li>" + h(line) + "</li>\n";
    o += "</ul>\n";
  }
  o += "<h3>Where this result could mislead</h3>\n<ul class=\"cautions\">\n";
  if (cov.cautions.empty()) o += "<li>Nothing stands out: every aspect listed above was tried.</li>\n";
  for (const auto& c : cov.cautions) o += "<li>" + h(c) + "</li>\n";
  o += fmt::format("</ul>\n<p><b>{}</b></p>\n", h(kEvidenceNotProof));

  o += "<script type=\"application/json\" id=\"headroom-data\">" + report_detail::script_safe_json(plot_data(r).dump(-1, ' ', false, json::error_handler_t::replace)) +
       "</script>\n";
  o += std::string("<script>") + report_detail::kPlotScript + "</script>\n</body>\n</html>\n";
  return o;
}

}  // namespace headroom
