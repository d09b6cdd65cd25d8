// headroom — test helpers for the reference: small random problems with exact values.
#pragma once

#include <cmath>
#include <cstdint>
#include <random>
#include <vector>

#include "headroom/problem.h"
#include "headroom/reference.h"
#include "headroom/tensor.h"

namespace headroom::testing {

/// A tensor of the given shape with N(0, sigma²) values rounded to float32
/// (so every value, and every product of two, is exact in double).
inline Tensor gaussian(std::vector<std::int64_t> shape, std::mt19937_64& rng, double sigma = 1.0) {
  Tensor t(std::move(shape));
  std::normal_distribution<double> dist(0.0, sigma);
  for (double& x : t.values) x = static_cast<float>(dist(rng));
  return t;
}

struct CoreCase {
  CoreProblem problem;
  CoreInputs inputs;
};

/// A core case of the given shape, unmasked, scale 1/sqrt(Dk) as float32.
inline CoreCase random_core(const CoreShape& s, std::uint64_t seed, double sigma = 1.0) {
  std::mt19937_64 rng(seed);
  CoreCase c;
  c.problem.shape = s;
  c.problem.scale = static_cast<float>(1.0 / std::sqrt(static_cast<double>(s.key_dim)));
  c.inputs.q = gaussian({s.batch, s.q_heads, s.q_len, s.key_dim}, rng, sigma);
  c.inputs.k = gaussian({s.batch, s.kv_heads, s.kv_len, s.key_dim}, rng, sigma);
  c.inputs.v = gaussian({s.batch, s.kv_heads, s.kv_len, s.value_dim}, rng, sigma);
  return c;
}

struct BlockCase {
  BlockProblem problem;
  BlockInputs inputs;
};

/// A block case of the given shape with Gaussian float32 inputs and weights
/// scaled by 1/sqrt(Dm), biases when `biases`, unmasked, scale 1/sqrt(Dk).
inline BlockCase random_block(const BlockShape& s, std::uint64_t seed, bool biases) {
  std::mt19937_64 rng(seed);
  BlockCase c;
  c.problem.shape = s;
  c.problem.scale = static_cast<float>(1.0 / std::sqrt(static_cast<double>(s.key_dim)));
  const double w = 1.0 / std::sqrt(static_cast<double>(s.model_dim));
  BlockInputs& in = c.inputs;
  in.x_q = gaussian({s.batch, s.q_len, s.model_dim}, rng);
  in.x_kv = gaussian({s.batch, s.kv_len, s.model_dim}, rng);
  in.w_q = gaussian({s.model_dim, s.q_heads * s.key_dim}, rng, w);
  in.w_k = gaussian({s.model_dim, s.kv_heads * s.key_dim}, rng, w);
  in.w_v = gaussian({s.model_dim, s.kv_heads * s.value_dim}, rng, w);
  in.w_o = gaussian({s.q_heads * s.value_dim, s.model_dim}, rng, w);
  if (biases) {
    in.b_q = gaussian({s.q_heads * s.key_dim}, rng, 0.1);
    in.b_k = gaussian({s.kv_heads * s.key_dim}, rng, 0.1);
    in.b_v = gaussian({s.kv_heads * s.value_dim}, rng, 0.1);
    in.b_o = gaussian({s.model_dim}, rng, 0.1);
  }
  return c;
}

/// Returns: whether |a − b| ≤ bound_a + bound_b + 2^-53(|a| + |b|) for every
/// element (the two double outputs enclose the same exact value), NaN only
/// where both are NaN; `worst` receives the largest ratio of difference to
/// allowance seen.
inline bool enclose_same(const Tensor& a, const Tensor& bound_a, const Tensor& b, const Tensor& bound_b,
                         double* worst = nullptr) {
  if (a.shape != b.shape) return false;
  double w = 0;
  bool ok = true;
  for (std::size_t i = 0; i < a.values.size(); ++i) {
    const double x = a.values[i], y = b.values[i];
    if (std::isnan(x) || std::isnan(y)) {
      ok = ok && std::isnan(x) && std::isnan(y);
      continue;
    }
    const double allow = bound_a.values[i] + bound_b.values[i] + 0x1p-53 * (std::fabs(x) + std::fabs(y)) + 0x1p-1074;
    const double diff = std::fabs(x - y);
    w = std::max(w, diff / allow);
    ok = ok && diff <= allow;
  }
  if (worst != nullptr) *worst = w;
  return ok;
}

}  // namespace headroom::testing
