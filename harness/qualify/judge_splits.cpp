// headroom — split-KV partials and their merge (judge_splits.h).
#include "headroom/judge_splits.h"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <limits>
#include <vector>

#include "headroom/budget.h"
#include "headroom/format.h"
#include "headroom/scores.h"
#include "headroom/split_keys.h"

namespace headroom {
namespace {

std::string num(double v) {
  char buf[48];
  std::snprintf(buf, sizeof buf, "%.6g", v);
  return buf;
}

std::string hex(double v) {
  char buf[48];
  std::snprintf(buf, sizeof buf, "%a", v);
  return buf;
}

Fault make(FaultClass c, std::string detail, std::vector<std::int64_t> where) {
  Fault f;
  f.kind = c;
  f.detail = std::move(detail);
  f.where = std::move(where);
  f.count = 1;
  return f;
}

std::string row_text(std::int64_t s, std::int64_t b, std::int64_t h, std::int64_t i) {
  return "split " + std::to_string(s) + " row (b=" + std::to_string(b) + ", h=" + std::to_string(h) + ", i=" +
         std::to_string(i) + ")";
}

}  // namespace

SplitJudgement judge_splits(const KernelRun& run, const ReceivedCase& rc, std::int64_t split_kv_len, Format output_format,
                            const ReferenceOptions& opt) {
  const CoreProblem& p = rc.received.core;
  const CoreShape& sh = p.shape;
  const std::int64_t splits = (sh.kv_len + split_kv_len - 1) / split_kv_len;
  const std::int64_t rows = sh.batch * sh.q_heads * sh.q_len, dv = sh.value_dim;
  const double u = unit_roundoff(output_format);
  const KernelBudget budget = default_budget(rc.input_format);
  SplitJudgement j;
  j.splits = static_cast<int>(splits);
  std::vector<std::uint8_t> judged(static_cast<std::size_t>(rows), 1);
  if (!opt.rows.empty()) judged = opt.rows;

  // Each partial against the exact attention over its own keys.
  for (std::int64_t s = 0; s < splits && !j.partial; ++s) {
    const std::int64_t lo = s * split_kv_len, hi = std::min(sh.kv_len, lo + split_kv_len);
    const SplitProblem sp = split_keys(p, rc.received.core_inputs, lo, hi);
    const CoreReference ref = reference_core(sp.problem, sp.inputs, opt);
    Tensor o({sh.batch, sh.q_heads, sh.q_len, dv}), lse({sh.batch, sh.q_heads, sh.q_len});
    std::copy_n(run.o_partials.values.begin() + s * rows * dv, rows * dv, o.values.begin());
    std::copy_n(run.lse_partials.values.begin() + s * rows, rows, lse.values.begin());
    for (std::int64_t r = 0; r < rows && !j.partial; ++r) {
      if (!ref.fully_masked[static_cast<std::size_t>(r)]) continue;
      const std::int64_t b = r / (sh.q_heads * sh.q_len), h = r / sh.q_len % sh.q_heads, i = r % sh.q_len;
      bool zeros = lse.values[static_cast<std::size_t>(r)] == -std::numeric_limits<double>::infinity();
      for (std::int64_t d = 0; d < dv; ++d) zeros = zeros && o.values[static_cast<std::size_t>(r * dv + d)] == 0.0;
      if (!zeros)
        j.partial = make(FaultClass::split_partial,
                         row_text(s, b, h, i) + " sees no key of [" + std::to_string(lo) + ", " + std::to_string(hi) +
                             "): expected zeros and log-sum-exp -inf, found o[0] = " + hex(o.values[static_cast<std::size_t>(r * dv)]) +
                             ", lse = " + hex(lse.values[static_cast<std::size_t>(r)]),
                         {s, b, h, i});
    }
    if (j.partial) break;
    CaseScore score = score_core(o, &lse, ref, output_format);
    Case split_case;
    split_case.core = sp.problem;
    split_case.core_inputs = sp.inputs;
    condition_on_scores(score, split_case);
    const std::int64_t n = hi - lo;
    for (std::int64_t r = 0; r < rows && !j.partial; ++r) {
      if (!judged[static_cast<std::size_t>(r)] || ref.fully_masked[static_cast<std::size_t>(r)]) continue;
      const std::int64_t b = r / (sh.q_heads * sh.q_len), h = r / sh.q_len % sh.q_heads, i = r % sh.q_len;
      const double limit = budget.row_scaled_error_limit(n, score, static_cast<std::size_t>(r));
      const double got = score.row_max_scaled[static_cast<std::size_t>(r)];
      bool finite = std::isfinite(lse.values[static_cast<std::size_t>(r)]);
      for (std::int64_t d = 0; d < dv; ++d) finite = finite && std::isfinite(o.values[static_cast<std::size_t>(r * dv + d)]);
      const double lse_exact = ref.lse.values[static_cast<std::size_t>(r)];
      const double lse_err = std::fabs(lse.values[static_cast<std::size_t>(r)] - lse_exact);
      const double lse_limit = limit * u * (1.0 + std::fabs(lse_exact));
      if (!finite || got > limit || !(lse_err <= lse_limit)) {
        j.partial = make(FaultClass::split_partial,
                         row_text(s, b, h, i) + " over keys [" + std::to_string(lo) + ", " + std::to_string(hi) + "): " +
                             (!finite ? std::string("non-finite output or log-sum-exp")
                                      : got > limit ? "scaled error " + num(got) + " over the limit " + num(limit)
                                                    : "log-sum-exp " + hex(lse.values[static_cast<std::size_t>(r)]) +
                                                          " where the exact is " + hex(lse_exact) + " (off by " +
                                                          num(lse_err) + ", limit " + num(lse_limit) + ")"),
                         {s, b, h, i});
      }
    }
  }
  if (j.partial) return j;

  // Every partial right: the merged output must be their log-sum-exp merge.
  for (std::int64_t r = 0; r < rows; ++r) {
    if (!judged[static_cast<std::size_t>(r)]) continue;
    double top = -std::numeric_limits<double>::infinity(), biggest = 0;
    for (std::int64_t s = 0; s < splits; ++s) {
      const double l = run.lse_partials.values[static_cast<std::size_t>(s * rows + r)];
      top = std::max(top, l);
      if (std::isfinite(l)) biggest = std::max(biggest, std::fabs(l));
    }
    if (!std::isfinite(top)) continue;  // no split sees a key: the masked-row convention judges the row
    std::vector<double> w(static_cast<std::size_t>(splits));
    double total = 0;
    for (std::int64_t s = 0; s < splits; ++s) {
      w[static_cast<std::size_t>(s)] = std::exp(run.lse_partials.values[static_cast<std::size_t>(s * rows + r)] - top);
      total += w[static_cast<std::size_t>(s)];
    }
    const double delta = 8 * u * (biggest + 1);
    const std::int64_t b = r / (sh.q_heads * sh.q_len), h = r / sh.q_len % sh.q_heads, i = r % sh.q_len;
    for (std::int64_t d = 0; d < dv; ++d) {
      double merged = 0, magnitude = 0;
      for (std::int64_t s = 0; s < splits; ++s) {
        const double os = run.o_partials.values[static_cast<std::size_t>((s * rows + r) * dv + d)];
        merged += w[static_cast<std::size_t>(s)] / total * os;
        magnitude += w[static_cast<std::size_t>(s)] / total * std::fabs(os);
      }
      const double bound = (2 * delta + static_cast<double>(splits + 4) * u) * magnitude + u * std::fabs(merged);
      const double got = run.out.values[static_cast<std::size_t>(r * dv + d)];
      if (std::fabs(got - merged) > bound || !std::isfinite(got)) {
        j.merge = make(FaultClass::split_merge,
                       "every partial within budget, but merged O[" + std::to_string(b) + "," + std::to_string(h) + "," +
                           std::to_string(i) + "," + std::to_string(d) + "] = " + hex(got) +
                           " where the log-sum-exp merge of the kernel's own " + std::to_string(splits) +
                           " partials gives " + hex(merged) + " (off by " + num(std::fabs(got - merged)) +
                           ", merge rounding bound " + num(bound) + ")",
                       {b, h, i, d});
        return j;
      }
    }
    if (!run.lse.values.empty()) {
      const double want = top + std::log(total);
      const double got = run.lse.values[static_cast<std::size_t>(r)];
      if (!(std::fabs(got - want) <= delta + 4 * u * (1 + std::fabs(want)))) {
        j.merge = make(FaultClass::split_merge,
                       "every partial within budget, but the merged log-sum-exp of row (b=" + std::to_string(b) +
                           ", h=" + std::to_string(h) + ", i=" + std::to_string(i) + ") is " + hex(got) +
                           " where the partials' merge gives " + hex(want),
                       {b, h, i});
        return j;
      }
    }
  }
  return j;
}

}  // namespace headroom
