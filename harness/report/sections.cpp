// headroom — the shared plain-text pieces of the reports (sections.h).
#include "sections.h"

#include <cmath>
#include <set>

#include <fmt/format.h>

#include "headroom/families.h"
#include "headroom/scores.h"

namespace headroom::report_detail {

std::string counted(const std::map<std::string, std::size_t>& items) {
  std::string out;
  for (const auto& [name, n] : items) out += (out.empty() ? "" : ", ") + fmt::format("{} ({})", name, n);
  return out.empty() ? "none" : out;
}

std::string counted_in_order(const std::map<std::string, std::size_t>& items, const std::vector<std::string>& order) {
  std::string out;
  std::set<std::string> done;
  auto add = [&](const std::string& name, std::size_t n) {
    out += (out.empty() ? "" : ", ") + fmt::format("{} ({})", name, n);
    done.insert(name);
  };
  for (const auto& name : order)
    if (auto it = items.find(name); it != items.end()) add(name, it->second);
  for (const auto& [name, n] : items)
    if (!done.count(name)) add(name, n);
  return out.empty() ? "none" : out;
}

std::string range_text(const ValueRange& r) {
  if (r.empty()) return "—";
  if (r.low == r.high) return figure_text(r.low);
  return figure_text(r.low) + "–" + figure_text(r.high);
}

std::string list_or(const std::vector<std::string>& items, const std::string& none) {
  if (items.empty()) return none;
  std::string out;
  for (std::size_t i = 0; i < items.size(); ++i) out += (i ? ", " : "") + items[i];
  return out;
}

namespace {
std::string cases_text(std::size_t n) { return n == 1 ? "1 case" : fmt::format("{} cases", n); }
}  // namespace

std::vector<Line> coverage_lines(const Coverage& cov) {
  std::vector<std::string> family_order;
  for (const auto& f : families()) family_order.emplace_back(f.name);
  std::size_t known = 0;
  for (const auto& name : family_order) known += cov.families.count(name);
  std::vector<Line> out;
  out.push_back({"Families tried", fmt::format("{} of {}: {}", known, family_order.size(),
                                               counted_in_order(cov.families, family_order))});
  out.push_back({"Families not tried", list_or(cov.families_not_tried, "none (every family was tried)")});
  out.push_back({"Levels", fmt::format("{}; not tried: {}", counted(cov.levels), list_or(cov.levels_not_tried, "none"))});
  std::string shapes = fmt::format("batch {}, query heads Hq {}, key/value heads Hkv {}, Tq {}, Tk {}, Dk {}, Dv {}",
                                   range_text(cov.batch), range_text(cov.q_heads), range_text(cov.kv_heads),
                                   range_text(cov.q_len), range_text(cov.kv_len), range_text(cov.key_dim),
                                   range_text(cov.value_dim));
  if (!cov.model_dim.empty()) shapes += ", Dm " + range_text(cov.model_dim);
  if (cov.unparsed_shapes > 0) shapes += fmt::format(" ({} shapes did not parse)", cov.unparsed_shapes);
  out.push_back({"Shapes", shapes});
  out.push_back({"Head sharing", fmt::format("grouped-query (1 < Hkv < Hq): {}; multi-query (Hkv = 1 < Hq): {}{}",
                                             cases_text(cov.grouped_query), cases_text(cov.multi_query),
                                             cov.grouped_query + cov.multi_query == 0 ? " — GQA not tried" : "")});
  out.push_back({"Tq ≠ Tk", fmt::format("{}, {} of them under a causal mask", cases_text(cov.ragged), cov.ragged_causal)});
  out.push_back({"Head dims not a multiple of 8", cases_text(cov.odd_head_dim)});
  out.push_back({"Masks tried", counted(cov.masks)});
  out.push_back({"Masks not tried", list_or(cov.masks_not_tried, "none (every kind was tried)")});
  out.push_back({"Formats tried", counted(cov.formats)});
  out.push_back({"Formats not tried",
                 list_or(cov.formats_not_tried, "none") +
                     (cov.formats_not_tried.empty() ? "" : " (a kernel has one input format: qualify a kernel of each)")});
  out.push_back({"Largest scaled score |z|", cov.logit_scale.empty() ? "—" : figure_text(cov.logit_scale.high)});
  std::string skipped = cases_text(cov.skipped);
  for (std::size_t i = 0; i < cov.skipped_reasons.size(); ++i)
    skipped += fmt::format("{} {}: {}", i ? ";" : ":", cov.skipped_reasons[i].first, cases_text(cov.skipped_reasons[i].second));
  out.push_back({"Skipped (not run)", skipped});
  out.push_back({"Gradients judged",
                 cov.gradients_judged == 0
                     ? std::string("none (the kernel has no backward entry, or no core case ran): dQ, dK, dV unjudged")
                     : fmt::format("dQ, dK, dV on {}: fed the exact O and lse on {}, end to end on {}; d(bias) on {}; "
                                   "dO {}",
                                   cases_text(cov.gradients_judged), cov.gradients_judged, cov.gradients_end_to_end,
                                   cov.gradients_bias, counted(cov.upstream))});
  return out;
}

std::vector<Line> gradient_lines(const GradientSummary& g) {
  std::vector<Line> out;
  if (g.cases == 0) return out;
  const char* labels[4] = {"dQ", "dK", "dV", "d(bias)"};
  for (std::size_t t = 0; t < g.tensors(); ++t)
    out.push_back({labels[t], fmt::format("worst scaled error fed the exact O and lse {}, end to end {}; worst "
                                          "relative RMSE {}; lowest cosine {}",
                                          figure_text(g.worst_fed_exact[t]),
                                          g.end_to_end_cases > 0 ? figure_text(g.worst_end_to_end[t]) : "—",
                                          figure_text(g.worst_rel_rmse[t]), figure_text(g.lowest_cosine[t]))});
  out.push_back({"Ratio to the plain backward", std::isnan(g.worst_ratio_to_plain)
                                                    ? std::string("— (no plain backward of these formats)")
                                                    : "worst " + figure_text(g.worst_ratio_to_plain)});
  out.push_back({"Worst gradient case", g.worst_case});
  return out;
}

std::vector<Line> run_facts(const RunRecord& r) {
  std::size_t failing = 0;
  for (const auto& c : r.cases) failing += c.within_budget ? 0 : 1;
  std::vector<Line> out{{"Kernel", r.kernel},
                        {"Method", r.kernel_description.empty() ? "—" : r.kernel_description},
                        {"Formats", r.input_format + " in, " + r.output_format + " out"},
                        {"Suite", r.suite},
                        {"Shard", r.shard},
                        {"Budget", r.budget},
                        {"Cases", fmt::format("{} run, {} failing, {} skipped", r.cases.size(), failing, r.skipped.size())},
                        {"Verdict", r.verdict_line()},
                        {"Written by", r.tool + (r.command.empty() ? "" : " " + r.command)}};
  if (const std::string split = quantisation_split_text(r); !split.empty())
    out.insert(out.end() - 1, Line{"Quantisation split", split});
  return out;
}

std::string case_headline(const CaseRecord& c) {
  const CaseFigures& f = c.figures;
  // The figures a limit applies to, each beside its limit; a record without
  // limits (written before they were recorded) gets the three usual figures.
  std::string figures;
  auto add = [&](const char* what, double value, double limit) {
    if (!std::isfinite(limit) || std::isnan(value)) return;
    figures += fmt::format("{}{} {} (limit {})", figures.empty() ? "" : ", ", what, figure_text(value), limit_text(limit));
  };
  add("scaled error", f.max_scaled_error, c.limits.max_scaled_error);
  add("ULP", f.max_ulp, c.limits.max_ulp);
  add("relative RMSE", f.relative_rmse, c.limits.max_rel_rmse);
  add("ratio to plain", f.ratio_to_plain, c.limits.max_ratio_to_plain);
  const CaseMargin m = case_margin(c);
  if (!std::isnan(m.value)) figures += ", margin " + margin_text(m.value);
  if (figures.empty())
    figures = fmt::format("scaled error {}, {} ulp, relative RMSE {}", figure_text(f.max_scaled_error),
                          figure_text(f.max_ulp), figure_text(f.relative_rmse));
  return fmt::format("family {}, seed {}, size {}, {} shape {}, mask {}: {} — {}", c.family, c.seed, c.size, c.level,
                     c.shape, c.mask, figures, c.within_budget ? "within budget" : "FAIL");
}

std::string worst_element_text(const CaseRecord& c) {
  const CaseFigures& f = c.figures;
  if (f.worst_index.empty()) return "";
  // Decimal to read, hex to be exact (STYLE.md); the ULP figure is this element's own.
  std::string text = fmt::format("worst element [{}]: expected {:.9g} ({}) obtained {:.9g} ({})", f.worst_index,
                                 f.worst_expected, hex_float(f.worst_expected), f.worst_obtained,
                                 hex_float(f.worst_obtained));
  if (!std::isnan(f.worst_ulp_at)) text += ", " + figure_text(f.worst_ulp_at) + " ulp apart";
  return text;
}

std::vector<std::vector<std::string>> growth_table(const std::vector<FormatGrowth>& g) {
  std::vector<std::vector<std::string>> rows{
      {"family", "format", "Tk", "lengths", "cases", "exponent (median error)", "exponent (worst error)"}};
  auto pm = [](const GrowthLine& l) { return fmt::format("{:.2f} ± {:.2f}", l.exponent, l.spread); };
  for (const FormatGrowth& f : g)
    for (const FamilyGrowth& x : f.families)
      rows.push_back({x.family, x.format, fmt::format("{}–{}", x.min_kv_len, x.max_kv_len), std::to_string(x.lengths),
                      std::to_string(x.cases), pm(x.median), pm(x.worst)});
  return rows;
}

std::string no_growth_fit_text() {
  return fmt::format("No growth fit: no family's cases span {} or more distinct Tk over a factor of {:g} (the suites "
                     "standard and deep, or --shape at several Tk, do).",
                     kGrowthMinLengths, kGrowthMinSpan);
}

}  // namespace headroom::report_detail
