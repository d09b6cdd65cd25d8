// headroom — upstream gradients dO (upstream_gradient.h).
#include "headroom/upstream_gradient.h"

#include <cmath>
#include <string>

#include "values.h"

namespace headroom {

using generate_internal::Noise;
using generate_internal::Stream;

std::string_view upstream_kind_name(UpstreamKind k) {
  switch (k) {
    case UpstreamKind::gaussian: return "gaussian";
    case UpstreamKind::heavy_tailed: return "heavy_tailed";
    case UpstreamKind::one_hot: return "one_hot";
    case UpstreamKind::large: return "large";
  }
  return "gaussian";
}

std::optional<UpstreamKind> parse_upstream_kind(std::string_view name) {
  for (UpstreamKind k : kUpstreamKinds)
    if (upstream_kind_name(k) == name) return k;
  return std::nullopt;
}

Tensor upstream_gradient(const CoreShape& s, UpstreamKind kind, std::uint64_t seed) {
  const Noise noise(seed, 24);
  const std::vector<std::int64_t> shape{s.batch, s.q_heads, s.q_len, s.value_dim};
  switch (kind) {
    case UpstreamKind::gaussian:
      return generate_internal::tensor4(
          shape, [&](std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t d) {
            return noise.normal(Stream::d_o, b, h, i, d);
          });
    case UpstreamKind::heavy_tailed:
      // Student's t, ν = 3: Z / sqrt(χ²₃/3), the χ² from three more normals.
      return generate_internal::tensor4(shape, [&](std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t d) {
        double chi2 = 0;
        for (std::uint64_t pair = 1; pair <= 3; ++pair) {
          const double z = noise.normal(Stream::d_o, b, h, i, d, pair);
          chi2 += z * z;
        }
        return noise.normal(Stream::d_o, b, h, i, d) / std::sqrt(std::max(chi2, 1e-12) / 3.0);
      });
    case UpstreamKind::one_hot:
      return generate_internal::tensor4(shape, [&](std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t d) {
        // The hot channel is drawn per row in [0, 2^20) and reduced modulo Dv, so
        // shrinking Dv keeps a row one-hot.
        const std::int64_t hot = noise.index(std::int64_t{1} << 20, Stream::d_o, b, h, i, 0, 1) % s.value_dim;
        if (d != hot) return 0.0;
        return (noise.bits(Stream::d_o, b, h, i, 0, 2) & 1) != 0 ? 1.0 : -1.0;
      });
    case UpstreamKind::large:
      return generate_internal::tensor4(shape, [&](std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t d) {
        return 4096.0 * noise.normal(Stream::d_o, b, h, i, d);
      });
  }
  return {};
}

namespace {
std::uint64_t name_seed(const Case& c) {
  std::uint64_t seed = 0x6a09e667f3bcc908ULL;  // FNV-1a style fold of the name through mix64
  for (char ch : c.name) seed = generate_internal::mix64(seed ^ static_cast<unsigned char>(ch));
  return seed;
}
}  // namespace

Tensor upstream_gradient_for(const Case& c) {
  if (!c.d_o.values.empty()) return c.d_o;
  const std::uint64_t seed = name_seed(c);
  return upstream_gradient(c.core.shape, kUpstreamKinds[seed % 4], seed);
}

UpstreamKind upstream_kind_for(const Case& c) { return kUpstreamKinds[name_seed(c) % 4]; }

}  // namespace headroom
