// headroom — the verdict on one case: scores and faults against a kernel's budget (budget.h).
#include <cmath>
#include <cstdio>
#include <string>

#include "headroom/budget.h"

namespace headroom {
namespace {

std::string number(double v) {
  char buf[40];
  std::snprintf(buf, sizeof buf, "%.4g", v);
  return buf;
}

// "max_scaled_error 37.2 exceeds 20.5 (1.81x; <how the limit was set>, <origin>) at <where>".
VerdictReason over_limit(const std::string& what, double value, double limit, const std::string& how,
                         const std::string& origin, const std::string& where) {
  VerdictReason r;
  r.what = what;
  r.value = value;
  r.limit = limit;
  r.text = what + " " + number(value) + " exceeds " + number(limit);
  if (limit > 0) r.text += " (" + number(value / limit) + "x the limit)";
  r.text += "; limit " + how + ", " + origin;
  if (!where.empty()) r.text += "; worst " + where;
  return r;
}

void add_fault(Verdict& v, const KernelBudget& b, FaultClass c, std::int64_t count, const std::string& detail) {
  const std::string name(fault_class_name(c));
  if (b.tolerates(c)) {
    v.notes.push_back("tolerated fault " + name + " (" + b.tolerated_origin + "): " + detail);
    return;
  }
  VerdictReason r;
  r.what = name;
  r.value = static_cast<double>(count);
  r.text = "fault " + name + " (not tolerated; " + b.tolerated_origin + "): " + detail;
  v.reasons.push_back(std::move(r));
}

}  // namespace

Verdict judge(const CaseScore* score, const CaseFaults& faults, const KernelBudget& budget, std::int64_t n,
              const PlainRatio* ratio) {
  Verdict v;
  for (const Fault& f : faults.faults) add_fault(v, budget, f.kind, f.count, f.detail);
  if (faults.bad_output_runs > 0) {
    VerdictReason r;
    r.what = "bad_output";
    r.value = faults.bad_output_runs;
    r.text = "bad_output: " +
             (faults.bad_output_detail.empty() ? std::string("the kernel's output was missing, malformed or mis-shaped")
                                               : faults.bad_output_detail) +
             (faults.bad_output_runs > 1 ? " (" + std::to_string(faults.bad_output_runs) + " runs)" : "");
    v.reasons.push_back(std::move(r));
  }
  if (faults.unsupported_runs > 0) v.notes.push_back("the kernel declined the case (unsupported): not scored");
  for (const std::string& note : faults.notes) v.notes.push_back(note);

  if (score == nullptr) {
    v.scored = false;
    v.pass = v.reasons.empty();
    return v;
  }
  const CaseScore& s = *score;
  // Non-finite outputs are a fault even if no detector ran: never averaged away.
  if (s.non_finite + s.lse_non_finite > 0 && faults.find(FaultClass::non_finite) == nullptr) {
    std::string where;
    for (std::size_t i = 0; i < s.first_non_finite.size(); ++i)
      where += (i ? "," : "[") + std::to_string(s.first_non_finite[i]);
    add_fault(v, budget, FaultClass::non_finite, s.non_finite + s.lse_non_finite,
              std::to_string(s.non_finite) + " non-finite outputs" + (where.empty() ? "" : ", first at " + where + "]"));
  }

  // Each row against its own limit: a row of large scores may lose what forming
  // them costs (score conditioning), a row of small ones may not.
  double worst_excess = 0, worst_value = s.max_scaled_error, worst_limit = budget.scaled_error_limit(n, s.format);
  std::size_t worst_row = s.row_max_scaled.size();
  for (std::size_t r = 0; r < s.row_max_scaled.size(); ++r) {
    const double limit = budget.row_scaled_error_limit(n, s, r);
    const double excess = limit > 0 ? s.row_max_scaled[r] / limit : (s.row_max_scaled[r] > 0 ? INFINITY : 0.0);
    if (excess > worst_excess) {
      worst_excess = excess;
      worst_value = s.row_max_scaled[r];
      worst_limit = limit;
      worst_row = r;
    }
  }
  // Which limit was binding, and why it had its value: said for a failing or
  // near-failing row (within a factor 2: our own threshold), and wherever score
  // conditioning, not the arithmetic bound, set most of the limit.
  if (worst_row < s.row_max_scaled.size() && std::isfinite(worst_limit)) {
    const double base = budget.scaled_error_limit(n, s.format);
    const double p_floor = KernelBudget::p_floor(s, worst_row);
    const double conditioning = worst_limit - base - p_floor;
    if (worst_excess > 0.5 || conditioning > base || p_floor > base) {
      std::string why = "limit max_scaled_error " + number(worst_limit) + " at row " + std::to_string(worst_row) + ": " +
                        number(base) + " from " + budget.max_scaled_error.describe(n, s.unit_roundoff) + " (" +
                        budget.max_scaled_error.origin + ")";
      if (p_floor > 0)
        why += " + " + number(p_floor) + " for P rounded to 8 bits below its normal range (docs/budget-format.md, "
               "\"P rounding\")";
      if (conditioning > 0 && worst_row < s.row_score_magnitude.size())
        why += " + " + number(conditioning) + " for score conditioning: scores in this row reach |z| = " +
               number(s.row_score_magnitude[worst_row]) + ", formed with u_s = 2^-" + std::to_string(budget.score_bits) +
               " (docs/budget-format.md, \"Score conditioning\")";
      why += "; worst there " + number(worst_value) + ", margin " + number(worst_limit / worst_value);
      v.notes.push_back(why);
    }
  }
  if (s.row_max_scaled.empty() ? s.max_scaled_error > worst_limit : worst_excess > 1.0) {
    std::string how = budget.max_scaled_error.describe(n, s.unit_roundoff);
    if (worst_row < s.row_score_magnitude.size() && (budget.max_scaled_error.kind == Limit::Kind::probabilistic ||
                                                     budget.max_scaled_error.score_conditioned))
      // A fixed limit's own description already names the term ("plus worst-case score conditioning").
      how += std::string(budget.max_scaled_error.kind == Limit::Kind::fixed ? " at" : ", plus score conditioning at") +
             " Z = " + number(s.row_score_magnitude[worst_row]) + ", u_s = 2^-" +
             std::to_string(budget.score_bits) + " (" + budget.score_bits_origin + ")";
    v.reasons.push_back(over_limit("max_scaled_error", worst_value, worst_limit, how, budget.max_scaled_error.origin,
                                   worst_value == s.max_scaled_error ? describe(s.worst_scaled)
                                                                     : "row " + std::to_string(worst_row)));
  }
  const double rmse_limit = budget.rel_rmse_limit(n, s);
  if (s.relative_rmse > rmse_limit) {
    v.reasons.push_back(over_limit("max_rel_rmse", s.relative_rmse, rmse_limit,
                                   budget.max_rel_rmse.describe(n, s.unit_roundoff), budget.max_rel_rmse.origin, ""));
  }
  const double ulp_limit = budget.max_ulp.relative_at(n, s.unit_roundoff);
  if (static_cast<double>(s.max_ulp_certain) > ulp_limit) {
    v.reasons.push_back(over_limit("max_ulp", static_cast<double>(s.max_ulp), ulp_limit,
                                   budget.max_ulp.describe(n, s.unit_roundoff), budget.max_ulp.origin,
                                   describe(s.worst_ulp)));
  } else if (static_cast<double>(s.max_ulp) > ulp_limit) {
    v.notes.push_back("max_ulp " + std::to_string(s.max_ulp) + " exceeds " + number(ulp_limit) +
                      " only within the reference's +-1 ULP uncertainty: not counted");
  }
  if (budget.max_ratio_to_plain.kind != Limit::Kind::none) {
    const double limit = budget.max_ratio_to_plain.relative_at(n, s.unit_roundoff);
    if (ratio == nullptr) {
      v.notes.push_back("max_ratio_to_plain not checked: no run of the plain kernel on this case");
    } else {
      const std::string how = budget.max_ratio_to_plain.describe(n, s.unit_roundoff);
      if (ratio->max_scaled_error > limit) {
        v.reasons.push_back(over_limit("max_ratio_to_plain", ratio->max_scaled_error, limit,
                                       how + " (max scaled error against the plain kernel's)",
                                       budget.max_ratio_to_plain.origin, ""));
      }
      if (ratio->rmse > limit) {
        v.reasons.push_back(over_limit("max_ratio_to_plain", ratio->rmse, limit,
                                       how + " (RMSE against the plain kernel's)", budget.max_ratio_to_plain.origin, ""));
      }
      if (ratio->lse > limit) {  // NaN (no log-sum-exp on either side) is never over
        v.reasons.push_back(over_limit("max_ratio_to_plain", ratio->lse, limit,
                                       how + " (log-sum-exp error against the plain kernel's)",
                                       budget.max_ratio_to_plain.origin, ""));
      }
    }
  }
  v.pass = v.reasons.empty();
  return v;
}

}  // namespace headroom
