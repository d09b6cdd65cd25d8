// headroom — tests of the generator API: the family list, determinism, validity, shrinking and replay, bad requests.
#include <gtest/gtest.h>

#include <algorithm>
#include <cmath>
#include <limits>
#include <set>
#include <string>

#include "generate_support.h"
#include "headroom/suite.h"
#include "headroom/varlen.h"

namespace headroom {
namespace {

using namespace headroom::test;

// ---------------------------------------------------------------- the family list

TEST(GenerateFamilies, ListedOnceWithDocsAndFound) {
  std::set<std::string_view> names;
  for (const FamilyInfo& f : families()) {
    EXPECT_TRUE(names.insert(f.name).second) << f.name;
    EXPECT_FALSE(f.summary.empty()) << f.name;
    EXPECT_GT(f.doc.size(), 100u) << f.name;
    const FamilyInfo* found = find_family(f.name);
    ASSERT_NE(found, nullptr) << f.name;
    EXPECT_EQ(found->name, f.name);
  }
  EXPECT_EQ(names.size(), 24u);
  EXPECT_EQ(find_family("no_such_family"), nullptr);
  EXPECT_EQ(find_family("block_gaussian")->level, Level::block);
  EXPECT_EQ(find_family("gaussian")->level, Level::core);
}

// ---------------------------------------------------------------- determinism and validity

TEST(GenerateDeterminism, SameRequestGivesBitIdenticalCase) {
  for (const FamilyInfo& f : families())
    for (std::uint64_t seed : {0u, 7u, 123456789u}) {
      const CaseRequest r = request(std::string(f.name), seed, 40);
      const Case a = make_case(r);
      const Case b = make_case(r);
      EXPECT_TRUE(identical(a, b)) << a.name;
      // The same case through the generator the brief names: gen(rc::Random(seed), size).
      const Case c = case_gen(r)(rc::Random(seed), 40).value();
      EXPECT_TRUE(identical(a, c)) << a.name;
    }
}

TEST(GenerateDeterminism, SeedsDiffer) {
  for (const FamilyInfo& f : families()) {
    const Case a = make_case(request(std::string(f.name), 1, 40));
    const Case b = make_case(request(std::string(f.name), 2, 40));
    EXPECT_FALSE(identical(a, b)) << f.name;
  }
}

TEST(GenerateValidity, EveryFamilyValidAcrossSeedsAndSizes) {
  for (const FamilyInfo& f : families())
    for (int size : {0, 1, 10, 30, 100})
      for (std::uint64_t seed = 0; seed < 6; ++seed) {
        const Case c = make_case(request(std::string(f.name), seed, size));
        SCOPED_TRACE(c.name);
        EXPECT_EQ(errors_of(c), std::vector<std::string>{});
        EXPECT_EQ(c.level, f.level);
        EXPECT_EQ(c.source_format, Format::float32);
        EXPECT_EQ(c.provenance.family, f.name);
        EXPECT_EQ(c.provenance.seed, seed);
        EXPECT_EQ(c.provenance.command, "headroom case make --family " + std::string(f.name) + " --seed " +
                                            std::to_string(seed) + " --size " + std::to_string(size) + " --out " +
                                            c.name);
        for (const Tensor* t : tensors_of(c))
          for (double v : t->values) {
            ASSERT_TRUE(std::isfinite(v)) << v;
            ASSERT_TRUE(is_float32(v)) << v;
          }
        const float scale = c.level == Level::core ? c.core.scale : c.block.scale;
        EXPECT_TRUE(std::isfinite(scale) && scale > 0);
        // Default sizes keep the reference quick: Tk ≤ 64 but for the long families
        // (a sliding window needs rows longer than the window; fp8_scales' block
        // kinds need two 64-token blocks; varlen_edges packs several sequences,
        // Tk is their total).
        if (c.level == Level::core && f.name != "tile_edges" && f.name != "long_sequence" &&
            f.name != "sliding_window" && f.name != "fp8_scales" && f.name != "varlen_edges") {
          EXPECT_LE(c.core.shape.kv_len, 64);
        }
      }
}

TEST(GenerateFamilies, SlidingWindowCasesCarryAWindowThatHidesKeys) {
  int hiding = 0;
  for (std::uint64_t seed = 0; seed < 20; ++seed) {
    const Case c = make_case(request("sliding_window", seed, 100));
    SCOPED_TRACE(c.name);
    ASSERT_TRUE(c.core.mask.has_window());
    // Count the cases where the window hides a key the mask kind alone shows.
    Mask plain = c.core.mask;
    plain.window_left = plain.window_right = -1;
    const CoreShape& s = c.core.shape;
    bool hides = false;
    for (std::int64_t i = 0; i < s.q_len && !hides; ++i)
      for (std::int64_t j = 0; j < s.kv_len && !hides; ++j)
        hides = plain.visible(s, 0, 0, i, j) && !c.core.mask.visible(s, 0, 0, i, j);
    hiding += hides;
  }
  EXPECT_GE(hiding, 10);
}

// capped_logits carries a soft cap its scores exceed; dominant_sinks one sink
// logit per query head, some far above every score.
TEST(GenerateFamilies, ScoreFeatureFamiliesCarryTheirFeature) {
  int saturated = 0, dominant = 0;
  for (std::uint64_t seed = 0; seed < 20; ++seed) {
    const Case capped = make_case(request("capped_logits", seed, 100));
    SCOPED_TRACE(capped.name);
    ASSERT_TRUE(capped.core.has_softcap());
    EXPECT_FALSE(capped.core.has_sinks());
    const CoreInputs& in = capped.core_inputs;
    const CoreShape& s = capped.core.shape;
    double top = 0;
    for (std::int64_t j = 0; j < s.kv_len; ++j) {
      double z = 0;
      for (std::int64_t d = 0; d < s.key_dim; ++d) z += in.q.at(0, 0, 0, d) * in.k.at(0, 0, j, d);
      top = std::max(top, std::fabs(capped.core.scale * z));
    }
    saturated += top > 2.0 * capped.core.softcap;
    const Case sunk = make_case(request("dominant_sinks", seed, 100));
    ASSERT_EQ(sunk.core.sinks.size(), static_cast<std::size_t>(sunk.core.shape.q_heads));
    EXPECT_FALSE(sunk.core.has_softcap());
    for (float x : sunk.core.sinks) dominant += x > 5.0f;
  }
  EXPECT_GE(saturated, 4);
  EXPECT_GE(dominant, 4);
}

TEST(GenerateValidity, RequestedShapeAndMaskAreObeyed) {
  const CoreShape shape{2, 4, 2, 9, 13, 7, 5};
  for (const FamilyInfo& f : families())
    for (MaskKind m : {MaskKind::none, MaskKind::causal_top_left, MaskKind::causal_bottom_right, MaskKind::key_padding,
                       MaskKind::dense, MaskKind::bias}) {
      CaseRequest r = request(std::string(f.name), 3, 50);
      r.shape = shape;
      r.mask = m;
      const Case c = make_case(r);
      SCOPED_TRACE(c.name);
      EXPECT_EQ(errors_of(c), std::vector<std::string>{});
      if (c.core.mask.is_varlen()) {
        // A packed batch: the shape is told as N sequences of at most Tq, Tk
        // (varlen.h); key padding, dense and bias requests get no mask.
        const CoreShape told = declared_shape(c.core.shape, c.core.mask);
        EXPECT_EQ(told.batch, shape.batch);
        EXPECT_LE(told.q_len, shape.q_len);
        EXPECT_LE(told.kv_len, shape.kv_len);
        const bool kept = m == MaskKind::none || m == MaskKind::causal_top_left || m == MaskKind::causal_bottom_right;
        EXPECT_EQ(c.core.mask.kind, kept ? m : MaskKind::none);
      } else if (c.level == Level::core) {
        EXPECT_EQ(c.core.shape, shape);
        EXPECT_EQ(c.core.mask.kind, m);
      } else {
        EXPECT_EQ(c.block.shape.core(), shape);
        EXPECT_EQ(c.block.shape.model_dim, shape.q_heads * shape.key_dim);
        EXPECT_EQ(c.block.mask.kind, m);
      }
      EXPECT_NE(c.provenance.command.find("--shape 2,4,2,9,13,7,5 --mask " + std::string(mask_kind_name(m))),
                std::string::npos);
    }
}

TEST(GenerateValidity, RapidCheckGeneratorGivesValidCasesForAnyRandom) {
  for (const FamilyInfo& f : families()) {
    const rc::Gen<Case> gen = case_gen(request(std::string(f.name), 5));
    for (std::uint64_t k = 0; k < 8; ++k) {
      const Case c = gen(rc::Random(1000 + k), static_cast<int>(k * 12)).value();
      SCOPED_TRACE(c.name);
      EXPECT_EQ(errors_of(c), std::vector<std::string>{});
      // Not run from the request's seed: no replay command is claimed.
      EXPECT_EQ(c.provenance.command.find("headroom case make"), std::string::npos);
    }
  }
}

// ---------------------------------------------------------------- shrinking and replay

std::int64_t elements(const Case& c) {
  std::int64_t n = 0;
  for (const Tensor* t : tensors_of(c)) n += static_cast<std::int64_t>(t->values.size());
  return n;
}

TEST(GenerateShrink, EveryShrinkIsValidAndNoLarger) {
  for (const FamilyInfo& f : families()) {
    const rc::Shrinkable<Case> root = shrinkable_case(request(std::string(f.name), 4, 40));
    const Case parent = root.value();
    auto seq = root.shrinks();
    int count = 0, smaller = 0;
    while (auto s = seq.next()) {
      const Case c = s->value();
      SCOPED_TRACE(c.name);
      EXPECT_EQ(errors_of(c), std::vector<std::string>{});
      EXPECT_LE(elements(c), elements(parent));
      smaller += elements(c) < elements(parent);
      EXPECT_FALSE(identical(c, parent));
      ++count;
    }
    EXPECT_GT(count, 0) << f.name;
    EXPECT_GT(smaller, 0) << f.name;
  }
}

// A fake failure, as a search loop would see it: "fails" while Tk ≥ 5 and Dk ≥ 3.
bool still_fails(const Case& c) { return c.core.shape.kv_len >= 5 && c.core.shape.key_dim >= 3; }

TEST(GenerateShrink, GreedyWalkReachesTheSmallestFailingCaseAndReplays) {
  CaseRequest r = request("gaussian", 9);
  r.shape = CoreShape{2, 4, 2, 20, 30, 40, 24};
  rc::Shrinkable<Case> at = shrinkable_case(r);
  ASSERT_TRUE(still_fails(at.value()));
  for (bool moved = true; moved;) {
    moved = false;
    auto seq = at.shrinks();
    while (auto s = seq.next())
      if (still_fails(s->value())) {
        at = *s;
        moved = true;
        break;
      }
  }
  const Case c = at.value();
  EXPECT_EQ(c.core.shape, (CoreShape{1, 1, 1, 1, 5, 3, 1}));
  // Simplest values: one significant bit, so every entry is ± a power of two.
  for (double v : c.core_inputs.k.values) EXPECT_EQ(std::fabs(v), std::exp2(std::round(std::log2(std::fabs(v)))));
  // The command records the shrink path; replaying it gives the same case.
  const auto p = c.provenance.command.find("--shrink-path ");
  ASSERT_NE(p, std::string::npos);
  std::string path = c.provenance.command.substr(p + 14);
  path = path.substr(0, path.find(' '));
  CaseRequest again = r;
  for (std::size_t start = 0; start <= path.size();) {
    const std::size_t comma = std::min(path.find(',', start), path.size());
    again.shrink_path.push_back(std::stoi(path.substr(start, comma - start)));
    start = comma + 1;
  }
  EXPECT_TRUE(identical(make_case(again), c));
}

TEST(GenerateShrink, FewerTokensKeepTheSurvivingValues) {
  const rc::Shrinkable<Case> root = shrinkable_case(request("gaussian", 3, 60));
  const Case parent = root.value();
  const CoreShape& ps = parent.core.shape;
  bool checked = false;
  auto seq = root.shrinks();
  while (auto s = seq.next()) {
    const Case c = s->value();
    const CoreShape& cs = c.core.shape;
    if (cs.kv_len >= ps.kv_len || cs.batch != ps.batch || cs.kv_heads != ps.kv_heads || cs.key_dim != ps.key_dim)
      continue;
    for (std::int64_t b = 0; b < cs.batch; ++b)
      for (std::int64_t g = 0; g < cs.kv_heads; ++g)
        for (std::int64_t j = 0; j < cs.kv_len; ++j)
          for (std::int64_t d = 0; d < cs.key_dim; ++d)
            ASSERT_EQ(c.core_inputs.k.at(b, g, j, d), parent.core_inputs.k.at(b, g, j, d));
    checked = true;
  }
  EXPECT_TRUE(checked);
}

TEST(GenerateShrink, FamilyConstraintsSurviveShrinking) {
  // tile_edges shrinks stay on the listed lengths; ragged stays ragged.
  for (const char* family : {"tile_edges", "ragged"}) {
    const rc::Shrinkable<Case> root = shrinkable_case(request(family, 2));
    auto seq = root.shrinks();
    while (auto s = seq.next()) {
      const Case c = s->value();
      if (std::string(family) == "ragged") {
        EXPECT_NE(c.core.shape.q_len, c.core.shape.kv_len);
      } else {
        EXPECT_EQ(std::count(std::begin(kTileLengths), std::end(kTileLengths), c.core.shape.kv_len), 1);
      }
    }
  }
}

// ---------------------------------------------------------------- bad requests

TEST(GenerateErrors, BadRequestsNameTheFlag) {
  EXPECT_EQ(input_error_place([] { make_case(request("gausian", 1)); }), "--family");
  EXPECT_EQ(input_error_place([] { make_case(request("gaussian", 1, -1)); }), "--size");
  EXPECT_EQ(input_error_place([] { make_case(request("gaussian", 1, kMaxSize + 1)); }), "--size");
  EXPECT_EQ(input_error_place([] { case_gen(request("nope", 1)); }), "--family");
  EXPECT_EQ(input_error_place([] {
              CaseRequest r = request("gaussian", 1);
              r.level = Level::block;
              make_case(r);
            }),
            "--level");
  EXPECT_EQ(input_error_place([] {
              CaseRequest r = request("gaussian", 1);
              r.model_dim = 8;
              make_case(r);
            }),
            "--model-dim");
  EXPECT_EQ(input_error_place([] {
              CaseRequest r = request("gaussian", 1);
              r.shape = CoreShape{1, 3, 2, 4, 4, 4, 4};
              make_case(r);
            }),
            "--shape");
  EXPECT_EQ(input_error_place([] {
              CaseRequest r = request("gaussian", 1);
              r.shape = CoreShape{1, 1, 1, 1 << 20, 1 << 20, 4, 4};
              make_case(r);
            }),
            "--shape");
  EXPECT_EQ(input_error_place([] {
              CaseRequest r = request("gaussian", 1);
              r.shrink_path = {0, 100000};
              make_case(r);
            }),
            "--shrink-path");
}

TEST(GenerateErrors, ShapeText) {
  EXPECT_EQ(parse_core_shape("1,4,2,16,16,64,32"), (CoreShape{1, 4, 2, 16, 16, 64, 32}));
  EXPECT_EQ(core_shape_text(CoreShape{1, 4, 2, 16, 16, 64, 32}), "1,4,2,16,16,64,32");
  for (const char* bad : {"", "1,2,3", "1,4,2,16,16,64,32,1", "1,4,2,16,16,64,x", "1,4,2,16,0,64,32", "1,3,2,4,4,4,4",
                          "1,4,2,16,,64,32", "1,4,2,16,16,64,32 "})
    EXPECT_EQ(input_error_place([&] { parse_core_shape(bad); }), "--shape") << bad;
}

}  // namespace
}  // namespace headroom
