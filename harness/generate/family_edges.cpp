// headroom — edge families: format_edges, masks, cancelling_values. Documented in families.h.
#include <algorithm>
#include <cmath>
#include <utility>

#include "recipe.h"

namespace headroom::generate_internal {
namespace {

// ---- format_edges ----
// Limits from IEEE 754-2019 Table 3.5: binary16 max 65504 = (2 − 2^-10)·2^15,
// smallest normal 2^-14, subnormals k·2^-24 (k < 2^10); float32 subnormals
// below 2^-126 down to 2^-149.

enum class Edge { sub16, sub32, neg_zero, pos_zero, int8_tie, near_max, int8_top, int8_bottom };

// Q and K carry the int8 edges; V the binary16 maxima. Both together in one
// tensor would make the int8 extreme (127·2^e above every entry) overflow binary16.
constexpr Edge kQkEdges[] = {Edge::int8_top, Edge::int8_bottom, Edge::sub16,   Edge::sub32,
                             Edge::neg_zero, Edge::pos_zero,    Edge::int8_tie};
constexpr Edge kVEdges[] = {Edge::near_max, Edge::sub16, Edge::sub32, Edge::neg_zero, Edge::pos_zero};

double edge_value(Edge e, const Noise& n, Stream s, std::int64_t at, double grid) {
  const std::uint64_t h = n.bits(Stream::plan, static_cast<std::int64_t>(s), at, 9);
  const double sign = (h & 1) ? -1.0 : 1.0;
  switch (e) {
    case Edge::sub16:  // k·2^-24, k in [1, 1023]: every binary16 subnormal
      return sign * std::ldexp(static_cast<double>(1 + (h >> 1) % 1023), -24);
    case Edge::sub32:  // 2^-149 (the least) or 2^-130, both float32 subnormals
      return sign * ((h >> 1) & 1 ? 0x1p-149 : 0x1p-130);
    case Edge::neg_zero:
      return -0.0;
    case Edge::pos_zero:
      return 0.0;
    case Edge::near_max: {  // the maximum, its predecessor, and 65519, the largest float that rounds to it
      constexpr double kNearMax[] = {65504.0, 65472.0, 65519.0};
      return sign * kNearMax[(h >> 1) % 3];
    }
    case Edge::int8_tie:  // (k + 1/2)·2^e, k in [−127, 126]: exactly halfway between two codes
      return (static_cast<double>(static_cast<std::int64_t>((h >> 1) % 254) - 127) + 0.5) * grid;
    case Edge::int8_top:
      return 127.0 * grid;
    case Edge::int8_bottom:
      return -127.0 * grid;
  }
  return 0.0;
}

// The first `one_off` kinds appear exactly once (the int8 extremes); the rest
// also fill one entry in eight at random.
void edges_into(const Recipe& r, Tensor& t, Stream s, std::span<const Edge> kinds, std::int64_t one_off) {
  const Noise n = r.noise();
  const auto count = static_cast<std::int64_t>(t.values.size());
  const auto nk = static_cast<std::int64_t>(kinds.size());
  // Which entries become edges, and which edge: every kind once at evenly
  // spread places when there is room, else one entry in eight at random.
  std::vector<int> kind_at(static_cast<std::size_t>(count), -1);
  for (std::int64_t i = 0; i < count; ++i)
    if (n.index(8, Stream::plan, static_cast<std::int64_t>(s), i) == 0)
      kind_at[static_cast<std::size_t>(i)] =
          static_cast<int>(one_off + n.index(nk - one_off, Stream::plan, static_cast<std::int64_t>(s), i, 1));
  for (std::int64_t m = 0; m < std::min(nk, count); ++m)
    kind_at[static_cast<std::size_t>(m * count / nk)] = static_cast<int>(m);
  // For the int8 grid: 2^e with 127·2^e ≥ every other entry, so a symmetric
  // per-tensor scale max|x|/127 is exactly 2^e and the ties are exact float32.
  double top = 0;
  for (std::int64_t i = 0; i < count; ++i)
    if (kind_at[static_cast<std::size_t>(i)] < 0) top = std::max(top, std::fabs(t.values[static_cast<std::size_t>(i)]));
  const double grid = std::exp2(std::ceil(std::log2(std::max(top, 1e-30) / 127.0)));
  for (std::int64_t i = 0; i < count; ++i) {
    const int k = kind_at[static_cast<std::size_t>(i)];
    if (k >= 0) t.values[static_cast<std::size_t>(i)] = edge_value(kinds[static_cast<std::size_t>(k)], n, s, i, grid);
  }
}

void edges_realize(const Recipe& r, Case& c) {
  c.core.scale = softmax_scale(r.shape.key_dim);
  c.core_inputs = gaussian_inputs(r, 1.0);
  edges_into(r, c.core_inputs.q, Stream::q, kQkEdges, 2);
  edges_into(r, c.core_inputs.k, Stream::k, kQkEdges, 2);
  edges_into(r, c.core_inputs.v, Stream::v, kVEdges, 0);
}

// ---- masks ----

MaskKind masks_mask(Draw& d) {
  return d.pick({MaskKind::none, MaskKind::causal_top_left, MaskKind::causal_bottom_right, MaskKind::key_padding,
                 MaskKind::dense, MaskKind::bias});
}

void masks_sample(Draw& d, int size, Recipe& r) {
  r.shape = sample_core_shape(d, size);
  CoreShape& s = r.shape;
  const std::int64_t cap = std::max<std::int64_t>(size_cap(size, 64), 3);
  // Shape each kind so its hard rows exist (see the family's documentation).
  switch (r.mask) {
    case MaskKind::key_padding:
      s.batch = std::max<std::int64_t>(s.batch, 2);
      break;
    case MaskKind::causal_bottom_right:  // Tq > Tk: leading rows see no key
    case MaskKind::causal_top_left:      // Tq < Tk: trailing keys never visible
      if (s.q_len == s.kv_len) s.q_len < cap ? ++s.q_len : --s.kv_len;
      if ((r.mask == MaskKind::causal_bottom_right) != (s.q_len > s.kv_len)) std::swap(s.q_len, s.kv_len);
      break;
    case MaskKind::dense:
    case MaskKind::bias:
      s.q_len = std::max<std::int64_t>(s.q_len, 3);
      break;
    case MaskKind::none:
      break;
  }
}

bool masks_keeps(const Recipe& r) {
  switch (r.mask) {
    case MaskKind::key_padding:
      return r.shape.batch >= 2;
    case MaskKind::causal_bottom_right:
      return r.shape.q_len > r.shape.kv_len;
    case MaskKind::causal_top_left:
      return r.shape.q_len < r.shape.kv_len;
    default:
      return true;
  }
}

void plain_realize(const Recipe& r, Case& c) {
  c.core.scale = softmax_scale(r.shape.key_dim);
  c.core_inputs = gaussian_inputs(r, 1.0);
}

// ---- cancelling_values ----

void cancel_sample(Draw& d, int size, Recipe& r) {
  r.shape = sample_core_shape(d, size);
  r.knobs[0] = d.uniform_int(0, 10);  // values scaled by 2^knob
  r.knobs[1] = d.uniform_int(0, 1);   // keys of a pair perturbed (1) or identical (0)
}

void cancel_realize(const Recipe& r, Case& c) {
  const CoreShape& s = r.shape;
  const Noise n = r.noise();
  c.core.scale = softmax_scale(s.key_dim);
  const double a = std::exp2(r.knobs[0]);
  const double key_jitter = r.knobs[1] == 1 ? 0x1p-10 : 0.0;
  constexpr double kResidual = 0x1p-10;
  CoreInputs& in = c.core_inputs;
  in.q = gaussian_inputs(r, 1.0).q;
  // Key 2m+1 is key 2m (drawn at position 2m) plus a jitter; value 2m+1 is
  // minus value 2m plus a residual; an unpaired last key gets only a residual value.
  in.k = tensor4({s.batch, s.kv_heads, s.kv_len, s.key_dim}, [&](auto b, auto g, auto j, auto d) {
    return n.normal(Stream::k, b, g, j - j % 2, d) +
           (j % 2 == 1 ? key_jitter * n.normal(Stream::k, b, g, j, d, 1) : 0.0);
  });
  in.v = tensor4({s.batch, s.kv_heads, s.kv_len, s.value_dim}, [&](auto b, auto g, auto j, auto d) {
    const double base = to_float32(a * n.normal(Stream::v, b, g, j - j % 2, d));
    const double residual = a * kResidual * n.normal(Stream::v, b, g, j, d, 1);
    if (j % 2 == 0 && j == s.kv_len - 1) return residual;
    return j % 2 == 0 ? base : -base + residual;
  });
}

}  // namespace

std::vector<FamilyImpl> edge_families() {
  std::vector<FamilyImpl> out;
  out.push_back({.name = "format_edges", .sample = sample_plain, .realize = edges_realize});
  out.push_back({.name = "masks",
                 .choose_mask = masks_mask,
                 .sample = masks_sample,
                 .realize = plain_realize,
                 .keeps = masks_keeps,
                 .adversarial_mask = true});
  out.push_back({.name = "cancelling_values", .sample = cancel_sample, .realize = cancel_realize});
  return out;
}

}  // namespace headroom::generate_internal
