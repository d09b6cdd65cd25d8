// headroom — each generator family's defining property, checked on the cases it makes.
#include <gtest/gtest.h>

#include <algorithm>
#include <cmath>
#include <limits>
#include <set>
#include <string>

#include "generate_support.h"
#include "headroom/suite.h"

namespace headroom {
namespace {

using namespace headroom::test;

// ---------------------------------------------------------------- defining properties

TEST(GenerateProperty, GaussianSweepsTheScale) {
  std::set<double> factors;
  for (std::uint64_t seed = 0; seed < 60; ++seed) {
    const Case c = make_case(request("gaussian", seed, 30));
    const double f = static_cast<double>(c.core.scale) * std::sqrt(static_cast<double>(c.core.shape.key_dim));
    const double k = std::round(std::log2(f));
    EXPECT_NEAR(f, std::exp2(k), 1e-6 * f);
    EXPECT_LE(std::fabs(k), 3);
    factors.insert(k);
  }
  EXPECT_EQ(factors.size(), 7u);
}

TEST(GenerateProperty, LargeLogitsOverflowFloat32Exp) {
  // exp overflows float32 past ln(2^128) ≈ 88.72 (IEEE 754-2019 Table 3.5 max).
  for (std::uint64_t seed = 0; seed < 30; ++seed) {
    const Case c = make_case(request("large_logits", seed, 30));
    const CoreShape& s = shape_of(c);
    double top = -INFINITY;
    std::int64_t above_half = 0;
    for (std::int64_t b = 0; b < s.batch; ++b)
      for (std::int64_t h = 0; h < s.q_heads; ++h)
        for (std::int64_t i = 0; i < s.q_len; ++i)
          for (std::int64_t j = 0; j < s.kv_len; ++j) {
            const double z = score(c, b, h, i, j);
            top = std::max(top, z);
            above_half += std::fabs(z) > std::log(65504.0);
          }
    EXPECT_GT(top, std::log(0x1p128)) << c.name;
    EXPECT_GT(above_half, 0) << c.name;
  }
}

TEST(GenerateProperty, NearTiesWithinOneUlpOfTheRowMaximum) {
  for (int size : {10, 40, 100})
    for (std::uint64_t seed = 0; seed < 20; ++seed) {
      const Case c = make_case(request("near_ties", seed, size));
      const CoreShape& s = shape_of(c);
      bool some_not_exact = false;
      each_visible_row(c, [&](auto b, auto h, auto i) {
        double lo = INFINITY, hi = -INFINITY, big = 0;
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          const double z = score(c, b, h, i, j);
          lo = std::min(lo, z);
          hi = std::max(hi, z);
          big = std::max(big, std::fabs(z));
        }
        some_not_exact |= hi != lo;
        EXPECT_LE(hi - lo, ulp32(big) * (1 + 1e-6)) << c.name << " row " << i;
      });
      (void)some_not_exact;
    }
}

TEST(GenerateProperty, NearTiesAreNotAllExact) {
  int rows_with_distinct_scores = 0;
  for (std::uint64_t seed = 0; seed < 20; ++seed) {
    const Case c = make_case(request("near_ties", seed, 60));
    each_visible_row(c, [&](auto b, auto h, auto i) {
      std::set<double> zs;
      for (std::int64_t j = 0; j < c.core.shape.kv_len; ++j) zs.insert(score(c, b, h, i, j));
      rows_with_distinct_scores += zs.size() > 1;
    });
  }
  EXPECT_GT(rows_with_distinct_scores, 0);
}

// The key that leads a row, and by how much over the runner-up.
std::pair<std::int64_t, double> lead(const Case& c, std::int64_t b, std::int64_t h, std::int64_t i) {
  std::int64_t best = 0;
  double first = -INFINITY, second = -INFINITY;
  for (std::int64_t j = 0; j < c.core.shape.kv_len; ++j) {
    const double z = score(c, b, h, i, j);
    if (z > first) {
      second = first;
      first = z;
      best = j;
    } else {
      second = std::max(second, z);
    }
  }
  return {best, first - second};
}

TEST(GenerateProperty, DominantKeyLeadsEveryRowWhileOthersCarryLargeValues) {
  for (std::uint64_t seed = 0; seed < 20; ++seed) {
    const Case c = make_case(request("dominant_key", seed, 50));
    const CoreShape& s = shape_of(c);
    if (s.kv_len < 2) continue;
    each_visible_row(c, [&](auto b, auto h, auto i) {
      const auto [j, margin] = lead(c, b, h, i);
      EXPECT_GE(margin, 6.0) << c.name;
      EXPECT_LE(margin, 30.0) << c.name;
      // Every row of a kv head is led by the same key.
      EXPECT_EQ(j, lead(c, b, h, 0).first);
    });
  }
}

TEST(GenerateProperty, AttentionSinkAtPositionZeroWithSmallValue) {
  for (std::uint64_t seed = 0; seed < 20; ++seed) {
    const Case c = make_case(request("attention_sink", seed, 50));
    const CoreShape& s = shape_of(c);
    if (s.kv_len < 2) continue;
    each_visible_row(c, [&](auto b, auto h, auto i) {
      const auto [j, margin] = lead(c, b, h, i);
      EXPECT_EQ(j, 0) << c.name;
      EXPECT_GE(margin, 8.0) << c.name;
    });
    for (std::int64_t b = 0; b < s.batch; ++b)
      for (std::int64_t g = 0; g < s.kv_heads; ++g)
        for (std::int64_t d = 0; d < s.value_dim; ++d) EXPECT_LE(std::fabs(c.core_inputs.v.at(b, g, 0, d)), 0.01 * 8.7);
  }
}

TEST(GenerateProperty, RepeatedMaximaAttainedByAtLeastTwoKeys) {
  for (std::uint64_t seed = 0; seed < 20; ++seed) {
    const Case c = make_case(request("repeated_maxima", seed, 50));
    const CoreShape& s = shape_of(c);
    each_visible_row(c, [&](auto b, auto h, auto i) {
      double top = -INFINITY;
      for (std::int64_t j = 0; j < s.kv_len; ++j) top = std::max(top, score(c, b, h, i, j));
      int at_top = 0;
      for (std::int64_t j = 0; j < s.kv_len; ++j) {
        const double z = score(c, b, h, i, j);
        at_top += z == top;
        if (z != top) {
          EXPECT_LE(z, top - 1.9) << c.name;  // the copies lead by the margin ≥ 2
        }
      }
      EXPECT_GE(at_top, 2) << c.name;
    });
  }
}

// Channels d of a [B, H, T, D] tensor in which every entry has magnitude ≥ floor.
std::vector<std::int64_t> channels_at_least(const Tensor& t, double floor) {
  std::vector<std::int64_t> out;
  for (std::int64_t d = 0; d < t.shape[3]; ++d) {
    bool all = true;
    for (std::int64_t b = 0; b < t.shape[0]; ++b)
      for (std::int64_t h = 0; h < t.shape[1]; ++h)
        for (std::int64_t j = 0; j < t.shape[2]; ++j) all = all && std::fabs(t.at(b, h, j, d)) >= floor;
    if (all) out.push_back(d);
  }
  return out;
}

TEST(GenerateProperty, OutlierChannelsHaveMagnitudeAtLeastSix) {
  // Dettmers et al. 2022 (LLM.int8(), §4): outlier features of magnitude ≥ 6.
  for (std::uint64_t seed = 0; seed < 20; ++seed) {
    const Case c = make_case(request("outlier_channels", seed, 50));
    for (const Tensor* t : {&c.core_inputs.k, &c.core_inputs.v}) {
      const auto ch = channels_at_least(*t, 6.0);
      EXPECT_GE(ch.size(), 1u) << c.name;
      // A handful of channels: 1 to 4 (plus, in tiny tensors, a Gaussian channel by chance).
      if (t->shape[0] * t->shape[1] * t->shape[2] >= 4) {
        EXPECT_LE(ch.size(), 4u) << c.name;
      }
      double max_abs = 0;
      for (double v : t->values) max_abs = std::max(max_abs, std::fabs(v));
      EXPECT_LE(max_abs, 150.0) << c.name;
    }
  }
}

TEST(GenerateProperty, SparseOutliersFollowThePublishedRate) {
  // Entries N(0,1) + N(0,100)·Bernoulli(0.001), variance 100 (Shah et al. 2024, §4.3).
  // With 3·2^14 entries about 49 outliers are drawn; |x| > 6 singles out those
  // above 6 (≈ 55% of them), the N(0,1) part reaching it with probability 2e-9.
  CaseRequest r = request("sparse_outliers", 11);
  r.shape = CoreShape{1, 1, 1, 256, 256, 64, 64};
  const Case c = make_case(r);
  int big = 0;
  double max_abs = 0;
  for (const Tensor* t : tensors_of(c))
    for (double v : t->values) {
      big += std::fabs(v) > 6;
      max_abs = std::max(max_abs, std::fabs(v));
    }
  EXPECT_GE(big, 10);        // a rate of 0.0001 would give ~3
  EXPECT_LE(big, 60);        // a rate of 0.01 would give ~270
  EXPECT_LE(max_abs, 60.0);  // a standard deviation of 100 would give ~300
  EXPECT_GE(max_abs, 15.0);
}

TEST(GenerateProperty, SparseOutliersPresentEvenInSmallCases) {
  // 16 entries draw no outlier at rate 0.001 most of the time; the family then
  // forces one. Both families draw the value seed first from the same Random,
  // so the gaussian case of the same seed and shape is the outlier-free base.
  for (std::uint64_t seed = 0; seed < 10; ++seed) {
    CaseRequest r = request("sparse_outliers", seed);
    r.shape = CoreShape{1, 1, 1, 4, 4, 4, 4};
    r.mask = MaskKind::none;
    const Case c = make_case(r);
    r.family = "gaussian";
    const Case base = make_case(r);
    const auto tc = tensors_of(c), tb = tensors_of(base);
    for (std::size_t t = 0; t < tc.size(); ++t) {
      int differ = 0;
      for (std::size_t i = 0; i < tc[t]->values.size(); ++i) differ += tc[t]->values[i] != tb[t]->values[i];
      EXPECT_GE(differ, 1) << c.name;
      EXPECT_LE(differ, 2) << c.name;
    }
  }
}

TEST(GenerateProperty, MassiveActivationsOnTheFirstToken) {
  for (std::uint64_t seed = 0; seed < 20; ++seed) {
    const Case c = make_case(request("massive_activations", seed, 50));
    for (const Tensor* t : tensors_of(c)) {
      double first = 0, rest = 0;
      for (std::int64_t b = 0; b < t->shape[0]; ++b)
        for (std::int64_t h = 0; h < t->shape[1]; ++h)
          for (std::int64_t j = 0; j < t->shape[2]; ++j)
            for (std::int64_t d = 0; d < t->shape[3]; ++d)
              (j == 0 ? first : rest) = std::max(j == 0 ? first : rest, std::fabs(t->at(b, h, j, d)));
      // 10^4 to 10^5 times the typical 0.5, below binary16's 65504.
      EXPECT_GE(first, 5000.0) << c.name;
      EXPECT_LE(first, 65504.0) << c.name;
      EXPECT_LE(rest, 0.5 * 8.7) << c.name;
    }
  }
}

TEST(GenerateProperty, CommonOffsetDwarfsTheKeysSpread) {
  for (std::uint64_t seed = 0; seed < 20; ++seed) {
    const Case c = make_case(request("common_offset", seed, 50));
    const Tensor& k = c.core_inputs.k;
    const CoreShape& s = shape_of(c);
    for (std::int64_t b = 0; b < s.batch; ++b)
      for (std::int64_t g = 0; g < s.kv_heads; ++g)
        for (std::int64_t d = 0; d < s.key_dim; ++d) {
          double sum = 0, sum2 = 0;
          for (std::int64_t j = 0; j < s.kv_len; ++j) {
            sum += k.at(b, g, j, d);
            sum2 += k.at(b, g, j, d) * k.at(b, g, j, d);
          }
          const double mean = sum / static_cast<double>(s.kv_len);
          const double var = std::max(0.0, sum2 / static_cast<double>(s.kv_len) - mean * mean);
          EXPECT_GE(std::fabs(mean), 8.0) << c.name;
          EXPECT_LE(std::sqrt(var), std::fabs(mean) / 4) << c.name;
        }
  }
}

// The exact-enough attention output and Σ p|v| of one row, in double.
std::pair<std::vector<double>, std::vector<double>> attend(const Case& c, std::int64_t b, std::int64_t h,
                                                           std::int64_t i) {
  const CoreShape& s = c.core.shape;
  const std::int64_t g = kv_head_of(s, h);
  double top = -INFINITY;
  for (std::int64_t j = 0; j < s.kv_len; ++j)
    if (c.core.mask.visible(s, b, h, i, j)) top = std::max(top, score(c, b, h, i, j));
  std::vector<double> o(static_cast<std::size_t>(s.value_dim)), mag(o.size());
  double total = 0;
  for (std::int64_t j = 0; j < s.kv_len; ++j) {
    if (!c.core.mask.visible(s, b, h, i, j)) continue;
    const double w = std::exp(score(c, b, h, i, j) - top);
    total += w;
    for (std::int64_t d = 0; d < s.value_dim; ++d) {
      o[static_cast<std::size_t>(d)] += w * c.core_inputs.v.at(b, g, j, d);
      mag[static_cast<std::size_t>(d)] += w * std::fabs(c.core_inputs.v.at(b, g, j, d));
    }
  }
  for (std::size_t d = 0; d < o.size(); ++d) {
    o[d] /= total;
    mag[d] /= total;
  }
  return {o, mag};
}

TEST(GenerateProperty, CancellingValuesGiveNearZeroOutputs) {
  for (std::uint64_t seed = 0; seed < 20; ++seed) {
    const Case c = make_case(request("cancelling_values", seed, 50));
    const CoreShape& s = shape_of(c);
    if (s.kv_len % 2 == 1) continue;  // an unpaired key is only small, not cancelled
    each_visible_row(c, [&](auto b, auto h, auto i) {
      const auto [o, mag] = attend(c, b, h, i);
      for (std::size_t d = 0; d < o.size(); ++d) EXPECT_LE(std::fabs(o[d]), 0.02 * mag[d]) << c.name;
    });
  }
}

TEST(GenerateProperty, LongSequencesAreLong) {
  for (std::uint64_t seed = 0; seed < 10; ++seed) {
    const Case c = make_case(request("long_sequence", seed));
    EXPECT_GE(c.core.shape.kv_len, 128);
    EXPECT_LE(c.core.shape.kv_len, 128 + 9 * kDefaultSize);
    EXPECT_LE(c.core.shape.q_len, 4);
  }
}

TEST(GenerateProperty, TileEdgesHitEveryListedLength) {
  std::set<std::int64_t> seen;
  for (std::uint64_t seed = 0; seed < 200; ++seed) {
    const Case c = make_case(request("tile_edges", seed));
    const CoreShape& s = shape_of(c);
    const auto listed = [](std::int64_t n) {
      return std::count(std::begin(kTileLengths), std::end(kTileLengths), n) == 1;
    };
    EXPECT_TRUE(listed(s.q_len)) << c.name;
    EXPECT_TRUE(listed(s.kv_len)) << c.name;
    EXPECT_NE(s.key_dim % 8, 0) << c.name;
    EXPECT_NE(s.value_dim % 8, 0) << c.name;
    seen.insert(s.kv_len);
  }
  EXPECT_EQ(seen, std::set<std::int64_t>(std::begin(kTileLengths), std::end(kTileLengths)));
}

TEST(GenerateProperty, RaggedNeverSquareAndBothCausalAlignments) {
  std::set<MaskKind> kinds;
  for (std::uint64_t seed = 0; seed < 30; ++seed) {
    const Case c = make_case(request("ragged", seed, 40));
    EXPECT_NE(c.core.shape.q_len, c.core.shape.kv_len) << c.name;
    kinds.insert(c.core.mask.kind);
  }
  EXPECT_EQ(kinds, (std::set<MaskKind>{MaskKind::none, MaskKind::causal_top_left, MaskKind::causal_bottom_right}));
}

TEST(GenerateProperty, FormatEdgesCarryEveryEdgeValue) {
  for (std::uint64_t seed = 0; seed < 20; ++seed) {
    const Case c = make_case(request("format_edges", seed, 50));
    SCOPED_TRACE(c.name);
    const auto has = [](const Tensor& t, auto pred) { return std::any_of(t.values.begin(), t.values.end(), pred); };
    const auto neg_zero = [](double v) { return v == 0 && std::signbit(v); };
    const auto sub16 = [](double v) { return v != 0 && std::fabs(v) < 0x1p-14 && std::fabs(v) >= 0x1p-24; };
    const auto sub32 = [](double v) { return v != 0 && std::fabs(v) < 0x1p-126; };
    for (const Tensor* t : {&c.core_inputs.q, &c.core_inputs.k}) {
      if (t->values.size() < 8) continue;
      EXPECT_TRUE(has(*t, neg_zero));
      EXPECT_TRUE(has(*t, sub16));
      EXPECT_TRUE(has(*t, sub32));
      // The extreme is ±127·2^e exactly, and some entries sit on half-code ties.
      double top = 0;
      for (double v : t->values) top = std::max(top, std::fabs(v));
      const double grid = top / 127;
      EXPECT_EQ(std::exp2(std::round(std::log2(grid))), grid);
      EXPECT_TRUE(has(*t, [&](double v) { return v != 0 && v / grid - std::floor(v / grid) == 0.5; }));
      EXPECT_TRUE(has(*t, [&](double v) { return v == -top; }));
    }
    const Tensor& v = c.core_inputs.v;
    if (v.values.size() >= 8) {
      EXPECT_TRUE(has(v, [](double x) { return std::fabs(x) >= 65472; }));
      EXPECT_TRUE(has(v, neg_zero));
      EXPECT_TRUE(has(v, sub16));
    }
    // Every value rounds to a finite binary16: below 65520, the overflow threshold.
    for (double x : v.values) EXPECT_LT(std::fabs(x), 65520.0);
  }
}

TEST(GenerateProperty, MasksCarryTheHardRows) {
  for (MaskKind m : {MaskKind::none, MaskKind::causal_top_left, MaskKind::causal_bottom_right, MaskKind::key_padding,
                     MaskKind::dense, MaskKind::bias})
    for (std::uint64_t seed = 0; seed < 8; ++seed) {
      CaseRequest r = request("masks", seed, 30);
      r.mask = m;
      const Case c = make_case(r);
      SCOPED_TRACE(c.name);
      const RowKinds k = row_kinds(c);
      const CoreShape& s = c.core.shape;
      switch (m) {
        case MaskKind::dense:
          EXPECT_GE(k.fully_masked, 1);
          EXPECT_GE(k.last_key_only, 1);
          break;
        case MaskKind::bias:
          EXPECT_GE(k.fully_masked, 1);
          EXPECT_GE(k.last_key_only, 1);
          EXPECT_GE(k.very_negative, 1);
          break;
        case MaskKind::key_padding:
          EXPECT_GE(s.batch, 2);
          EXPECT_EQ(c.core.mask.key_lengths[0], 0);
          EXPECT_EQ(c.core.mask.key_lengths[1], 1);
          EXPECT_EQ(k.fully_masked, s.q_heads * s.q_len);
          break;
        case MaskKind::causal_bottom_right:
          EXPECT_GT(s.q_len, s.kv_len);
          EXPECT_EQ(k.fully_masked, s.batch * s.q_heads * (s.q_len - s.kv_len));
          break;
        case MaskKind::causal_top_left:
          EXPECT_LT(s.q_len, s.kv_len);
          EXPECT_EQ(k.fully_masked, 0);
          break;
        case MaskKind::none:
          EXPECT_EQ(k.fully_masked, 0);
          break;
      }
    }
}

TEST(GenerateProperty, MasksFamilyChoosesEveryKind) {
  std::set<MaskKind> kinds;
  for (std::uint64_t seed = 0; seed < 60; ++seed) kinds.insert(make_case(request("masks", seed, 20)).core.mask.kind);
  EXPECT_EQ(kinds.size(), 6u);
}

TEST(GenerateProperty, PlainMasksLeaveEveryRowAKey) {
  for (MaskKind m : {MaskKind::key_padding, MaskKind::dense, MaskKind::bias})
    for (std::uint64_t seed = 0; seed < 8; ++seed) {
      CaseRequest r = request("gaussian", seed, 30);
      r.mask = m;
      const Case c = make_case(r);
      EXPECT_EQ(row_kinds(c).fully_masked, 0) << c.name;
    }
}

TEST(GenerateProperty, BlockWeightsArePreservingVariance) {
  for (std::uint64_t seed = 0; seed < 10; ++seed) {
    CaseRequest r = request("block_gaussian", seed);
    r.shape = CoreShape{1, 4, 2, 6, 6, 16, 16};
    r.model_dim = 64;
    const Case c = make_case(r);
    EXPECT_EQ(errors_of(c), std::vector<std::string>{});
    double sum2 = 0;
    for (double w : c.block_inputs.w_q.values) sum2 += w * w;
    // Mean square 1/Dm over 4096 draws: within ±15% with overwhelming probability.
    const double ms = sum2 / static_cast<double>(c.block_inputs.w_q.values.size());
    EXPECT_NEAR(ms * 64, 1.0, 0.15) << c.name;
  }
}

}  // namespace
}  // namespace headroom
