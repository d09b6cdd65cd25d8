// headroom — error growth with sequence length (error_growth.h).
#include "headroom/error_growth.h"

#include <algorithm>
#include <cmath>
#include <map>

#include <fmt/format.h>

namespace headroom {
namespace {

double median_of(std::vector<double> v) {
  std::sort(v.begin(), v.end());
  const std::size_t n = v.size();
  return n % 2 == 1 ? v[n / 2] : 0.5 * (v[n / 2 - 1] + v[n / 2]);
}

// Ordinary least squares of y on x; spread = sqrt(Σr² / (n − 2) / Σ(x − x̄)²).
GrowthLine fit_line(const std::vector<double>& x, const std::vector<double>& y) {
  const double n = static_cast<double>(x.size());
  double mx = 0, my = 0;
  for (std::size_t i = 0; i < x.size(); ++i) mx += x[i] / n, my += y[i] / n;
  double sxx = 0, sxy = 0;
  for (std::size_t i = 0; i < x.size(); ++i) sxx += (x[i] - mx) * (x[i] - mx), sxy += (x[i] - mx) * (y[i] - my);
  GrowthLine l;
  l.exponent = sxy / sxx;
  l.intercept = my - l.exponent * mx;
  double ssr = 0;
  for (std::size_t i = 0; i < x.size(); ++i) {
    const double r = y[i] - (l.intercept + l.exponent * x[i]);
    ssr += r * r;
  }
  l.spread = x.size() > 2 ? std::sqrt(ssr / (n - 2) / sxx) : 0;
  return l;
}

bool fits(const CaseRecord& c) {
  const double e = c.figures.max_scaled_error;
  return c.level == "core" && c.faults.empty() && c.kv_len >= 1 && std::isfinite(e) && e > 0;
}

}  // namespace

std::vector<FormatGrowth> error_growth(const std::vector<CaseRecord>& cases) {
  // format → family → Tk → errors
  std::map<std::string, std::map<std::string, std::map<std::int64_t, std::vector<double>>>> at;
  for (const CaseRecord& c : cases)
    if (fits(c)) at[c.format][c.family][c.kv_len].push_back(c.figures.max_scaled_error);
  std::vector<FormatGrowth> out;
  for (const auto& [format, families] : at) {
    FormatGrowth g;
    g.format = format;
    for (const auto& [family, by_len] : families) {
      if (by_len.size() < kGrowthMinLengths) continue;
      const double lo = static_cast<double>(by_len.begin()->first), hi = static_cast<double>(by_len.rbegin()->first);
      if (hi / lo < kGrowthMinSpan) continue;
      FamilyGrowth f;
      f.format = format;
      f.family = family;
      f.lengths = by_len.size();
      f.min_kv_len = by_len.begin()->first;
      f.max_kv_len = by_len.rbegin()->first;
      std::vector<double> x, med, worst;
      for (const auto& [len, errors] : by_len) {
        f.cases += errors.size();
        x.push_back(std::log10(static_cast<double>(len)));
        med.push_back(std::log10(median_of(errors)));
        worst.push_back(std::log10(*std::max_element(errors.begin(), errors.end())));
      }
      f.median = fit_line(x, med);
      f.worst = fit_line(x, worst);
      g.families.push_back(f);
    }
    if (g.families.empty()) continue;
    std::vector<double> m, w;
    for (const auto& f : g.families) m.push_back(f.median.exponent), w.push_back(f.worst.exponent);
    g.exponent = median_of(m);
    g.low = *std::min_element(m.begin(), m.end());
    g.high = *std::max_element(m.begin(), m.end());
    g.worst_exponent = median_of(w);
    out.push_back(std::move(g));
  }
  return out;
}

std::vector<std::string> growth_lines(const std::vector<FormatGrowth>& g) {
  std::vector<std::string> out;
  for (const FormatGrowth& f : g)
    out.push_back(fmt::format("{}: growth exponent {:.2f} (families {:.2f} to {:.2f}, {} fitted; worst-case error {:.2f})"
                              " — about 0.5 is a random walk of roundings, about 1 an error that grows with every key",
                              f.format, f.exponent, f.low, f.high, f.families.size(), f.worst_exponent));
  return out;
}

std::vector<std::string> growth_failures(const std::vector<FormatGrowth>& g, double limit, const std::string& origin) {
  std::vector<std::string> out;
  if (std::isnan(limit)) return out;
  for (const FormatGrowth& f : g)
    if (f.exponent > limit)
      out.push_back(fmt::format("error growth exponent {:.2f} for {} is above the limit {:g}{}", f.exponent, f.format,
                                limit, origin.empty() ? "" : " (" + origin + ")"));
  return out;
}

}  // namespace headroom
