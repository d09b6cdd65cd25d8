// headroom — family × format groups, worst cases and figure text (run_summary.h).
#include "headroom/run_summary.h"

#include <algorithm>
#include <cmath>
#include <limits>
#include <set>

#include <fmt/format.h>

#include "headroom/families.h"
#include "headroom/faults.h"

namespace headroom {
namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

// Keeps the larger of `worst` and `x`, NaN meaning "no figure yet"; returns
// whether x became the worst (so the caller can remember the case).
bool keep_max(double& worst, double x) {
  if (std::isnan(x)) return false;
  if (std::isnan(worst) || x > worst) {
    worst = x;
    return true;
  }
  return false;
}

std::size_t family_rank(const std::string& name) {
  const auto all = families();
  for (std::size_t i = 0; i < all.size(); ++i)
    if (all[i].name == name) return i;
  return all.size();
}

}  // namespace

void ValueRange::add(double x) {
  if (std::isnan(x)) return;
  if (count == 0) {
    low = high = x;
  } else {
    low = std::min(low, x);
    high = std::max(high, x);
  }
  ++count;
}

int GroupSummary::fault_count() const {
  int n = 0;
  for (const auto& [name, k] : faults) n += k;
  return n;
}

GroupSummary summarise(const std::vector<const CaseRecord*>& cases, std::string family, std::string format) {
  GroupSummary g;
  g.family = std::move(family);
  g.format = std::move(format);
  g.cases = cases.size();
  // NaN until a case supplies the figure: a group of cases with no applicable
  // figure then reports NaN rather than a made-up 0.
  g.worst_ulp = g.worst_scaled_error = g.worst_rmse = g.worst_rel_rmse = g.worst_ratio_to_plain = kNaN;
  g.worst_gradient_fed_exact = g.worst_gradient_end_to_end = kNaN;
  for (const CaseRecord* c : cases) {
    if (!c->within_budget) ++g.failing;
    const CaseFigures& f = c->figures;
    if (keep_max(g.worst_ulp, f.max_ulp)) g.worst_ulp_case = c->name;
    if (keep_max(g.worst_scaled_error, f.max_scaled_error)) g.worst_scaled_case = c->name;
    keep_max(g.worst_rmse, f.rmse);
    keep_max(g.worst_rel_rmse, f.relative_rmse);
    keep_max(g.worst_ratio_to_plain, f.ratio_to_plain);
    if (c->backward)
      for (std::size_t t = 0; t < c->backward->tensors(); ++t) {
        keep_max(g.worst_gradient_fed_exact, c->backward->fed_exact[t].max_scaled_error);
        if (c->backward->end_to_end_judged)
          keep_max(g.worst_gradient_end_to_end, c->backward->end_to_end[t].max_scaled_error);
      }
    g.ulp_limit.add(c->limits.max_ulp);
    g.scaled_limit.add(c->limits.max_scaled_error);
    g.rel_rmse_limit.add(c->limits.max_rel_rmse);
    g.ratio_limit.add(c->limits.max_ratio_to_plain);
    for (const auto& [name, n] : c->faults)
      if (n > 0) g.faults[name] += n;
    const CaseMargin m = case_margin(*c);
    if (!std::isnan(m.value) && (std::isnan(g.margin) || m.value < g.margin)) {
      g.margin = m.value;
      g.margin_figure = m.figure;
      g.margin_case = c->name;
    }
  }
  return g;
}

CaseMargin case_margin(const CaseRecord& c) {
  CaseMargin out;
  const auto consider = [&](const char* name, double figure, double limit) {
    if (std::isnan(figure) || std::isnan(limit) || std::isinf(limit)) return;
    const double m = figure > 0 ? limit / figure : std::numeric_limits<double>::infinity();
    if (std::isnan(out.value) || m < out.value) {
      out.value = m;
      out.figure = name;
    }
  };
  consider("max_scaled_error", c.figures.max_scaled_error, c.limits.max_scaled_error);
  consider("max_rel_rmse", c.figures.relative_rmse, c.limits.max_rel_rmse);
  consider("max_ulp", c.figures.max_ulp, c.limits.max_ulp);
  consider("max_ratio_to_plain", c.figures.ratio_to_plain, c.limits.max_ratio_to_plain);
  if (c.backward) {
    for (std::size_t t = 0; t < c.backward->tensors(); ++t) {
      const GradientFigures& g = c.backward->fed_exact[t];
      consider("max_gradient_scaled_error", g.max_scaled_error, c.limits.max_gradient_scaled_error);
      consider("max_gradient_ratio_to_plain", g.ratio_to_plain, c.limits.max_gradient_ratio_to_plain);
    }
    if (c.backward->end_to_end_judged) {
      for (std::size_t t = 0; t < c.backward->tensors(); ++t) {
        const GradientFigures& g = c.backward->end_to_end[t];
        consider("max_gradient_scaled_error", g.max_scaled_error, c.limits.max_gradient_scaled_error_end_to_end);
        consider("max_gradient_ratio_to_plain", g.ratio_to_plain, c.limits.max_gradient_ratio_to_plain);
      }
    }
  }
  return out;
}

