// headroom — per-case statistics of an output against its reference (scores.h).
#include <algorithm>
#include <cmath>
#include <cstdio>
#include <limits>
#include <stdexcept>
#include <string>

#include "headroom/scores.h"

namespace headroom {
namespace {

constexpr double kInf = std::numeric_limits<double>::infinity();

// What score() needs of a reference, core or block.
struct RefView {
  const Tensor& out;
  const Tensor& bound;
  const Tensor& magnitude;
  const std::vector<std::uint8_t>& fully_masked;
  bool certified;
  bool block;  // out is [B, Tq, Dm]; else [B, Hq, Tq, Dv]
};

std::string shape_text(const std::vector<std::int64_t>& s) {
  std::string t = "[";
  for (std::size_t i = 0; i < s.size(); ++i) t += (i ? "," : "") + std::to_string(s[i]);
  return t + "]";
}

void require_shape(const Tensor& got, const Tensor& want, const char* what) {
  if (got.shape != want.shape || got.values.size() != want.values.size()) {
    throw std::invalid_argument(std::string("score: ") + what + " has shape " + shape_text(got.shape) +
                                ", the reference " + shape_text(want.shape));
  }
}

std::vector<std::int64_t> unflatten(std::int64_t flat, const std::vector<std::int64_t>& shape) {
  std::vector<std::int64_t> idx(shape.size());
  for (std::size_t k = shape.size(); k-- > 0;) {
    idx[k] = flat % shape[k];
    flat /= shape[k];
  }
  return idx;
}

// Per output row (flattened over all axes but the last): 1 when excluded
// because a query row it depends on is fully masked.
std::vector<std::uint8_t> excluded_rows(const RefView& r, std::int64_t rows) {
  std::vector<std::uint8_t> ex(static_cast<std::size_t>(rows), 0);
  if (!r.block) {
    if (static_cast<std::int64_t>(r.fully_masked.size()) == rows) ex = r.fully_masked;
    return ex;
  }
  // Block: row (b, i) of Y mixes every head's O[b, h, i, :] through W_o.
  const std::int64_t batch = r.out.shape[0], q_len = r.out.shape[1];
  if (batch * q_len == 0) return ex;
  const std::int64_t heads = static_cast<std::int64_t>(r.fully_masked.size()) / (batch * q_len);
  for (std::int64_t b = 0; b < batch; ++b)
    for (std::int64_t h = 0; h < heads; ++h)
      for (std::int64_t i = 0; i < q_len; ++i)
        if (r.fully_masked[static_cast<std::size_t>((b * heads + h) * q_len + i)]) ex[static_cast<std::size_t>(b * q_len + i)] = 1;
  return ex;
}

std::size_t histogram_bucket(std::int64_t ulp) {
  if (ulp <= 0) return 0;
  // Bucket k + 2 holds (2^(k−1), 2^k]; ULP 1 is bucket 2.
  int k = 0;
  while (k <= 20 && (std::int64_t{1} << k) < ulp) ++k;
  return k > 20 ? 23 : static_cast<std::size_t>(k + 2);
}

WorstElement locate(std::int64_t flat, const Tensor& out, const RefView& r, const ElementError& e, Format f) {
  WorstElement w;
  w.index = unflatten(flat, r.out.shape);
  w.expected = r.out.values[static_cast<std::size_t>(flat)];
  w.expected_in_format = round_to_format(w.expected, f);
  w.obtained = out.values[static_cast<std::size_t>(flat)];
  w.error = e;
  return w;
}

CaseScore score(const Tensor& out, const RefView& r, Format f) {
  require_shape(out, r.out, "the output");
  require_shape(r.bound, r.out, "the reference bound");
  require_shape(r.magnitude, r.out, "the reference magnitude");
  CaseScore s;
  s.format = f;
  s.unit_roundoff = unit_roundoff(f);
  s.reference_certified = r.certified;
  for (std::uint8_t m : r.fully_masked) s.masked_rows += m ? 1 : 0;

  const std::int64_t n = static_cast<std::int64_t>(out.values.size());
  const std::int64_t width = r.out.shape.empty() ? 1 : r.out.shape.back();
  const std::int64_t rows = width == 0 ? 0 : n / width;
  const std::vector<std::uint8_t> excluded = excluded_rows(r, rows);
  std::vector<std::uint8_t> scored(static_cast<std::size_t>(n), 0);
  s.row_max_scaled.assign(static_cast<std::size_t>(rows), 0.0);

  // Pass 1: per-element errors, maxima, counts. Sums of squares wait for pass 2
  // so they can be scaled by the maxima and never overflow (float64 outputs
  // near 1e308 would).
  double max_y = 0, max_o = 0, max_m = 0;
  for (std::int64_t k = 0; k < n; ++k) {
    const std::size_t u = static_cast<std::size_t>(k);
    const double y = r.out.values[u];
    if (excluded[static_cast<std::size_t>(k / width)] || std::isnan(y)) {
      ++s.masked_elements;
      continue;
    }
    const double o = out.values[u];
    if (!std::isfinite(o)) {
      if (s.non_finite++ == 0) s.first_non_finite = unflatten(k, r.out.shape);
      continue;
    }
    scored[u] = 1;
    ++s.elements;
    const ElementError e = element_error(o, y, r.bound.values[u], r.magnitude.values[u], f);
    if (e.ulp_uncertain) ++s.ulp_uncertain;
    double& row_worst = s.row_max_scaled[static_cast<std::size_t>(k / width)];
    row_worst = std::max(row_worst, e.scaled);
    s.max_ulp_certain = std::max(s.max_ulp_certain, e.ulp_uncertain && e.ulp > 0 ? e.ulp - 1 : e.ulp);
    ++s.ulp_histogram[histogram_bucket(e.ulp)];
    if (s.elements == 1 || e.scaled > s.max_scaled_error) {
      s.max_scaled_error = e.scaled;
      s.worst_scaled = locate(k, out, r, e, f);
    }
    if (s.elements == 1 || e.ulp > s.max_ulp) {
      s.max_ulp = e.ulp;
      s.worst_ulp = locate(k, out, r, e, f);
    }
    s.max_abs_error = std::max(s.max_abs_error, e.abs);
    max_y = std::max(max_y, std::fabs(y));
    max_o = std::max(max_o, std::fabs(o));
    max_m = std::max(max_m, r.magnitude.values[u]);
  }
  if (s.elements == 0) return s;

  // Pass 2: scaled sums. Each sum of N non-negative terms is accurate to a
  // relative N·2^-53 (Higham 2002, §4.2), ample for a statistic.
  const double ex = s.max_abs_error > 0 ? s.max_abs_error : 1.0;
  const double ey = max_y > 0 ? max_y : 1.0, eo = max_o > 0 ? max_o : 1.0, em = max_m > 0 ? max_m : 1.0;
  double see = 0, sae = 0, syy = 0, say = 0, soo = 0, soy = 0, smm = 0;
  for (std::int64_t k = 0; k < n; ++k) {
    const std::size_t u = static_cast<std::size_t>(k);
    if (!scored[u]) continue;
    const double y = r.out.values[u] / ey, o = out.values[u] / eo;
    const double e = std::fabs(out.values[u] - r.out.values[u]) / ex;
    see += e * e;
    sae += e;
    syy += y * y;
    say += std::fabs(y);
    soo += o * o;
    soy += o * y;
    const double m = r.magnitude.values[u] / em;
    smm += m * m;
  }
  const double count = static_cast<double>(s.elements);
  s.rmse = s.max_abs_error > 0 ? ex * std::sqrt(see / count) : 0.0;
  s.rms_expected = max_y > 0 ? ey * std::sqrt(syy / count) : 0.0;
  s.rms_magnitude = max_m > 0 ? em * std::sqrt(smm / count) : 0.0;
  if (s.rms_expected > 0) {
    s.relative_rmse = s.rmse / s.rms_expected;
    s.relative_l1 = (ex / ey) * (s.max_abs_error > 0 ? sae : 0.0) / say;
  } else {
    s.relative_rmse = s.rmse == 0 ? 0.0 : kInf;
    s.relative_l1 = s.max_abs_error == 0 ? 0.0 : kInf;
  }
  if (max_o == 0 && max_y == 0) {
    s.cosine = 1.0;
  } else if (max_o == 0 || max_y == 0) {
    s.cosine = 0.0;
  } else {
    s.cosine = std::clamp(soy / std::sqrt(soo * syy), -1.0, 1.0);
  }
  return s;
}

void score_lse(CaseScore& s, const Tensor* lse, const CoreReference& ref) {
  if (lse == nullptr || lse->values.empty()) return;
  require_shape(*lse, ref.lse, "the log-sum-exp");
  double worst = 0;
  for (std::size_t k = 0; k < lse->values.size(); ++k) {
    const double want = ref.lse.values[k];
    if ((k < ref.fully_masked.size() && ref.fully_masked[k]) || !std::isfinite(want)) continue;
    const double got = lse->values[k];
    if (!std::isfinite(got)) {
      ++s.lse_non_finite;
      continue;
    }
    worst = std::max(worst, std::fabs(got - want));
    s.lse_magnitude = std::max(s.lse_magnitude, std::fabs(want));
  }
  s.lse_error = worst;
}

RefView view_of(const CoreReference& r) { return {r.out, r.bound, r.magnitude, r.fully_masked, r.certified, false}; }
RefView view_of(const BlockReference& r) { return {r.out, r.bound, r.magnitude, r.fully_masked, r.certified, true}; }

}  // namespace

CaseScore score_core(const Tensor& out, const Tensor* lse, const CoreReference& ref, Format f) {
  CaseScore s = score(out, view_of(ref), f);
  score_lse(s, lse, ref);
  return s;
}

CaseScore score_gradient(const Tensor& out, const GradientReference& ref, bool certified, Format f) {
  const std::vector<std::int64_t>& e = ref.out.shape;
  const std::int64_t rows = e.size() == 4 ? e[0] * e[1] * e[2] : 0;
  const std::vector<std::uint8_t> none(static_cast<std::size_t>(rows), 0);
  return score(out, RefView{ref.out, ref.bound, ref.magnitude, none, certified, false}, f);
}

CaseScore score_block(const Tensor& out, const BlockReference& ref, Format f) {
  return score(out, view_of(ref), f);
}

std::string describe(const WorstElement& w) {
  if (w.index.empty()) return "no element scored";
  std::string t = "[";
  for (std::size_t i = 0; i < w.index.size(); ++i) t += (i ? "," : "") + std::to_string(w.index[i]);
  t += "] expected " + hex_float(w.expected) + " (in format " + hex_float(w.expected_in_format) + ") obtained " +
       hex_float(w.obtained) + ", " + std::to_string(w.error.ulp) + " ulp" + (w.error.ulp_uncertain ? " (+-1)" : "");
  char buf[48];
  std::snprintf(buf, sizeof buf, ", scaled %.3g", w.error.scaled);
  return t + buf;
}

PlainRatio ratio_to_plain(const CaseScore& kernel, const CaseScore& plain) {
  if (kernel.format != plain.format) {
    throw std::invalid_argument("ratio_to_plain: the kernel writes " + std::string(format_name(kernel.format)) +
                                ", the plain kernel " + std::string(format_name(plain.format)));
  }
  PlainRatio r;
  r.max_scaled_error = kernel.max_scaled_error / std::max(plain.max_scaled_error, 1.0);
  // The plain kernel is credited with at least the output format's rounding of
  // each row's magnitude Σ p|v| (RMS over the case): what scaled error 1 is per
  // element. A floor of u·RMS(o*) alone vanishes on cancelling rows, where a
  // nearly exact plain result made any sound kernel's ratio explode.
  const double floor = std::max(plain.rmse, plain.unit_roundoff * std::max(plain.rms_magnitude, plain.rms_expected));
  if (floor > 0) {
    r.rmse = kernel.rmse / floor;
  } else {
    r.rmse = kernel.rmse == 0 ? 0.0 : kInf;
  }
  if (kernel.lse_error && plain.lse_error) {
    r.lse = *kernel.lse_error / std::max(*plain.lse_error, 8 * 0x1p-24 * std::max(1.0, plain.lse_magnitude));
  }
  return r;
}

QuantSplit split_quantisation(const Tensor& out, const Tensor* lse, const CoreReference& of_received,
                              const CoreReference& of_source, Format f) {
  QuantSplit q;
  q.total = score_core(out, lse, of_source, f);
  q.input = score_core(of_received.out, &of_received.lse, of_source, f);
  q.arithmetic = score_core(out, lse, of_received, f);
  return q;
}

QuantSplit split_quantisation(const Tensor& out, const BlockReference& of_received, const BlockReference& of_source,
                              Format f) {
  QuantSplit q;
  q.total = score_block(out, of_source, f);
  q.input = score_block(of_received.out, of_source, f);
  q.arithmetic = score_block(out, of_received, f);
  return q;
}

}  // namespace headroom
