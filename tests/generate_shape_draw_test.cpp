// headroom — production shapes drawn for hunt (shape_draw.h): deterministic,
// covering the suites' head dims and groups, lengths tile multiples as often as
// not, log-uniform in Tk, valid and bounded in size.
#include <gtest/gtest.h>

#include <algorithm>
#include <set>
#include <utility>

#include "headroom/generate.h"
#include "headroom/shape_draw.h"

namespace headroom {
namespace {

constexpr int kDraws = 3000;

TEST(GenerateShapeDraw, SameSeedSameShape) {
  for (std::uint64_t seed : {1u, 2u, 77u}) {
    const CoreShape a = draw_production_shape(seed, 16384), b = draw_production_shape(seed, 16384);
    EXPECT_EQ(std::make_tuple(a.batch, a.q_heads, a.kv_heads, a.q_len, a.kv_len, a.key_dim, a.value_dim),
              std::make_tuple(b.batch, b.q_heads, b.kv_heads, b.q_len, b.kv_len, b.key_dim, b.value_dim));
  }
}

TEST(GenerateShapeDraw, ReachesProductionShapes) {
  std::set<std::pair<std::int64_t, std::int64_t>> dims;
  std::set<std::int64_t> groups, batches;
  std::int64_t longest = 0;
  int octave_8 = 0, octave_12 = 0, decode = 0;
  bool group8_over_heads = false;
  for (int i = 0; i < kDraws; ++i) {
    const CoreShape s = draw_production_shape(static_cast<std::uint64_t>(i), 16384);
    dims.insert({s.key_dim, s.value_dim});
    groups.insert(s.q_heads / s.kv_heads);
    group8_over_heads |= s.q_heads / s.kv_heads == 8 && s.kv_heads > 1;
    batches.insert(s.batch);
    longest = std::max(longest, s.kv_len);
    EXPECT_LE(s.kv_len, 16384 + 7);
    EXPECT_GE(s.kv_len, 1);
    EXPECT_LE(s.q_len, 263);
    octave_8 += s.kv_len >= 256 && s.kv_len < 512;
    octave_12 += s.kv_len >= 4096 && s.kv_len < 8192;
    decode += s.q_len == 1;
    // Each tensor ≤ 2^22 elements once batch and heads are down to one.
    const std::int64_t d = std::max(s.key_dim, s.value_dim);
    if (s.batch > 1 || s.kv_heads > 1) {
      EXPECT_LE(s.batch * s.kv_heads * s.kv_len * d, std::int64_t{1} << 22);
      EXPECT_LE(s.batch * s.q_heads * s.q_len * d, std::int64_t{1} << 22);
    }
    if (s.q_len > 1) {
      EXPECT_LE(s.batch * s.q_heads * s.q_len * s.kv_len, std::int64_t{1} << 24);
    }
    // A valid request: case_outline checks it as make_case does.
    CaseRequest r;
    r.family = "gaussian";
    r.seed = 1;
    r.shape = s;
    EXPECT_NO_THROW(case_outline(r));
  }
  EXPECT_EQ(dims.size(), 8u) << "every head dim pair of the suites (64 ... 256, 192/128, 128/64)";
  EXPECT_EQ(groups, (std::set<std::int64_t>{1, 2, 4, 8, 16}));
  EXPECT_TRUE(group8_over_heads);
  EXPECT_EQ(batches, (std::set<std::int64_t>{1, 2, 4, 8}));
  EXPECT_GT(longest, 8192);
  // Log-uniform: one octave as likely as another (~1/10 of draws each; 4 sigma ≈ 0.02).
  EXPECT_NEAR(octave_8 / double(kDraws), octave_12 / double(kDraws), 0.04);
  EXPECT_NEAR(decode / double(kDraws), 1.0 / 3.0, 0.04);
}

// Key lengths a tile does not divide are drawn as often as tile multiples;
// the others are k·t ± 1..7, a multiple of no tile (not even of 8).
TEST(GenerateShapeDraw, LengthsOffTheTileAsOftenAsOn) {
  int off = 0, lengths = 0;
  for (int i = 0; i < kDraws; ++i) {
    const std::int64_t n = draw_production_shape(static_cast<std::uint64_t>(i), 65536).kv_len;
    ++lengths;
    if (n % 8 != 0) {
      ++off;
      for (std::int64_t t : kTileWidths) EXPECT_NE(n % t, 0);
    }
  }
  EXPECT_NEAR(off / double(lengths), 0.5, 0.04) << off << " of " << lengths;
}

}  // namespace
}  // namespace headroom