GradientSummary summarise_gradients(const RunRecord& r) {
  GradientSummary g;
  double worst = -1;
  const auto bigger = [](double& into, double x) {
    if (std::isnan(x) || x > into) into = x;  // NaN is the worst: it sticks
  };
  for (const CaseRecord& c : r.cases) {
    if (!c.backward) continue;
    const BackwardFigures& b = *c.backward;
    ++g.cases;
    ++g.upstream[b.upstream];
    if (b.end_to_end_judged) ++g.end_to_end_cases;
    if (b.bias_judged) ++g.bias_cases;
    for (std::size_t t = 0; t < b.tensors(); ++t) {
      bigger(g.worst_fed_exact[t], b.fed_exact[t].max_scaled_error);
      bigger(g.worst_rel_rmse[t], b.fed_exact[t].relative_rmse);
      g.lowest_cosine[t] = std::min(g.lowest_cosine[t], b.fed_exact[t].cosine);
      if (b.end_to_end_judged) {
        bigger(g.worst_end_to_end[t], b.end_to_end[t].max_scaled_error);
        bigger(g.worst_rel_rmse[t], b.end_to_end[t].relative_rmse);
        g.lowest_cosine[t] = std::min(g.lowest_cosine[t], b.end_to_end[t].cosine);
      }
    }
    const double ratio = b.worst_ratio_to_plain();
    if (!std::isnan(ratio) && !(ratio <= g.worst_ratio_to_plain)) g.worst_ratio_to_plain = ratio;
    const double w = b.worst_scaled_error();
    if (std::isnan(w) || w > worst) {
      worst = std::isnan(w) ? INFINITY : w;
      g.worst_case = c.name;
    }
  }
  return g;
}

LimitedFigures limited_figures(const RunRecord& r) {
  LimitedFigures l;
  const auto finite = [](double x) { return std::isfinite(x); };
  for (const auto& c : r.cases) {
    l.ulp = l.ulp || finite(c.limits.max_ulp);
    l.scaled = l.scaled || finite(c.limits.max_scaled_error);
    l.rel_rmse = l.rel_rmse || finite(c.limits.max_rel_rmse);
    l.ratio = l.ratio || (finite(c.limits.max_ratio_to_plain) && !std::isnan(c.figures.ratio_to_plain));
  }
  return l;
}

std::string margin_text(double m) {
  if (std::isnan(m)) return "—";
  if (std::isinf(m)) return "inf";
  return fmt::format("{:.3g}", m);
}

std::string quantisation_split_text(const RunRecord& r) {
  static const std::set<std::string> rounded{"binary16", "bfloat16", "int8", "e4m3", "e5m2"};
  if (!rounded.count(r.input_format) || r.cases.empty()) return "";
  ValueRange input, p_rounding, kernel;
  for (const auto& c : r.cases) {
    input.add(c.figures.input_error);
    p_rounding.add(c.figures.p_rounding_error);
    kernel.add(c.figures.kernel_error);
  }
  if (input.empty()) return "";
  std::string out = fmt::format("inputs rounded to {} cost up to {:.3g}", r.input_format, input.high);
  if (!p_rounding.empty()) out += fmt::format(", P rounded to 8 bits up to {:.3g} (modelled)", p_rounding.high);
  return out + fmt::format(", the kernel's own error up to {:.3g} (max scaled error over {} cases)", kernel.high,
                           input.count);
}

std::size_t uncertified_cases(const RunRecord& r) {
  std::size_t n = 0;
  for (const auto& c : r.cases) n += c.reference_certified ? 0 : 1;
  return n;
}

