// headroom — the built-in suites: deterministic, unique names, covering every family and mask kind, quick stays small.
#include <gtest/gtest.h>

#include <algorithm>
#include <cmath>
#include <limits>
#include <set>
#include <string>
#include <vector>

#include "generate_support.h"
#include "headroom/suite.h"

namespace headroom {
namespace {

using namespace headroom::test;

// ---------------------------------------------------------------- suites

TEST(GenerateSuites, DeterministicUniqueAndCovering) {
  std::size_t quick_size = 0;
  for (const SuiteInfo& info : kSuites) {
    const std::vector<CaseRequest> a = suite_requests(info.name), b = suite_requests(info.name);
    ASSERT_EQ(a.size(), b.size());
    std::set<std::string> names, families_seen;
    std::set<MaskKind> masks;
    bool gqa_2 = false, gqa_1 = false, ragged_tl = false, ragged_br = false, fully_masked = false, block = false;
    for (std::size_t i = 0; i < a.size(); ++i) {
      // Production-sized cases are checked through their outlines (the same
      // name, shape and mask make_case gives); small ones are made in full.
      const CaseOutline o = case_outline(a[i]);
      const CoreShape& s = o.shape;
      const bool small = s.batch * s.q_heads * s.q_len * s.kv_len <= (1 << 16);
      EXPECT_TRUE(names.insert(o.name).second) << info.name << ": " << o.name;
      families_seen.insert(a[i].family);
      if (small) {
        const Case c = make_case(a[i]);
        EXPECT_EQ(c.name, o.name);
        if (i < 40 || info.name == "quick") {
          EXPECT_TRUE(identical(c, make_case(b[i]))) << c.name;
        }
        if (c.level == Level::core) fully_masked |= row_kinds(c).fully_masked > 0;
      }
      if (o.level == Level::block) {
        block = true;
        continue;
      }
      masks.insert(o.mask);
      gqa_2 |= s.q_heads == 4 && s.kv_heads == 2;
      gqa_1 |= s.q_heads == 4 && s.kv_heads == 1;
      ragged_tl |= s.q_len != s.kv_len && o.mask == MaskKind::causal_top_left;
      ragged_br |= s.q_len != s.kv_len && o.mask == MaskKind::causal_bottom_right;
    }
    SCOPED_TRACE(std::string(info.name));
    EXPECT_EQ(families_seen.size(), std::size(kFamilies));
    EXPECT_EQ(masks.size(), 6u);
    EXPECT_TRUE(gqa_2 && gqa_1 && ragged_tl && ragged_br && fully_masked && block);
    if (info.name == "quick") {
      quick_size = a.size();
      EXPECT_GE(a.size(), 40u);
      EXPECT_LE(a.size(), 80u);
    } else if (info.name == "standard") {
      // ~5x quick of small cases plus ~100 production-shaped ones (suite_shapes.cpp).
      EXPECT_NEAR(static_cast<double>(a.size()) / static_cast<double>(quick_size), 7.0, 1.5);
    } else {
      EXPECT_NEAR(static_cast<double>(a.size()) / static_cast<double>(quick_size), 24.0, 5.0);
    }
  }
  EXPECT_EQ(input_error_place([] { suite_requests("huge"); }), "--suite");
}

TEST(GenerateSuites, EverySuiteHasBlocksAModuleWithOneHeadDimCanTake) {
  // torch.nn.MultiheadAttention takes only Hkv = Hq, Dk = Dv and Dm = Hq·Dk;
  // each suite must give such a kernel several block cases, the base model of
  // Vaswani et al. 2017 (512 / 8 / 64) among them, with a mask in some.
  for (const SuiteInfo& info : kSuites) {
    SCOPED_TRACE(std::string(info.name));
    int full_head = 0, masked = 0;
    bool base_model = false;
    for (const CaseRequest& r : suite_requests(info.name)) {
      if (case_outline(r).level != Level::block) continue;  // production-sized core cases are not made
      const Case c = make_case(r);
      const BlockShape& s = c.block.shape;
      if (s.kv_heads != s.q_heads || s.key_dim != s.value_dim || s.model_dim != s.q_heads * s.key_dim) continue;
      ++full_head;
      masked += c.block.mask.kind != MaskKind::none;
      base_model |= s.model_dim == 512 && s.q_heads == 8 && s.key_dim == 64;
    }
    EXPECT_GE(full_head, 3);
    EXPECT_GE(masked, 2);
    EXPECT_TRUE(base_model);
  }
}

// Each kernel_abi.h version-2 feature judged so far is in every suite, counted
// in its coverage (`headroom suites`), and the ones not judged are named.
TEST(GenerateSuites, CoverageCountsTheInferenceFeatures) {
  for (const char* suite : {"quick", "standard"}) {
    const SuiteCoverage c = suite_coverage(suite_requests(suite));
    std::vector<std::string> names;
    for (const auto& [name, n] : c.features) {
      names.push_back(name);
      EXPECT_GE(n, 2u) << suite << ' ' << name;
    }
    EXPECT_EQ(names, (std::vector<std::string>{"window", "softcap", "sinks", "varlen", "paged_kv"})) << suite;
    bool line = false;
    for (const std::string& l : coverage_text(c))
      line = line || (l.find("inference features") != std::string::npos && l.find("softcap ") != std::string::npos &&
                      l.find("varlen ") != std::string::npos && l.find("paged_kv ") != std::string::npos &&
                      l.find("split-KV partials judged") != std::string::npos);
    EXPECT_TRUE(line) << suite;
  }
}

// Long rows are where running sums stagnate, split-KV paths start and tile
// counters wrap: every adversarial family of the production sections must
// reach Tk ≥ 4096 in standard (a sink row summed weight by weight fails only
// there: tests/cli_growth_test.cpp), not only the ones a rotation lands on.
TEST(GenerateSuites, EveryShapeFamilyReachesLongRowsInStandardAndDeep) {
  const std::set<std::string> families{"gaussian",          "large_logits",     "near_ties",     "dominant_key",
                                       "outlier_channels",  "sparse_outliers",  "massive_activations",
                                       "common_offset",     "cancelling_values", "attention_sink",
                                       "repeated_maxima",   "format_edges"};
  for (const char* suite : {"standard", "deep"}) {
    std::set<std::string> long_rows;
    for (const CaseRequest& r : suite_requests(suite))
      if (r.shape && r.shape->kv_len >= 4096) long_rows.insert(r.family);
    for (const std::string& f : families) EXPECT_TRUE(long_rows.count(f)) << suite << " never runs " << f << " at Tk >= 4096";
  }
}

TEST(GenerateSuites, QuickStaysSmall) {
  // The work of an exact reference grows with B·Hq·Tq·Tk·(Dk + Dv); the quick
  // suite must run in seconds, so most cases keep Tk ≤ 32 and all ≤ 129.
  std::int64_t work = 0, long_ones = 0;
  const auto reqs = suite_requests("quick");
  for (const CaseRequest& r : reqs) {
    const Case c = make_case(r);
    const CoreShape s = c.level == Level::core ? c.core.shape : c.block.shape.core();
    work += s.batch * s.q_heads * s.q_len * s.kv_len * (s.key_dim + s.value_dim);
    long_ones += s.kv_len > 32;
    if (r.family != "long_sequence") {
      EXPECT_LE(s.kv_len, 129) << c.name;
    }
  }
  EXPECT_LE(long_ones, 10);  // 8, and the two fp8_scales cases whose block kinds need Tk > 64
  EXPECT_LE(work, 2'000'000);
  std::printf("quick suite: %zu cases, %lld multiply-adds of attention work, %lld with Tk > 32\n", reqs.size(),
              static_cast<long long>(work), static_cast<long long>(long_ones));
}

TEST(GenerateSuites, CoverageNamesEveryInputFormatAndTheEightBitFamily) {
  // `headroom suites` prints this text: the 8-bit floats must be listed beside
  // the older formats, and every suite must hold fp8_scales cases.
  for (const char* name : {"quick", "standard", "deep"}) {
    const SuiteCoverage c = suite_coverage(suite_requests(name));
    std::string formats;
    for (const std::string& line : coverage_text(c))
      if (line.rfind("formats:", 0) == 0) formats = line;
    for (const char* f : {"float64", "float32", "binary16", "bfloat16", "int8", "e4m3", "e5m2"})
      EXPECT_NE(formats.find(f), std::string::npos) << name << ": " << formats;
    EXPECT_NE(std::find(c.families.begin(), c.families.end(), "fp8_scales"), c.families.end()) << name;
  }
}

}  // namespace
}  // namespace headroom
