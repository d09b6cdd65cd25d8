// headroom — baseline and shape families: gaussian, long_sequence, tile_edges, ragged, block_gaussian.
// Their documentation is their FamilyInfo entry (families.h).
#include <algorithm>
#include <array>
#include <cmath>

#include "recipe.h"

namespace headroom::generate_internal {
namespace {

// Knob code → exponent: 0, −1, 1, −2, 2, ... so shrinking towards 0 moves the
// scale towards the customary 1/sqrt(Dk).
int sweep_exponent(int code) { return (code + 1) / 2 * (code % 2 == 1 ? -1 : 1); }

// ---- gaussian: the baseline, Vaswani et al. 2017 §3.2.1 scale times 2^k ----

MaskKind gaussian_mask(Draw& d) {
  return d.pick({MaskKind::none, MaskKind::none, MaskKind::none, MaskKind::causal_top_left,
                 MaskKind::causal_bottom_right, MaskKind::key_padding});
}

void gaussian_sample(Draw& d, int size, Recipe& r) {
  r.shape = sample_core_shape(d, size);
  r.knobs[0] = d.uniform_int(0, 6);  // c = 2^k, k in [−3, 3]
}

void gaussian_realize(const Recipe& r, Case& c) {
  c.core.scale = softmax_scale(r.shape.key_dim, std::exp2(sweep_exponent(r.knobs[0])));
  c.core_inputs = gaussian_inputs(r, 1.0);
}

// ---- long_sequence ----

MaskKind long_mask(Draw& d) { return d.pick({MaskKind::none, MaskKind::causal_bottom_right}); }

void long_sample(Draw& d, int size, Recipe& r) {
  r.shape = CoreShape{};
  r.shape.kv_len = d.uniform(128, 128 + 9 * static_cast<std::int64_t>(size));
  r.shape.q_len = d.uniform(1, 4);
  r.shape.key_dim = d.pick<std::int64_t>({16, 32, 64});
  r.shape.value_dim = r.shape.key_dim;
  r.knobs[0] = d.uniform_int(0, 2);  // c in {1, 1/2, 2}
}

// ---- tile_edges: lengths 1, t−1, t, t+1, 2t±1 for t in 16, 32, 64, 128 ----

constexpr std::array<std::int64_t, 15> kTileLengths{1, 15, 16, 17, 31, 32, 33, 63, 64, 65, 127, 128, 129, 255, 257};
// Head dims that are not multiples of 8: vector tails of 1..7 lanes.
constexpr std::array<std::int64_t, 13> kOddDims{1, 3, 5, 7, 12, 15, 17, 20, 31, 33, 36, 63, 65};

std::span<const std::int64_t> tile_menu() { return kTileLengths; }

// The lengths belonging to tiles t ≤ t_max.
std::vector<std::int64_t> tile_lengths_upto(std::int64_t t_max) {
  std::vector<std::int64_t> out{1};
  for (std::int64_t t = 16; t <= t_max; t *= 2)
    for (std::int64_t n : {t - 1, t, t + 1, 2 * t - 1, 2 * t + 1}) out.push_back(n);
  std::sort(out.begin(), out.end());
  out.erase(std::unique(out.begin(), out.end()), out.end());
  return out;
}

void tile_sample(Draw& d, int size, Recipe& r) {
  const std::int64_t t_max = size < 25 ? 16 : size < 50 ? 32 : size < 75 ? 64 : 128;
  const std::vector<std::int64_t> lengths = tile_lengths_upto(t_max);
  auto pick_from = [&](const std::vector<std::int64_t>& v) {
    return v[static_cast<std::size_t>(d.uniform(0, static_cast<std::int64_t>(v.size()) - 1))];
  };
  std::vector<std::int64_t> short_lengths;
  for (std::int64_t n : lengths)
    if (n <= 65) short_lengths.push_back(n);
  r.shape = CoreShape{};
  r.shape.kv_len = pick_from(lengths);
  // Queries: a short tile length (keeps the reference quick), or Tk itself
  // when that is at most 129.
  r.shape.q_len = (r.shape.kv_len <= 129 && d.chance(3)) ? r.shape.kv_len : pick_from(short_lengths);
  std::vector<std::int64_t> dims;
  for (std::int64_t n : kOddDims)
    if (n <= std::max<std::int64_t>(size_cap(size, 65), 1)) dims.push_back(n);
  r.shape.key_dim = pick_from(dims);
  r.shape.value_dim = d.chance(2) ? r.shape.key_dim : pick_from(dims);
  r.shape.q_heads = size >= 50 && d.chance(3) ? 2 : 1;
}

bool tile_keeps(const Recipe& r) {
  auto listed = [](std::int64_t n) {
    return std::find(kTileLengths.begin(), kTileLengths.end(), n) != kTileLengths.end();
  };
  return listed(r.shape.q_len) && listed(r.shape.kv_len);
}

// ---- ragged: Tq ≠ Tk ----

MaskKind ragged_mask(Draw& d) {
  return d.pick({MaskKind::none, MaskKind::causal_top_left, MaskKind::causal_bottom_right});
}

void ragged_sample(Draw& d, int size, Recipe& r) {
  r.shape = sample_core_shape(d, size);
  const std::int64_t cap = std::max<std::int64_t>(size_cap(size, 64), 2);
  r.shape.kv_len = d.uniform(1, cap);
  r.shape.q_len = d.uniform(1, cap - 1);
  if (r.shape.q_len >= r.shape.kv_len) ++r.shape.q_len;
}

bool ragged_keeps(const Recipe& r) { return r.shape.q_len != r.shape.kv_len; }

// ---- block_gaussian: Vaswani et al. 2017 §3.2.2 ----

MaskKind block_mask(Draw& d) {
  return d.pick({MaskKind::none, MaskKind::none, MaskKind::causal_top_left, MaskKind::key_padding});
}

void block_sample(Draw& d, int size, Recipe& r) {
  CoreShape& s = r.shape;
  s = CoreShape{};
  s.batch = size >= 20 && d.chance(3) ? 2 : 1;
  s.kv_heads = size >= 30 && d.chance(3) ? 2 : 1;
  s.q_heads = s.kv_heads * (size >= 30 ? d.pick<std::int64_t>({1, 2}) : 1);
  const std::int64_t len_cap = size_cap(size, 32);
  s.kv_len = d.uniform(1, len_cap);
  s.q_len = d.chance(2) ? s.kv_len : d.uniform(1, len_cap);
  const std::int64_t dim_cap = size_cap(size, 16);
  s.key_dim = d.uniform(1, dim_cap);
  s.value_dim = d.chance(2) ? s.key_dim : d.uniform(1, dim_cap);
  // Dm = Hq·Dk as in the paper's base model half the time, else anything.
  r.model_dim = d.chance(2) ? s.q_heads * s.key_dim : d.uniform(1, size_cap(size, 64));
  r.knobs[0] = d.uniform_int(0, 1);  // biases present
  r.knobs[1] = d.uniform_int(0, 1);  // self-attention when Tq = Tk
}

// A [rows, cols] matrix σ·N(0,1), float32, drawn from stream s.
Tensor matrix(const Noise& n, Stream s, std::int64_t rows, std::int64_t cols, double sigma) {
  Tensor t({rows, cols});
  for (std::int64_t i = 0; i < rows; ++i)
    for (std::int64_t j = 0; j < cols; ++j)
      t.values[static_cast<std::size_t>(i * cols + j)] = to_float32(sigma * n.normal(s, i, j));
  return t;
}

Tensor vector_or_absent(const Noise& n, Stream s, std::int64_t len, bool present) {
  if (!present) return Tensor{};
  Tensor t({len});
  for (std::int64_t i = 0; i < len; ++i) t.values[static_cast<std::size_t>(i)] = to_float32(0.1 * n.normal(s, i));
  return t;
}

void block_realize(const Recipe& r, Case& c) {
  const Noise n = r.noise();
  const CoreShape& s = r.shape;
  const std::int64_t dm = r.model_dim;
  BlockInputs& in = c.block_inputs;
  c.block.scale = softmax_scale(s.key_dim);
  in.x_q = tensor3({s.batch, s.q_len, dm}, [&](auto b, auto t, auto m) { return n.normal(Stream::x_q, b, t, m); });
  const bool self = r.knobs[1] == 1 && s.q_len == s.kv_len;
  in.x_kv =
      self ? in.x_q
           : tensor3({s.batch, s.kv_len, dm}, [&](auto b, auto t, auto m) { return n.normal(Stream::x_kv, b, t, m); });
  // Variance-preserving weights: each output sums fan-in products of unit
  // variance, so N(0, 1/fan-in) keeps activations O(1) (common practice).
  const double in_sigma = 1.0 / std::sqrt(static_cast<double>(dm));
  const double out_sigma = 1.0 / std::sqrt(static_cast<double>(s.q_heads * s.value_dim));
  in.w_q = matrix(n, Stream::w_q, dm, s.q_heads * s.key_dim, in_sigma);
  in.w_k = matrix(n, Stream::w_k, dm, s.kv_heads * s.key_dim, in_sigma);
  in.w_v = matrix(n, Stream::w_v, dm, s.kv_heads * s.value_dim, in_sigma);
  in.w_o = matrix(n, Stream::w_o, s.q_heads * s.value_dim, dm, out_sigma);
  const bool biases = r.knobs[0] == 1;
  in.b_q = vector_or_absent(n, Stream::b_q, s.q_heads * s.key_dim, biases);
  in.b_k = vector_or_absent(n, Stream::b_k, s.kv_heads * s.key_dim, biases);
  in.b_v = vector_or_absent(n, Stream::b_v, s.kv_heads * s.value_dim, biases);
  in.b_o = vector_or_absent(n, Stream::b_o, dm, biases);
}

}  // namespace

std::vector<FamilyImpl> baseline_families() {
  std::vector<FamilyImpl> out;
  out.push_back(
      {.name = "gaussian", .choose_mask = gaussian_mask, .sample = gaussian_sample, .realize = gaussian_realize});
  out.push_back(
      {.name = "long_sequence", .choose_mask = long_mask, .sample = long_sample, .realize = gaussian_realize});
  out.push_back({.name = "tile_edges",
                 .sample = tile_sample,
                 .realize = gaussian_realize,
                 .keeps = tile_keeps,
                 .length_menu = tile_menu});
  out.push_back({.name = "ragged",
                 .choose_mask = ragged_mask,
                 .sample = ragged_sample,
                 .realize = gaussian_realize,
                 .keeps = ragged_keeps});
  out.push_back(
      {.name = "block_gaussian", .choose_mask = block_mask, .sample = block_sample, .realize = block_realize});
  return out;
}

}  // namespace headroom::generate_internal
