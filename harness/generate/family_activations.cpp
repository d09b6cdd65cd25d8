// headroom — activation-outlier families: outlier_channels, sparse_outliers, massive_activations.
// Documented in families.h; the published figures are cited beside the code using them.
#include <algorithm>
#include <cmath>
#include <numeric>

#include "recipe.h"

namespace headroom::generate_internal {
namespace {

// The `count` channels of [0, dim) with the smallest hashes: fixed for the
// whole case, as reported outlier channels are fixed feature dimensions.
std::vector<std::int64_t> fixed_channels(const Noise& n, Stream s, std::int64_t dim, std::int64_t count) {
  std::vector<std::int64_t> all(static_cast<std::size_t>(dim));
  std::iota(all.begin(), all.end(), 0);
  std::sort(all.begin(), all.end(), [&](std::int64_t a, std::int64_t b) {
    return n.bits(Stream::plan, static_cast<std::int64_t>(s), a) <
           n.bits(Stream::plan, static_cast<std::int64_t>(s), b);
  });
  all.resize(static_cast<std::size_t>(std::min(count, dim)));
  return all;
}

// ---- outlier_channels ----
// Dettmers et al. 2022 (LLM.int8(), §4): outlier features of magnitude ≥ 6 in a
// handful of hidden dimensions; Xiao et al. 2023 (SmoothQuant, §3): activation
// outliers ≈ 100× typical, concentrated in fixed channels.

void outlier_sample(Draw& d, int size, Recipe& r) {
  r.shape = sample_core_shape(d, size);
  r.knobs[0] = d.uniform_int(0, 3);  // 1..4 channels
  r.knobs[1] = d.uniform_int(0, 8);  // levels up to 6·(100/6)^(knob/8)
}

void outlier_channels_into(const Recipe& r, Tensor& t, Stream s) {
  const Noise n = r.noise();
  const std::int64_t dim = t.shape[3];
  for (std::int64_t c : fixed_channels(n, s, dim, 1 + r.knobs[0])) {
    // Level in [6, 100] (knob 8) and a fixed sign per channel; each entry at
    // level·(1 + u/2), u in (0, 1), so every entry has magnitude ≥ 6.
    const double level =
        6.0 * std::pow(100.0 / 6.0, n.unit(Stream::plan, static_cast<std::int64_t>(s), c, 1) * r.knobs[1] / 8.0);
    const double sign = (n.bits(Stream::plan, static_cast<std::int64_t>(s), c, 2) & 1) ? -1.0 : 1.0;
    for (std::int64_t b = 0; b < t.shape[0]; ++b)
      for (std::int64_t h = 0; h < t.shape[1]; ++h)
        for (std::int64_t j = 0; j < t.shape[2]; ++j)
          t.at(b, h, j, c) = to_float32(sign * level * (1.0 + 0.5 * n.uniform(0.0, 1.0, s, b, h, j, c)));
  }
}

void outlier_realize(const Recipe& r, Case& c) {
  c.core.scale = softmax_scale(r.shape.key_dim);
  c.core_inputs = gaussian_inputs(r, 1.0);
  outlier_channels_into(r, c.core_inputs.k, Stream::k);
  outlier_channels_into(r, c.core_inputs.v, Stream::v);
}

// ---- sparse_outliers ----
// Shah et al. 2024 (FlashAttention-3, §4.3): entries N(0,1) + N(0,100)·Bernoulli(0.001).
// We read N(0,100) as variance 100 (standard deviation 10), the usual N(μ, σ²)
// notation — recalled from memory, not re-read.
constexpr double kOutlierRate = 0.001;
constexpr double kOutlierSigma = 10.0;

void sparse_into(const Recipe& r, Tensor& t, Stream s) {
  const Noise n = r.noise();
  bool any = false;
  for (std::int64_t b = 0; b < t.shape[0]; ++b)
    for (std::int64_t h = 0; h < t.shape[1]; ++h)
      for (std::int64_t j = 0; j < t.shape[2]; ++j)
        for (std::int64_t d = 0; d < t.shape[3]; ++d)
          if (n.unit(s, b, h, j, d, 7) < kOutlierRate) {
            t.at(b, h, j, d) = to_float32(t.at(b, h, j, d) + kOutlierSigma * n.normal(s, b, h, j, d, 4));
            any = true;
          }
  if (any) return;
  // Our departure from the published recipe: a small tensor that drew no
  // outlier gets one, at a hashed position, so every case exercises one.
  const std::int64_t at = n.index(t.size(), Stream::plan, static_cast<std::int64_t>(s), -5);
  const std::int64_t d = at % t.shape[3], j = at / t.shape[3] % t.shape[2];
  const std::int64_t h = at / (t.shape[3] * t.shape[2]) % t.shape[1], b = at / (t.shape[3] * t.shape[2] * t.shape[1]);
  t.at(b, h, j, d) = to_float32(t.at(b, h, j, d) + kOutlierSigma * n.normal(s, b, h, j, d, 4));
}

void sparse_realize(const Recipe& r, Case& c) {
  c.core.scale = softmax_scale(r.shape.key_dim);
  c.core_inputs = gaussian_inputs(r, 1.0);
  sparse_into(r, c.core_inputs.q, Stream::q);
  sparse_into(r, c.core_inputs.k, Stream::k);
  sparse_into(r, c.core_inputs.v, Stream::v);
}

// ---- massive_activations ----
// Sun et al. 2024 ("Massive Activations in Large Language Models", §2): a few
// activations up to 10^4–10^5 times the typical one, in very few fixed
// dimensions, on the first token (and delimiters); §3: they act as biases and
// draw attention sinks. Typical entries here are 0.5·N(0,1); the largest
// massive entry 10^5·0.5 = 5·10^4 stays below binary16's 65504.
constexpr double kTypical = 0.5;

void massive_sample(Draw& d, int size, Recipe& r) {
  r.shape = sample_core_shape(d, size);
  r.knobs[0] = d.uniform_int(0, 8);  // ratio 10^(4 + knob/8)
  r.knobs[1] = d.uniform_int(0, 1);  // 1 or 2 channels
}

void massive_into(const Recipe& r, Tensor& t, Stream channel_stream) {
  const Noise n = r.noise();
  const double ratio = std::pow(10.0, 4.0 + r.knobs[0] / 8.0);
  for (std::int64_t c : fixed_channels(n, channel_stream, t.shape[3], 1 + r.knobs[1])) {
    const double sign = (n.bits(Stream::plan, static_cast<std::int64_t>(channel_stream), c, 3) & 1) ? -1.0 : 1.0;
    for (std::int64_t b = 0; b < t.shape[0]; ++b)
      for (std::int64_t h = 0; h < t.shape[1]; ++h) t.at(b, h, 0, c) = to_float32(sign * ratio * kTypical);
  }
}

void massive_realize(const Recipe& r, Case& c) {
  c.core.scale = softmax_scale(r.shape.key_dim);
  c.core_inputs = gaussian_inputs(r, kTypical);
  // Q and K share their massive channels (one hidden state feeds both); V has its own.
  massive_into(r, c.core_inputs.q, Stream::k);
  massive_into(r, c.core_inputs.k, Stream::k);
  massive_into(r, c.core_inputs.v, Stream::v);
}

}  // namespace

std::vector<FamilyImpl> activation_families() {
  std::vector<FamilyImpl> out;
  out.push_back({.name = "outlier_channels", .sample = outlier_sample, .realize = outlier_realize});
  out.push_back({.name = "sparse_outliers", .sample = sample_plain, .realize = sparse_realize});
  out.push_back({.name = "massive_activations", .sample = massive_sample, .realize = massive_realize});
  return out;
}

}  // namespace headroom::generate_internal
