// headroom — the problem model: mask semantics and validation (see problem.h).
#include "headroom/problem.h"

#include "headroom/varlen.h"

#include <array>
#include <cmath>
#include <cstdio>
#include <limits>
#include <string>
#include <utility>

namespace headroom {
namespace {

constexpr std::array<std::pair<MaskKind, std::string_view>, 6> kMaskNames{{
    {MaskKind::none, "none"},
    {MaskKind::causal_top_left, "causal_top_left"},
    {MaskKind::causal_bottom_right, "causal_bottom_right"},
    {MaskKind::key_padding, "key_padding"},
    {MaskKind::dense, "dense"},
    {MaskKind::bias, "bias"},
}};

// Tensors beyond 2^48 elements (2 PiB of doubles) cannot be held; rejecting
// them here keeps every later product of extents far from int64 overflow.
constexpr std::int64_t kMaxElements = std::int64_t{1} << 48;

std::string number_text(double v) {
  char buf[40];
  std::snprintf(buf, sizeof buf, "%.9g", v);
  return buf;
}

std::string shape_text(const std::vector<std::int64_t>& s) {
  std::string out = "[";
  for (std::size_t i = 0; i < s.size(); ++i) {
    if (i != 0) out += ", ";
    out += std::to_string(s[i]);
  }
  return out + "]";
}

// The row of a [B, 1|Hq, Tq, Tk] mask tensor that query head h reads: a
// head extent of 1 broadcasts over all heads.
std::int64_t mask_head(const Tensor& t, std::int64_t h) { return t.shape[1] == 1 ? 0 : h; }

// Product of extents, or -1 when it exceeds kMaxElements (or an extent is < 0).
std::int64_t checked_count(const std::vector<std::int64_t>& s) {
  std::int64_t n = 1;
  for (std::int64_t e : s) {
    if (e < 0) return -1;
    if (e != 0 && n > kMaxElements / e) return -1;
    n *= e;
  }
  return n;
}

class Findings {
 public:
  void add(std::string field, std::string expected, std::string found) {
    list_.push_back({std::move(field), std::move(expected), std::move(found)});
  }
  std::vector<ProblemError> take() { return std::move(list_); }
  bool empty() const { return list_.empty(); }

  void extent(const char* field, std::int64_t v) {
    if (v < 1) add(field, "an extent >= 1", std::to_string(v));
  }

  // The tensor has exactly the expected shape and as many values as it says.
  void tensor(const std::string& name, const Tensor& t, const std::vector<std::int64_t>& want) {
    if (t.shape != want) {
      add(name + ".shape", shape_text(want), shape_text(t.shape));
      return;
    }
    check_values(name, t);
  }

  // An optional tensor: absent (rank 0, no values) or exactly `want`.
  void optional_tensor(const std::string& name, const Tensor& t, const std::vector<std::int64_t>& want) {
    if (t.shape.empty() && t.values.empty()) return;
    if (t.shape != want) {
      add(name + ".shape", shape_text(want) + " or absent", shape_text(t.shape));
      return;
    }
    check_values(name, t);
  }

 private:
  void check_values(const std::string& name, const Tensor& t) {
    const std::int64_t n = checked_count(t.shape);
    if (n < 0 || static_cast<std::uint64_t>(n) != t.values.size())
      add(name + ".values", std::to_string(n) + " values (the product of the shape)",
          std::to_string(t.values.size()));
  }

