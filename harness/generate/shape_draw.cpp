// headroom — production-sized shapes drawn at random (shape_draw.h).
#include "headroom/shape_draw.h"

#include <algorithm>
#include <cmath>

#include "recipe.h"
#include "suite_builder.h"

namespace headroom {
namespace {

using generate_internal::Draw;

// Streams of their own, so a request's values (drawn from rc::Random(seed)) and its shape are independent.
constexpr std::uint64_t kShapeStream = 0x5ea5'0a11'7e57'0001ULL;
constexpr std::uint64_t kChoiceStream = 0x5ea5'0a11'7e57'0002ULL;

// A length near `around` (≥ 1): a tile multiple, or a tile multiple ± 1..7, with even odds.
std::int64_t tiled_length(Draw& d, std::int64_t around) {
  const std::int64_t t = d.pick<std::int64_t>({kTileWidths[0], kTileWidths[1], kTileWidths[2], kTileWidths[3],
                                               kTileWidths[4]});
  const std::int64_t whole = std::max<std::int64_t>(1, around / t) * t;
  if (d.chance(2)) return whole;
  const std::int64_t off = d.uniform(1, 7);
  return d.chance(2) ? whole + off : whole - off;  // whole ≥ 8, a multiple of 8: neither is
}

std::int64_t largest_tensor(const CoreShape& s) {
  return std::max({s.batch * s.q_heads * s.q_len * std::max(s.key_dim, s.value_dim),
                   s.batch * s.kv_heads * s.kv_len * std::max(s.key_dim, s.value_dim)});
}

}  // namespace

CoreShape draw_production_shape(std::uint64_t seed, std::int64_t max_kv_len) {
  Draw d(rc::Random(seed ^ kShapeStream));
  using generate_internal::kGroups;
  using generate_internal::kHeadDims;
  CoreShape s;
  const auto [dk, dv] = kHeadDims[static_cast<std::size_t>(d.uniform(0, std::ssize(kHeadDims) - 1))];
  const auto [hq, hkv] = kGroups[static_cast<std::size_t>(d.uniform(0, std::ssize(kGroups) - 1))];
  s.key_dim = dk;
  s.value_dim = dv;
  s.q_heads = hq;
  s.kv_heads = hkv;
  s.batch = d.pick<std::int64_t>({1, 2, 4, 8});
  // Log-uniform in [16, max]: as many lengths between 256 and 512 as between 4096 and 8192.
  const double octaves = std::log2(static_cast<double>(max_kv_len) / 16.0);
  const double at = 16.0 * std::exp2(octaves * static_cast<double>(d.uniform(0, 1 << 20)) / double(1 << 20));
  s.kv_len = tiled_length(d, static_cast<std::int64_t>(at));
  s.q_len = d.chance(3) ? 1 : tiled_length(d, d.uniform(1, std::min<std::int64_t>(s.kv_len, 256)));
  constexpr std::int64_t kElements = std::int64_t{1} << 22, kScores = std::int64_t{1} << 24;
  auto scores = [&] { return s.batch * s.q_heads * s.q_len * s.kv_len; };
  auto over = [&] { return largest_tensor(s) > kElements || scores() > kScores; };
  while (over() && s.batch > 1) s.batch /= 2;
  while (over() && s.kv_heads > 1) s.q_heads /= 2, s.kv_heads /= 2;
  while (scores() > kScores && s.q_len > 1) s.q_len /= 2;
  return s;
}

bool draws_production_shape(std::uint64_t seed) { return Draw(rc::Random(seed ^ kChoiceStream)).chance(2); }

bool takes_any_shape(std::string_view family) {
  return std::find(std::begin(generate_internal::kShapeFamilies), std::end(generate_internal::kShapeFamilies),
                   family) != std::end(generate_internal::kShapeFamilies);
}

}  // namespace headroom
