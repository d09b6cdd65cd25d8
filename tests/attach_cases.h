// headroom tests — small core and block cases for the attach tests, built by hand.
#pragma once

#include <cmath>
#include <cstdint>
#include <limits>
#include <random>
#include <string>

#include "headroom/case.h"

namespace headroom::testing {

inline Tensor random_tensor(std::vector<std::int64_t> shape, std::mt19937& rng, double spread = 1.0) {
  Tensor t(std::move(shape));
  std::normal_distribution<double> n(0.0, spread);
  // float32-exact source values, as a generator would ship them
  for (double& v : t.values) v = static_cast<float>(n(rng));
  return t;
}

/// Returns: a core case of shape s with mask kind `kind`; every query row keeps
/// at least one visible key unless `allow_empty_rows`.
inline Case core_case(CoreShape s, MaskKind kind, std::uint32_t seed, bool allow_empty_rows = false) {
  std::mt19937 rng(seed);
  Case c;
  c.name = "attach_case_" + std::to_string(seed);
  c.level = Level::core;
  c.core.shape = s;
  c.core.scale = static_cast<float>(1.0 / std::sqrt(static_cast<double>(s.key_dim)));
  c.core.mask.kind = kind;
  c.core_inputs.q = random_tensor({s.batch, s.q_heads, s.q_len, s.key_dim}, rng);
  c.core_inputs.k = random_tensor({s.batch, s.kv_heads, s.kv_len, s.key_dim}, rng);
  c.core_inputs.v = random_tensor({s.batch, s.kv_heads, s.kv_len, s.value_dim}, rng);
  std::uniform_int_distribution<std::int64_t> len(allow_empty_rows ? 0 : 1, s.kv_len);
  std::bernoulli_distribution coin(0.6);
  switch (kind) {
    case MaskKind::key_padding:
      for (std::int64_t b = 0; b < s.batch; ++b) c.core.mask.key_lengths.push_back(len(rng));
      break;
    case MaskKind::dense:
      c.core.mask.allowed = Tensor({s.batch, 1, s.q_len, s.kv_len});
      for (std::size_t i = 0; i < c.core.mask.allowed.values.size(); ++i) {
        // key 0 always visible keeps rows non-empty
        const bool first = i % static_cast<std::size_t>(s.kv_len) == 0;
        c.core.mask.allowed.values[i] = (coin(rng) || (first && !allow_empty_rows)) ? 1.0 : 0.0;
      }
      break;
    case MaskKind::bias: {
      c.core.mask.bias = random_tensor({s.batch, s.q_heads, s.q_len, s.kv_len}, rng, 2.0);
      auto& b = c.core.mask.bias.values;
      for (std::size_t i = 0; i < b.size(); ++i) {
        if (i % static_cast<std::size_t>(s.kv_len) != 0 && !coin(rng)) b[i] = -std::numeric_limits<double>::infinity();
      }
      break;
    }
    default: break;
  }
  return c;
}

/// Returns: a block case (biases present when `biases`).
inline Case block_case(BlockShape s, std::uint32_t seed, bool biases) {
  std::mt19937 rng(seed);
  Case c;
  c.name = "attach_block_" + std::to_string(seed);
  c.level = Level::block;
  c.block.shape = s;
  c.block.scale = static_cast<float>(1.0 / std::sqrt(static_cast<double>(s.key_dim)));
  BlockInputs& in = c.block_inputs;
  in.x_q = random_tensor({s.batch, s.q_len, s.model_dim}, rng);
  in.x_kv = random_tensor({s.batch, s.kv_len, s.model_dim}, rng);
  in.w_q = random_tensor({s.model_dim, s.q_heads * s.key_dim}, rng, 0.3);
  in.w_k = random_tensor({s.model_dim, s.kv_heads * s.key_dim}, rng, 0.3);
  in.w_v = random_tensor({s.model_dim, s.kv_heads * s.value_dim}, rng, 0.3);
  in.w_o = random_tensor({s.q_heads * s.value_dim, s.model_dim}, rng, 0.3);
  if (biases) {
    in.b_q = random_tensor({s.q_heads * s.key_dim}, rng, 0.1);
    in.b_k = random_tensor({s.kv_heads * s.key_dim}, rng, 0.1);
    in.b_v = random_tensor({s.kv_heads * s.value_dim}, rng, 0.1);
    in.b_o = random_tensor({s.model_dim}, rng, 0.1);
  }
  return c;
}

}  // namespace headroom::testing
