// headroom — the reference's preconditions, checked: a valid problem and finite inputs.
#include "input_check.h"

#include <cmath>
#include <string>

#include "headroom/input_error.h"
#include "headroom/varlen.h"

namespace headroom::detail {
namespace {

constexpr const char* kSource = "reference input";

void require_no_findings(const std::vector<ProblemError>& found) {
  if (found.empty()) return;
  const ProblemError& e = found.front();
  std::string more = found.size() > 1 ? " (and " + std::to_string(found.size() - 1) + " more)" : "";
  throw InputError(kSource, "field " + e.field, "expected " + e.expected + ", found " + e.found + more,
                   "make the case agree with its problem shape (headroom::validate lists every finding)");
}

void require_finite(const char* name, const Tensor& t) {
  for (std::size_t i = 0; i < t.values.size(); ++i) {
    if (!std::isfinite(t.values[i]))
      throw InputError(kSource, std::string("tensor ") + name + ", flat index " + std::to_string(i),
                       "value is not finite (" + std::to_string(t.values[i]) + ")",
                       "the reference is defined for finite inputs only; fix or regenerate the case");
  }
}

}  // namespace

void require_valid(const CoreProblem& p, const CoreInputs& in) {
  require_no_findings(validate(p, in));
  require_finite("q", in.q);
  require_finite("k", in.k);
  require_finite("v", in.v);
}

void require_valid(const BlockProblem& p, const BlockInputs& in) {
  require_no_findings(validate(p, in));
  require_finite("x_q", in.x_q);
  require_finite("x_kv", in.x_kv);
  require_finite("w_q", in.w_q);
  require_finite("w_k", in.w_k);
  require_finite("w_v", in.w_v);
  require_finite("w_o", in.w_o);
  require_finite("b_q", in.b_q);
  require_finite("b_k", in.b_k);
  require_finite("b_v", in.b_v);
  require_finite("b_o", in.b_o);
}

void visible_keys(const CoreShape& s, const Mask& mask, std::int64_t b, std::int64_t h, std::int64_t i,
                  std::vector<std::int64_t>& keys, std::vector<double>& bias) {
  keys.clear();
  bias.clear();
  // A varlen row sees only its own sequence's keys: scan just those (varlen.h).
  std::int64_t begin = 0, end = s.kv_len;
  if (mask.is_varlen()) {
    const SequenceSpan q = sequence_of_row(mask, i);
    begin = q.kv_begin, end = q.kv_begin + q.kv_len;
  }
  for (std::int64_t j = begin; j < end; ++j) {
    if (!mask.visible(s, b, h, i, j)) continue;
    keys.push_back(j);
    if (mask.kind == MaskKind::bias) bias.push_back(mask.bias_at(b, h, i, j));
  }
}

}  // namespace headroom::detail