  std::vector<ProblemError> list_;
};

// Extents, head grouping and sizes shared by core and block problems. Returns
// false when the shape is too broken for the mask to be checked against it.
bool check_core_shape(const CoreShape& s, Findings& f) {
  Findings local;
  local.extent("shape.batch", s.batch);
  local.extent("shape.q_heads", s.q_heads);
  local.extent("shape.kv_heads", s.kv_heads);
  local.extent("shape.q_len", s.q_len);
  local.extent("shape.kv_len", s.kv_len);
  local.extent("shape.key_dim", s.key_dim);
  local.extent("shape.value_dim", s.value_dim);
  bool ok = local.empty();
  for (auto& e : local.take()) f.add(std::move(e.field), std::move(e.expected), std::move(e.found));
  if (!ok) return false;
  if (s.q_heads % s.kv_heads != 0) {
    f.add("shape.q_heads", "a multiple of shape.kv_heads (" + std::to_string(s.kv_heads) + ")",
          std::to_string(s.q_heads));
    ok = false;
  }
  const std::array<std::vector<std::int64_t>, 4> tensors{{
      {s.batch, s.q_heads, s.q_len, s.key_dim},
      {s.batch, s.kv_heads, s.kv_len, s.key_dim},
      {s.batch, s.kv_heads, s.kv_len, s.value_dim},
      {s.batch, s.q_heads, s.q_len, s.kv_len},  // the scores, and a dense mask
  }};
  for (const auto& t : tensors) {
    if (checked_count(t) < 0) {
      f.add("shape", "every tensor below 2^48 elements", shape_text(t) + " is larger");
      return false;
    }
  }
  return ok;
}

void check_scale(float scale, Findings& f) {
  if (!std::isfinite(scale) || scale == 0.0f)
    f.add("scale", "a finite nonzero float32", number_text(scale));
}

// A dense or bias mask tensor: [B, 1 or Hq, Tq, Tk].
void check_mask_tensor(const std::string& name, const Tensor& t, const CoreShape& s, Findings& f) {
  const bool shape_ok = t.rank() == 4 && t.shape[0] == s.batch && (t.shape[1] == 1 || t.shape[1] == s.q_heads) &&
                        t.shape[2] == s.q_len && t.shape[3] == s.kv_len;
  if (!shape_ok) {
    // Appended piece by piece: GCC 12 at -O3 misreads "[" + std::string&& (-Wrestrict, a known false positive).
    std::string expected = "[";
    expected += std::to_string(s.batch);
    expected += ", 1 or ";
    expected += std::to_string(s.q_heads);
    expected += ", ";
    expected += std::to_string(s.q_len);
    expected += ", ";
    expected += std::to_string(s.kv_len);
    expected += "]";
    f.add(name + ".shape", expected, shape_text(t.shape));
    return;
  }
  const std::int64_t n = checked_count(t.shape);
  if (static_cast<std::uint64_t>(n) != t.values.size())
    f.add(name + ".values", std::to_string(n) + " values (the product of the shape)", std::to_string(t.values.size()));
}

void check_mask(const Mask& m, const CoreShape& s, Findings& f) {
  const std::string kind{mask_kind_name(m.kind)};
  if (m.window_left < -1) f.add("mask.window_left", "-1 (open) or a key count >= 0", std::to_string(m.window_left));
  if (m.window_right < -1) f.add("mask.window_right", "-1 (open) or a key count >= 0", std::to_string(m.window_right));
  if (m.kind == MaskKind::key_padding) {
    if (m.key_lengths.size() != static_cast<std::size_t>(s.batch)) {
      f.add("mask.key_lengths", std::to_string(s.batch) + " entries (one per batch)",
            std::to_string(m.key_lengths.size()));
    } else {
      for (std::size_t b = 0; b < m.key_lengths.size(); ++b) {
        const std::int64_t len = m.key_lengths[b];
        if (len < 0 || len > s.kv_len)
          f.add("mask.key_lengths[" + std::to_string(b) + "]", "a length in [0, " + std::to_string(s.kv_len) + "]",
                std::to_string(len));
      }
    }
  } else if (!m.key_lengths.empty()) {
    f.add("mask.key_lengths", "no key lengths for mask kind " + kind, std::to_string(m.key_lengths.size()) + " entries");
  }

  if (m.kind == MaskKind::dense) {
    check_mask_tensor("mask.allowed", m.allowed, s, f);
  } else if (!m.allowed.shape.empty() || !m.allowed.values.empty()) {
    f.add("mask.allowed", "no dense mask for mask kind " + kind, "a tensor of shape " + shape_text(m.allowed.shape));
  }

  if (m.kind == MaskKind::bias) {
    Findings local;
    check_mask_tensor("mask.bias", m.bias, s, local);
    const bool shaped = local.empty();
    for (auto& e : local.take()) f.add(std::move(e.field), std::move(e.expected), std::move(e.found));
    if (shaped) {
      // The bias is finite or −inf (a masked position); NaN and +inf have no
      // meaning as a score offset. One finding is enough to locate the fault.
      for (std::size_t i = 0; i < m.bias.values.size(); ++i) {
        const double v = m.bias.values[i];
        if (std::isnan(v) || v == std::numeric_limits<double>::infinity()) {
          f.add("mask.bias.values[" + std::to_string(i) + "]", "a finite value or -inf", number_text(v));
          break;
        }
      }
    }
  } else if (!m.bias.shape.empty() || !m.bias.values.empty()) {
    f.add("mask.bias", "no bias tensor for mask kind " + kind, "a tensor of shape " + shape_text(m.bias.shape));
  }
}

// Expected tensor shapes derive from the shape; with a broken shape, checking
// the inputs would only repeat the same finding in other words.
bool shape_broken(const std::vector<ProblemError>& found) {
  for (const auto& e : found)
    if (e.field.rfind("shape", 0) == 0) return true;
  return false;
}

}  // namespace

std::string_view mask_kind_name(MaskKind k) {
  for (const auto& [kind, name] : kMaskNames)
    if (kind == k) return name;
  return "unknown";
}

std::optional<MaskKind> parse_mask_kind(std::string_view name) {
  for (const auto& [kind, n] : kMaskNames)
    if (n == name) return kind;
  return std::nullopt;
}

namespace {

bool kind_visible(const Mask& m, const CoreShape& s, std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t j) {
  switch (m.kind) {
    case MaskKind::none:
      return true;
    case MaskKind::causal_top_left:
      return j <= i;
    case MaskKind::causal_bottom_right:
      // Aligned so the last query row sees every key: row Tq−1 ↔ key Tk−1
      // (the sequence's own last key under kv_lens).
      return j <= i + (m.kv_end(s, b) - s.q_len);
    case MaskKind::key_padding:
      return j < m.key_lengths[static_cast<std::size_t>(b)];
    case MaskKind::dense:
      return m.allowed.at(b, mask_head(m.allowed, h), i, j) != 0.0;
    case MaskKind::bias:
      return m.bias.at(b, mask_head(m.bias, h), i, j) != -std::numeric_limits<double>::infinity();
  }
  return false;
}

}  // namespace

bool Mask::visible(const CoreShape& s, std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t j) const {
  if (!kv_lens.empty() && j >= kv_lens[static_cast<std::size_t>(b)]) return false;
  if (is_varlen()) {
    // Each sequence is its own problem: its keys only, its own lengths and
    // local positions for causal alignment and the window (varlen.h).
    const SequenceSpan q = sequence_of_row(*this, i);
    if (j < q.kv_begin || j >= q.kv_begin + q.kv_len) return false;
    CoreShape local = s;
    local.q_len = q.q_len;
    local.kv_len = q.kv_len;
    Mask plain;
    plain.kind = kind;
    plain.window_left = window_left;
    plain.window_right = window_right;
    return plain.visible(local, b, h, i - q.q_begin, j - q.kv_begin);
  }
  if (!kind_visible(*this, s, b, h, i, j)) return false;
  if (!has_window()) return true;
  const std::int64_t at = kind == MaskKind::causal_top_left ? i : i + (kv_end(s, b) - s.q_len);
  if (window_left >= 0 && j < at - window_left) return false;
  return window_right < 0 || j <= at + window_right;
}

double Mask::bias_at(std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t j) const {
  if (kind != MaskKind::bias) return 0.0;
  return bias.at(b, mask_head(bias, h), i, j);
}

namespace {

void check_score_features(const CoreProblem& p, Findings& f) {
  if (!(p.softcap >= 0.0f) || std::isinf(p.softcap))
    f.add("softcap", "0 (none) or a finite cap > 0", std::to_string(p.softcap));
  if (p.has_sinks() && p.sinks.size() != static_cast<std::size_t>(p.shape.q_heads))
    f.add("sinks", std::to_string(p.shape.q_heads) + " entries (one per query head) or none",
          std::to_string(p.sinks.size()) + " entries");
  for (std::size_t h = 0; h < p.sinks.size(); ++h)
    if (!std::isfinite(p.sinks[h])) f.add("sinks[" + std::to_string(h) + "]", "a finite logit", std::to_string(p.sinks[h]));
  const std::pair<const char*, float> delayed[] = {{"fp8_delayed.q", p.fp8_delayed.q}, {"fp8_delayed.k", p.fp8_delayed.k},
                                                   {"fp8_delayed.v", p.fp8_delayed.v}};
  for (const auto& [field, s] : delayed)
    if (!(s >= 0.0f) || std::isinf(s)) f.add(field, "0 (the fresh amax scale) or a finite scale > 0", std::to_string(s));
}

}  // namespace

std::string ProblemError::message() const { return field + ": expected " + expected + ", found " + found; }

std::vector<ProblemError> validate(const CoreProblem& p) {
  Findings f;
  const bool shape_ok = check_core_shape(p.shape, f);
  check_scale(p.scale, f);
  if (shape_ok) check_mask(p.mask, p.shape, f);
  check_score_features(p, f);
  if (shape_ok && p.has_paged_kv()) {
    for (auto& e : paged_findings(p.paged, p.shape.batch, p.shape.kv_len, p.mask.kv_lens))
      f.add(std::move(e.field), std::move(e.expected), std::move(e.found));
    if (p.mask.is_varlen()) f.add("paged", "no packed variable-length offsets with pages (not judged together yet)", "both");
  } else if (!p.mask.kv_lens.empty()) {
    f.add("mask.kv_lens", "no sequence lengths without a paged layout", std::to_string(p.mask.kv_lens.size()) + " entries");
  }
  std::vector<ProblemError> out = f.take();
  if (shape_ok)
    for (ProblemError& e : validate_varlen(p.mask, p.shape)) out.push_back(std::move(e));
  return out;
}

std::vector<ProblemError> validate(const CoreProblem& p, const CoreInputs& in) {
  std::vector<ProblemError> out = validate(p);
  if (shape_broken(out)) return out;
  const CoreShape& s = p.shape;
  Findings f;
  f.tensor("inputs.q", in.q, {s.batch, s.q_heads, s.q_len, s.key_dim});
  f.tensor("inputs.k", in.k, {s.batch, s.kv_heads, s.kv_len, s.key_dim});
  f.tensor("inputs.v", in.v, {s.batch, s.kv_heads, s.kv_len, s.value_dim});
  const bool shaped = f.empty();
  for (auto& e : f.take()) out.push_back(std::move(e));
  if (shaped && out.empty() && p.has_paged_kv()) {
    for (const auto& [name, t] : {std::pair{"inputs.k", &in.k}, std::pair{"inputs.v", &in.v}}) {
      const std::string conflict = shared_page_conflict(p.paged, *t);
      if (!conflict.empty()) out.push_back({name, "one content per shared page", conflict});
    }
  }
  return out;
}

std::vector<ProblemError> validate(const BlockProblem& p) {
  Findings f;
  f.extent("shape.model_dim", p.shape.model_dim);
  const bool shape_ok = check_core_shape(p.shape.core(), f) && p.shape.model_dim >= 1;
  check_scale(p.scale, f);
  if (shape_ok) {
    const BlockShape& s = p.shape;
    // Weight matrices are [Dm, H·D] and [Hq·Dv, Dm]; keep them within bounds too.
    for (std::int64_t cols : {s.q_heads * s.key_dim, s.kv_heads * s.key_dim, s.kv_heads * s.value_dim,
                              s.q_heads * s.value_dim, s.q_len, s.kv_len}) {
      if (checked_count({s.batch, s.model_dim, cols}) < 0) {
        f.add("shape.model_dim", "every tensor below 2^48 elements", std::to_string(s.model_dim) + " is too large");
        return f.take();
      }
    }
    check_mask(p.mask, s.core(), f);
    if (p.mask.is_varlen() || !p.mask.cu_kv_lens.empty())
      f.add("mask.cu_q_lens", "no variable lengths at block level", "offsets");
  }
  return f.take();
}

std::vector<ProblemError> validate(const BlockProblem& p, const BlockInputs& in) {
  std::vector<ProblemError> out = validate(p);
  if (shape_broken(out)) return out;
  const BlockShape& s = p.shape;
  Findings f;
  f.tensor("inputs.x_q", in.x_q, {s.batch, s.q_len, s.model_dim});
  f.tensor("inputs.x_kv", in.x_kv, {s.batch, s.kv_len, s.model_dim});
  f.tensor("inputs.w_q", in.w_q, {s.model_dim, s.q_heads * s.key_dim});
  f.tensor("inputs.w_k", in.w_k, {s.model_dim, s.kv_heads * s.key_dim});
  f.tensor("inputs.w_v", in.w_v, {s.model_dim, s.kv_heads * s.value_dim});
  f.tensor("inputs.w_o", in.w_o, {s.q_heads * s.value_dim, s.model_dim});
  f.optional_tensor("inputs.b_q", in.b_q, {s.q_heads * s.key_dim});
  f.optional_tensor("inputs.b_k", in.b_k, {s.kv_heads * s.key_dim});
  f.optional_tensor("inputs.b_v", in.b_v, {s.kv_heads * s.value_dim});
  f.optional_tensor("inputs.b_o", in.b_o, {s.model_dim});
  for (auto& e : f.take()) out.push_back(std::move(e));
  return out;
}

}  // namespace headroom
