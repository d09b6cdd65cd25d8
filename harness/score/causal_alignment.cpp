// headroom — the causal-alignment convention detector (faults.h).
//
// Top-left (j ≤ i) and bottom-right (j ≤ i + Tk − Tq) causal masks agree when
// Tq = Tk, so a kernel with the alignment flipped passes every square test.
// With Tq ≠ Tk the two references differ by O(1) in most rows, far more than
// any rounding; a kernel whose output sits on the opposite reference has the
// alignment backwards rather than a large error.
#include <algorithm>
#include <cmath>
#include <cstdio>
#include <string>

#include "headroom/faults.h"
#include "headroom/scores.h"
#include "headroom/varlen.h"

namespace headroom {
namespace {

// Far: more than any sound kernel's rounding in these units at the shapes we
// run (a binary16-accumulating kernel reaches tens at Tk ~ 10^3). Closer: the
// opposite reference explains the output 8× better — a margin no rounding noise
// crosses when the references differ by O(1).
constexpr double kFar = 16.0;
constexpr double kCloser = 8.0;

struct Distance {
  double max_scaled = 0;
  std::int64_t rows = 0;
};

// Max scaled error of `out` against two references over the rows (length
// `width` each) excluded by neither.
void distances(const Tensor& out, const Tensor& r1_out, const Tensor& r1_bound, const Tensor& r1_mag,
               const Tensor& r2_out, const Tensor& r2_bound, const Tensor& r2_mag, const std::vector<std::uint8_t>& ex,
               std::int64_t width, Format f, Distance& d1, Distance& d2) {
  const std::size_t rows = ex.size();
  for (std::size_t r = 0; r < rows; ++r) {
    if (ex[r]) continue;
    bool counted = false;
    for (std::int64_t d = 0; d < width; ++d) {
      const std::size_t k = r * static_cast<std::size_t>(width) + static_cast<std::size_t>(d);
      const double o = out.values[k];
      if (!std::isfinite(o) || !std::isfinite(r1_out.values[k]) || !std::isfinite(r2_out.values[k])) continue;
      d1.max_scaled = std::max(d1.max_scaled, element_error(o, r1_out.values[k], r1_bound.values[k], r1_mag.values[k], f).scaled);
      d2.max_scaled = std::max(d2.max_scaled, element_error(o, r2_out.values[k], r2_bound.values[k], r2_mag.values[k], f).scaled);
      counted = true;
    }
    if (counted) ++d1.rows, ++d2.rows;
  }
}

MaskKind opposite(MaskKind k) {
  return k == MaskKind::causal_top_left ? MaskKind::causal_bottom_right : MaskKind::causal_top_left;
}

// Causal with Tq ≠ Tk; in a packed batch, in some sequence (each is aligned on its own lengths).
bool applies(const Mask& m, const CoreShape& s) {
  if (m.kind != MaskKind::causal_top_left && m.kind != MaskKind::causal_bottom_right) return false;
  if (!m.is_varlen()) return s.q_len != s.kv_len;
  for (std::int64_t n = 0; n < sequence_count(m); ++n) {
    const SequenceSpan q = sequence(m, n);
    if (q.q_len > 0 && q.q_len != q.kv_len) return true;
  }
  return false;
}

std::optional<Fault> verdict(MaskKind declared, const Distance& mine, const Distance& other) {
  if (mine.rows == 0 || mine.max_scaled < kFar || other.max_scaled * kCloser > mine.max_scaled) return std::nullopt;
  Fault f;
  f.kind = FaultClass::convention;
  f.count = mine.rows;
  char buf[256];
  std::snprintf(buf, sizeof buf,
                "causal alignment opposite to declaration: declared %s, max scaled error %.3g against it and %.3g "
                "against %s (%lld rows compared)",
                std::string(mask_kind_name(declared)).c_str(), mine.max_scaled, other.max_scaled,
                std::string(mask_kind_name(opposite(declared))).c_str(), static_cast<long long>(mine.rows));
  f.detail = buf;
  return f;
}

}  // namespace

std::optional<Fault> detect_causal_alignment(const KernelRun& run, const ReceivedCase& c, const CoreReference& ref,
                                             Format output_format, const ReferenceOptions& opt) {
  const CoreProblem& p = c.received.core;
  if (c.received.level != Level::core || !applies(p.mask, p.shape) || run.out.shape != ref.out.shape) return std::nullopt;
  CoreProblem flipped = p;
  flipped.mask.kind = opposite(p.mask.kind);
  const CoreReference other = reference_core(flipped, c.received.core_inputs, opt);
  std::vector<std::uint8_t> ex(ref.fully_masked.size());
  for (std::size_t r = 0; r < ex.size(); ++r) ex[r] = ref.fully_masked[r] || other.fully_masked[r];
  Distance mine, theirs;
  distances(run.out, ref.out, ref.bound, ref.magnitude, other.out, other.bound, other.magnitude, ex, p.shape.value_dim,
            output_format, mine, theirs);
  return verdict(p.mask.kind, mine, theirs);
}

std::optional<Fault> detect_causal_alignment(const KernelRun& run, const ReceivedCase& c, const BlockReference& ref,
                                             Format output_format, const ReferenceOptions& opt) {
  const BlockProblem& p = c.received.block;
  const CoreShape s = p.shape.core();
  if (c.received.level != Level::block || !applies(p.mask, s) || run.out.shape != ref.out.shape) return std::nullopt;
  BlockProblem flipped = p;
  flipped.mask.kind = opposite(p.mask.kind);
  const BlockReference other = reference_block(flipped, c.received.block_inputs, opt);
  // Y[b, i, :] is excluded when query i is fully masked in any head, under either alignment.
  std::vector<std::uint8_t> ex(static_cast<std::size_t>(s.batch * s.q_len), 0);
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i) {
        const std::size_t r = static_cast<std::size_t>((b * s.q_heads + h) * s.q_len + i);
        if ((r < ref.fully_masked.size() && ref.fully_masked[r]) || (r < other.fully_masked.size() && other.fully_masked[r]))
          ex[static_cast<std::size_t>(b * s.q_len + i)] = 1;
      }
  Distance mine, theirs;
  distances(run.out, ref.out, ref.bound, ref.magnitude, other.out, other.bound, other.magnitude, ex, p.shape.model_dim,
            output_format, mine, theirs);
  return verdict(p.mask.kind, mine, theirs);
}

}  // namespace headroom
