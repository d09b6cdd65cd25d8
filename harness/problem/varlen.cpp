// headroom — packed variable-length batches: offsets, sequences, validation (varlen.h).
#include "headroom/varlen.h"

#include <algorithm>

namespace headroom {

std::vector<std::int64_t> offsets_of(const std::vector<std::int64_t>& lengths) {
  std::vector<std::int64_t> cu{0};
  for (std::int64_t l : lengths) cu.push_back(cu.back() + l);
  return cu;
}

std::vector<std::int64_t> lengths_of(const std::vector<std::int64_t>& cu) {
  std::vector<std::int64_t> out;
  for (std::size_t n = 1; n < cu.size(); ++n) out.push_back(cu[n] - cu[n - 1]);
  return out;
}

std::int64_t sequence_count(const Mask& m) {
  return m.cu_q_lens.empty() ? 0 : static_cast<std::int64_t>(m.cu_q_lens.size()) - 1;
}

SequenceSpan sequence(const Mask& m, std::int64_t n) {
  const auto k = static_cast<std::size_t>(n);
  return {n, m.cu_q_lens[k], m.cu_q_lens[k + 1] - m.cu_q_lens[k], m.cu_kv_lens[k], m.cu_kv_lens[k + 1] - m.cu_kv_lens[k]};
}

SequenceSpan sequence_of_row(const Mask& m, std::int64_t i) {
  // The last offset ≤ i: sequences with no rows share their offset with the
  // next one, which is the one that holds row i.
  const auto it = std::upper_bound(m.cu_q_lens.begin(), m.cu_q_lens.end(), i);
  return sequence(m, static_cast<std::int64_t>(it - m.cu_q_lens.begin()) - 1);
}

CoreShape declared_shape(const CoreShape& s, const Mask& m) {
  if (!m.is_varlen()) return s;
  CoreShape out = s;
  out.batch = sequence_count(m);
  out.q_len = out.kv_len = 0;
  for (std::int64_t n = 0; n < out.batch; ++n) {
    const SequenceSpan q = sequence(m, n);
    out.q_len = std::max(out.q_len, q.q_len);
    out.kv_len = std::max(out.kv_len, q.kv_len);
  }
  return out;
}

namespace {

void check_offsets(const char* name, const std::vector<std::int64_t>& cu, std::int64_t total,
                   std::vector<ProblemError>& out) {
  const std::string field = std::string("mask.") + name;
  if (cu.front() != 0) out.push_back({field + "[0]", "0", std::to_string(cu.front())});
  for (std::size_t n = 1; n < cu.size(); ++n) {
    if (cu[n] < cu[n - 1]) {
      out.push_back({field + "[" + std::to_string(n) + "]", "an offset >= the one before (" + std::to_string(cu[n - 1]) + ")",
                     std::to_string(cu[n])});
      return;
    }
  }
  if (cu.back() != total)
    out.push_back({field + "[" + std::to_string(cu.size() - 1) + "]", "the packed length " + std::to_string(total),
                   std::to_string(cu.back())});
}

}  // namespace

std::vector<ProblemError> validate_varlen(const Mask& m, const CoreShape& s) {
  std::vector<ProblemError> out;
  if (m.cu_q_lens.empty() && m.cu_kv_lens.empty()) return out;
  if (m.cu_q_lens.size() != m.cu_kv_lens.size() || m.cu_q_lens.size() < 2) {
    out.push_back({"mask.cu_kv_lens", "as many offsets as mask.cu_q_lens (" + std::to_string(m.cu_q_lens.size()) +
                                          "), at least 2 (one sequence)",
                   std::to_string(m.cu_kv_lens.size()) + " offsets"});
    return out;
  }
  if (s.batch != 1) out.push_back({"shape.batch", "1 for a packed variable-length batch", std::to_string(s.batch)});
  if (m.kind != MaskKind::none && m.kind != MaskKind::causal_top_left && m.kind != MaskKind::causal_bottom_right)
    out.push_back({"mask.kind", "none, causal_top_left or causal_bottom_right with variable lengths",
                   std::string(mask_kind_name(m.kind))});
  check_offsets("cu_q_lens", m.cu_q_lens, s.q_len, out);
  check_offsets("cu_kv_lens", m.cu_kv_lens, s.kv_len, out);
  return out;
}

std::string row_place(const Mask& m, std::int64_t i) {
  const SequenceSpan q = sequence_of_row(m, i);
  return "sequence " + std::to_string(q.n) + " (query " + std::to_string(i - q.q_begin) + " of " +
         std::to_string(q.q_len) + ")";
}

std::string key_place(const Mask& m, std::int64_t j) {
  const auto it = std::upper_bound(m.cu_kv_lens.begin(), m.cu_kv_lens.end(), j);
  const std::int64_t n = static_cast<std::int64_t>(it - m.cu_kv_lens.begin()) - 1;
  if (n >= sequence_count(m)) return "key " + std::to_string(j) + " past every sequence";
  return "key " + std::to_string(j - m.cu_kv_lens[static_cast<std::size_t>(n)]) + " of sequence " + std::to_string(n);
}

}  // namespace headroom