std::string uncertified_explanation(const RunRecord& r) {
  const std::size_t n = uncertified_cases(r);
  if (n == 0) return "";
  return fmt::format(
      "In {} of {} cases the reference could not certify every output element to its target (an error bound of "
      "2^-80 of the row's magnitude): for some elements (outputs below the double range, or inputs near overflow) "
      "no precision up to 4096 bits met it. The bound given there is still proven, only looser, and headroom scores "
      "those elements against it: a ULP error counts only where it is certain, so no verdict rests on an unproven "
      "reference value.",
      n, r.cases.size());
}

std::vector<GroupSummary> summarise_groups(const RunRecord& r) {
  std::map<std::pair<std::string, std::string>, std::vector<const CaseRecord*>> groups;
  for (const auto& c : r.cases) groups[{c.family, c.format}].push_back(&c);
  std::vector<GroupSummary> out;
  for (const auto& [key, cases] : groups) out.push_back(summarise(cases, key.first, key.second));
  std::stable_sort(out.begin(), out.end(), [](const GroupSummary& a, const GroupSummary& b) {
    const auto ra = family_rank(a.family), rb = family_rank(b.family);
    if (ra != rb) return ra < rb;
    if (a.family != b.family) return a.family < b.family;
    return a.format < b.format;
  });
  return out;
}

GroupSummary summarise_run(const RunRecord& r) {
  std::vector<const CaseRecord*> all;
  for (const auto& c : r.cases) all.push_back(&c);
  return summarise(all);
}

std::vector<FaultTotal> fault_totals_by_class(const RunRecord& r) {
  std::vector<FaultTotal> out;
  for (FaultClass c : kAllFaultClasses) out.push_back({std::string(fault_class_name(c))});
  std::set<std::string> other;
  for (const auto& c : r.cases)
    for (const auto& [name, n] : c.faults)
      if (!parse_fault_class(name)) other.insert(name);
  for (const auto& name : other) out.push_back({name});
  for (auto& t : out) {
    for (const auto& c : r.cases) {
      const auto it = c.faults.find(t.name);
      if (it == c.faults.end() || it->second <= 0) continue;
      t.count += it->second;
      ++t.cases;
    }
    t.tolerated = std::find(r.tolerated_faults.begin(), r.tolerated_faults.end(), t.name) != r.tolerated_faults.end();
  }
  return out;
}

std::string skipped_family(const std::string& line) {
  const std::string name = line.substr(0, line.find(": "));
  std::string best;
  for (const auto& f : families()) {
    const std::string family(f.name);
    if (name.compare(0, family.size(), family) != 0) continue;
    if (name.size() != family.size() && name[family.size()] != '-') continue;
    if (family.size() > best.size()) best = family;
  }
  return best;
}

std::vector<const CaseRecord*> worst_cases(const RunRecord& r, std::size_t n) {
  std::vector<const CaseRecord*> all;
  for (const auto& c : r.cases) all.push_back(&c);
  // NaN sorts as the least bad: it is "no figure", not a large one.
  auto key = [](double x) { return std::isnan(x) ? -std::numeric_limits<double>::infinity() : x; };
  std::sort(all.begin(), all.end(), [&](const CaseRecord* a, const CaseRecord* b) {
    const double sa = key(a->figures.max_scaled_error), sb = key(b->figures.max_scaled_error);
    if (sa != sb) return sa > sb;
    const double ua = key(a->figures.max_ulp), ub = key(b->figures.max_ulp);
    if (ua != ub) return ua > ub;
    return a->name < b->name;
  });
  if (all.size() > n) all.resize(n);
  return all;
}

std::string figure_text(double x) {
  if (std::isnan(x)) return "nan";
  if (std::isinf(x)) return x > 0 ? "inf" : "-inf";
  if (x == std::floor(x) && std::fabs(x) < 1e15) return fmt::format("{}", static_cast<long long>(x));
  return fmt::format("{:.4g}", x);
}

std::string limit_text(double x) {
  if (std::isinf(x) && x > 0) return "none";
  return figure_text(x);
}

std::string limit_range_text(const ValueRange& r) {
  if (r.empty()) return "—";
  if (r.low == r.high) return limit_text(r.low);
  return limit_text(r.low) + "–" + limit_text(r.high);
}

}  // namespace headroom
