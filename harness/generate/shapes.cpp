// headroom — shapes, scales and Gaussian inputs shared by the generator families.
#include <cmath>

#include "recipe.h"

namespace headroom::generate_internal {

std::int64_t size_cap(int size, std::int64_t at_nominal) {
  const std::int64_t v = (static_cast<std::int64_t>(size) * at_nominal + 50) / 100;
  return v < 1 ? 1 : v;
}

namespace {

// A head dim: half the time one of the customary powers of two that fits,
// else any extent up to the cap (odd ones and non-multiples of 8 included).
std::int64_t sample_dim(Draw& d, std::int64_t cap) {
  if (cap >= 8 && d.chance(2)) {
    std::int64_t p = 8;
    const std::int64_t top = cap >= 64 ? 64 : cap;
    std::int64_t choices = 0;
    for (std::int64_t q = 8; q <= top; q *= 2) ++choices;
    for (std::int64_t n = d.uniform(0, choices - 1); n > 0; --n) p *= 2;
    return p;
  }
  return d.uniform(1, cap);
}

}  // namespace

CoreShape sample_core_shape(Draw& d, int size) {
  CoreShape s;
  const std::int64_t len_cap = size_cap(size, 64);
  const std::int64_t dim_cap = size_cap(size, 64);
  s.batch = (size >= 20 && d.chance(3)) ? 2 : 1;
  s.kv_heads = (size >= 30 && d.chance(3)) ? 2 : 1;
  // Groups of 1 (multi-head), 2 or 4 (grouped-query; with Hkv 1, multi-query),
  // keeping Hq ≤ 4 so the reference stays fast.
  const std::int64_t group = size >= 30 ? d.pick<std::int64_t>({1, 1, 2, 4}) : 1;
  s.q_heads = s.kv_heads * group > 4 ? s.kv_heads * 2 : s.kv_heads * group;
  s.kv_len = d.uniform(1, len_cap);
  s.q_len = d.chance(2) ? s.kv_len : d.uniform(1, len_cap);
  s.key_dim = sample_dim(d, dim_cap);
  s.value_dim = d.chance(2) ? s.key_dim : sample_dim(d, dim_cap);
  return s;
}

void sample_plain(Draw& d, int size, Recipe& r) { r.shape = sample_core_shape(d, size); }

float softmax_scale(std::int64_t key_dim, double c) {
  return static_cast<float>(c / std::sqrt(static_cast<double>(key_dim)));
}

CoreInputs gaussian_inputs(const Recipe& r, double sigma) {
  const Noise n = r.noise();
  const CoreShape& s = r.shape;
  CoreInputs in;
  in.q = tensor4({s.batch, s.q_heads, s.q_len, s.key_dim},
                 [&](auto b, auto h, auto t, auto d) { return sigma * n.normal(Stream::q, b, h, t, d); });
  in.k = tensor4({s.batch, s.kv_heads, s.kv_len, s.key_dim},
                 [&](auto b, auto h, auto t, auto d) { return sigma * n.normal(Stream::k, b, h, t, d); });
  in.v = tensor4({s.batch, s.kv_heads, s.kv_len, s.value_dim},
                 [&](auto b, auto h, auto t, auto d) { return sigma * n.normal(Stream::v, b, h, t, d); });
  return in;
}

}  // namespace headroom::generate_internal
