// headroom — tests of the problem model: mask semantics and validation (problem.h).
#include "headroom/problem.h"

#include <gtest/gtest.h>

#include <cmath>
#include <limits>
#include <string>

namespace headroom {
namespace {

Tensor filled(std::vector<std::int64_t> shape, double value) {
  Tensor t;
  std::int64_t n = 1;
  for (auto e : shape) n *= e;
  t.shape = std::move(shape);
  t.values.assign(static_cast<std::size_t>(n), value);
  return t;
}

CoreShape shape_of(std::int64_t tq, std::int64_t tk) {
  CoreShape s;
  s.batch = 2;
  s.q_heads = 4;
  s.kv_heads = 2;
  s.q_len = tq;
  s.kv_len = tk;
  s.key_dim = 3;
  s.value_dim = 5;
  return s;
}

// Finds the finding on `field`, or fails the test.
const ProblemError* find_field(const std::vector<ProblemError>& found, const std::string& field) {
  for (const auto& e : found)
    if (e.field == field) return &e;
  ADD_FAILURE() << "no finding on " << field << " among " << found.size() << " findings";
  return nullptr;
}

TEST(MaskKindNames, RoundTripAndRejectUnknown) {
  for (MaskKind k : {MaskKind::none, MaskKind::causal_top_left, MaskKind::causal_bottom_right, MaskKind::key_padding,
                     MaskKind::dense, MaskKind::bias}) {
    auto parsed = parse_mask_kind(mask_kind_name(k));
    ASSERT_TRUE(parsed.has_value()) << mask_kind_name(k);
    EXPECT_EQ(*parsed, k);
  }
  EXPECT_EQ(mask_kind_name(MaskKind::causal_bottom_right), "causal_bottom_right");
  EXPECT_FALSE(parse_mask_kind("causal").has_value());
  EXPECT_FALSE(parse_mask_kind("").has_value());
  EXPECT_FALSE(parse_mask_kind("None").has_value());
}

TEST(CausalMask, AlignmentsCoincideWhenLengthsAreEqual) {
  const CoreShape s = shape_of(7, 7);
  Mask tl, br;
  tl.kind = MaskKind::causal_top_left;
  br.kind = MaskKind::causal_bottom_right;
  for (std::int64_t i = 0; i < s.q_len; ++i)
    for (std::int64_t j = 0; j < s.kv_len; ++j) {
      EXPECT_EQ(tl.visible(s, 0, 0, i, j), j <= i);
      EXPECT_EQ(tl.visible(s, 1, 3, i, j), br.visible(s, 1, 3, i, j)) << i << "," << j;
    }
}

TEST(CausalMask, AlignmentsDifferWhenLengthsDiffer) {
  // Tq = 3 queries decoding after a prompt: Tk = 8 keys. Bottom-right alignment
  // gives the last query every key; top-left gives the first query only key 0.
  const CoreShape s = shape_of(3, 8);
  Mask tl, br;
  tl.kind = MaskKind::causal_top_left;
  br.kind = MaskKind::causal_bottom_right;
  int differing = 0;
  for (std::int64_t i = 0; i < s.q_len; ++i) {
    int tl_count = 0, br_count = 0;
    for (std::int64_t j = 0; j < s.kv_len; ++j) {
      tl_count += tl.visible(s, 0, 0, i, j);
      br_count += br.visible(s, 0, 0, i, j);
      differing += tl.visible(s, 0, 0, i, j) != br.visible(s, 0, 0, i, j);
    }
    EXPECT_EQ(tl_count, i + 1);
    EXPECT_EQ(br_count, i + 1 + (s.kv_len - s.q_len));
  }
  EXPECT_EQ(differing, 3 * 5);
  EXPECT_TRUE(br.visible(s, 0, 0, 2, 7));
  EXPECT_FALSE(tl.visible(s, 0, 0, 2, 7));

  // More queries than keys: bottom-right leaves the first Tq − Tk rows with no key.
  const CoreShape wide = shape_of(6, 4);
  for (std::int64_t j = 0; j < wide.kv_len; ++j) {
    EXPECT_FALSE(br.visible(wide, 0, 0, 1, j));
    EXPECT_EQ(br.visible(wide, 0, 0, 2, j), j == 0);
    EXPECT_TRUE(br.visible(wide, 0, 0, 5, j));
  }
}

// Sliding window (kernel_abi.h version 2): on top of the kind, key j is hidden
// from query i when j < i' − L or j > i' + R, i' = i (top-left) or i + Tk − Tq.
TEST(SlidingWindow, HidesExactlyTheKeysOutsideItsSides) {
  const CoreShape s = shape_of(3, 9);
  for (MaskKind kind : {MaskKind::none, MaskKind::causal_top_left, MaskKind::causal_bottom_right}) {
    for (std::int64_t left : {-1, 0, 1, 4}) {
      for (std::int64_t right : {-1, 0, 2}) {
        Mask plain, windowed;
        plain.kind = windowed.kind = kind;
        windowed.window_left = left;
        windowed.window_right = right;
        for (std::int64_t i = 0; i < s.q_len; ++i) {
          const std::int64_t at = kind == MaskKind::causal_top_left ? i : i + s.kv_len - s.q_len;
          for (std::int64_t j = 0; j < s.kv_len; ++j) {
            const bool inside = (left < 0 || j >= at - left) && (right < 0 || j <= at + right);
            EXPECT_EQ(windowed.visible(s, 1, 2, i, j), plain.visible(s, 1, 2, i, j) && inside)
                << mask_kind_name(kind) << " L=" << left << " R=" << right << " i=" << i << " j=" << j;
          }
        }
      }
    }
  }
  // Decoding: one query at the end of 9 keys with a 2-key window sees keys 6, 7, 8.
  Mask decode;
  decode.kind = MaskKind::causal_bottom_right;
  decode.window_left = 2;
  const CoreShape one = shape_of(1, 9);
  for (std::int64_t j = 0; j < 9; ++j) EXPECT_EQ(decode.visible(one, 0, 0, 0, j), j >= 6) << j;
}

TEST(SlidingWindow, SidesBelowMinusOneAreFindings) {
  CoreProblem p;
  p.shape = shape_of(2, 4);
  p.mask.window_left = -2;
  EXPECT_NE(find_field(validate(p), "mask.window_left"), nullptr);
}

// Soft cap and sink logits (kernel_abi.h version 2): a cap is 0 or finite > 0,
// sinks are none or one finite logit per query head.
TEST(ScoreFeatures, CapAndSinksAreCheckedAgainstTheShape) {
  CoreProblem p;
  p.shape = shape_of(2, 4);
  p.shape.q_heads = 2;
  EXPECT_TRUE(validate(p).empty());
  p.softcap = 30.0f;
  p.sinks = {0.5f, -3.0f};
  EXPECT_TRUE(validate(p).empty());
  EXPECT_TRUE(p.has_softcap() && p.has_sinks());
  for (float bad : {-1.0f, INFINITY, NAN}) {
    p.softcap = bad;
    EXPECT_NE(find_field(validate(p), "softcap"), nullptr) << bad;
  }
  p.softcap = 0.0f;
  p.sinks = {0.5f};
  EXPECT_NE(find_field(validate(p), "sinks"), nullptr);
  p.sinks = {0.5f, NAN};
  EXPECT_NE(find_field(validate(p), "sinks[1]"), nullptr);
}

TEST(KeyPaddingMask, LengthPerBatch) {
  const CoreShape s = shape_of(2, 6);
  Mask m;
  m.kind = MaskKind::key_padding;
  m.key_lengths = {6, 2};
  for (std::int64_t j = 0; j < s.kv_len; ++j) {
    EXPECT_TRUE(m.visible(s, 0, 1, 1, j));
    EXPECT_EQ(m.visible(s, 1, 1, 0, j), j < 2) << j;
  }
  EXPECT_EQ(m.bias_at(1, 0, 0, 5), 0.0);
}

TEST(DenseMask, HeadExtentOneBroadcastsOverHeads) {
  const CoreShape s = shape_of(2, 3);
  Mask m;
  m.kind = MaskKind::dense;
  m.allowed = filled({2, 1, 2, 3}, 0.0);
  m.allowed.at(1, 0, 1, 2) = 1.0;
  for (std::int64_t h = 0; h < s.q_heads; ++h) {
    EXPECT_TRUE(m.visible(s, 1, h, 1, 2));
    EXPECT_FALSE(m.visible(s, 0, h, 1, 2));
    EXPECT_FALSE(m.visible(s, 1, h, 0, 2));
  }
  // Per-head: each head reads its own plane.
  m.allowed = filled({2, 4, 2, 3}, 0.0);
  m.allowed.at(0, 3, 0, 1) = 1.0;
  EXPECT_TRUE(m.visible(s, 0, 3, 0, 1));
  EXPECT_FALSE(m.visible(s, 0, 2, 0, 1));
  EXPECT_TRUE(validate(CoreProblem{s, 0.5f, m}).empty());
}

TEST(BiasMask, BroadcastAndMinusInfinityMasks) {
  const CoreShape s = shape_of(2, 3);
  Mask m;
  m.kind = MaskKind::bias;
  m.bias = filled({2, 1, 2, 3}, 0.25);
  m.bias.at(0, 0, 1, 0) = -std::numeric_limits<double>::infinity();
  m.bias.at(1, 0, 0, 2) = -3.5;
  for (std::int64_t h = 0; h < s.q_heads; ++h) {
    EXPECT_EQ(m.bias_at(1, h, 0, 2), -3.5);
    EXPECT_EQ(m.bias_at(0, h, 0, 0), 0.25);
    EXPECT_FALSE(m.visible(s, 0, h, 1, 0));
    EXPECT_TRUE(m.visible(s, 0, h, 1, 1));
  }
  Mask causal;
  causal.kind = MaskKind::causal_top_left;
  EXPECT_EQ(causal.bias_at(0, 0, 0, 0), 0.0);
}

TEST(Validate, ValidCoreProblemHasNoFindings) {
  CoreProblem p{shape_of(4, 5), 0.125f, {}};
  CoreInputs in{filled({2, 4, 4, 3}, 1.0), filled({2, 2, 5, 3}, 1.0), filled({2, 2, 5, 5}, 1.0)};
  EXPECT_TRUE(validate(p).empty());
  EXPECT_TRUE(validate(p, in).empty());
}

TEST(Validate, NamesTheFieldAndTheExpectedValue) {
  CoreProblem p{shape_of(4, 5), 0.125f, {}};
  p.shape.q_heads = 3;  // not a multiple of kv_heads = 2
  auto found = validate(p);
  const ProblemError* e = find_field(found, "shape.q_heads");
  ASSERT_NE(e, nullptr);
  EXPECT_NE(e->expected.find("multiple of shape.kv_heads (2)"), std::string::npos) << e->message();
  EXPECT_EQ(e->found, "3");
  EXPECT_EQ(e->message(), "shape.q_heads: expected " + e->expected + ", found 3");

  p = CoreProblem{shape_of(4, 5), 0.0f, {}};
  p.shape.key_dim = 0;
  found = validate(p);
  EXPECT_NE(find_field(found, "shape.key_dim"), nullptr);
  EXPECT_NE(find_field(found, "scale"), nullptr);

  p = CoreProblem{shape_of(4, 5), std::numeric_limits<float>::infinity(), {}};
  EXPECT_NE(find_field(validate(p), "scale"), nullptr);
}

TEST(Validate, KeyLengths) {
  CoreProblem p{shape_of(4, 5), 1.0f, {}};
  p.mask.kind = MaskKind::key_padding;
  p.mask.key_lengths = {5, 6};
  auto found = validate(p);
  ASSERT_EQ(found.size(), 1u);
  EXPECT_EQ(found[0].field, "mask.key_lengths[1]");
  EXPECT_EQ(found[0].expected, "a length in [0, 5]");
  EXPECT_EQ(found[0].found, "6");

  p.mask.key_lengths = {0, 5};  // a fully masked batch is a valid problem
  EXPECT_TRUE(validate(p).empty());
  p.mask.key_lengths = {1};
  EXPECT_NE(find_field(validate(p), "mask.key_lengths"), nullptr);
  p.mask.kind = MaskKind::none;  // lengths given but unused: almost surely a mistake
  p.mask.key_lengths = {1, 1};
  EXPECT_NE(find_field(validate(p), "mask.key_lengths"), nullptr);
}

TEST(Validate, MaskTensorShapes) {
  CoreProblem p{shape_of(4, 5), 1.0f, {}};
  p.mask.kind = MaskKind::dense;
  p.mask.allowed = filled({2, 2, 4, 5}, 1.0);  // head extent must be 1 or Hq = 4, not Hkv
  auto found = validate(p);
  const ProblemError* e = find_field(found, "mask.allowed.shape");
  ASSERT_NE(e, nullptr);
  EXPECT_EQ(e->expected, "[2, 1 or 4, 4, 5]");
  EXPECT_EQ(e->found, "[2, 2, 4, 5]");

  p.mask.allowed = filled({2, 1, 4, 5}, 1.0);
  p.mask.allowed.values.pop_back();
  EXPECT_NE(find_field(validate(p), "mask.allowed.values"), nullptr);

  p.mask = {};
  p.mask.kind = MaskKind::bias;
  p.mask.bias = filled({2, 4, 4, 5}, 0.0);
  EXPECT_TRUE(validate(p).empty());
  p.mask.bias.values[7] = std::numeric_limits<double>::quiet_NaN();
  EXPECT_NE(find_field(validate(p), "mask.bias.values[7]"), nullptr);
  p.mask.bias.values[7] = std::numeric_limits<double>::infinity();
  EXPECT_NE(find_field(validate(p), "mask.bias.values[7]"), nullptr);
  p.mask.bias.values[7] = -std::numeric_limits<double>::infinity();
  EXPECT_TRUE(validate(p).empty());

  p.mask.kind = MaskKind::causal_top_left;  // a bias tensor the kind ignores
  EXPECT_NE(find_field(validate(p), "mask.bias"), nullptr);
}

TEST(Validate, CoreInputShapes) {
  CoreProblem p{shape_of(4, 5), 1.0f, {}};
  CoreInputs in{filled({2, 4, 4, 3}, 1.0), filled({2, 4, 5, 3}, 1.0), filled({2, 2, 5, 5}, 1.0)};
  auto found = validate(p, in);
  ASSERT_EQ(found.size(), 1u);
  EXPECT_EQ(found[0].field, "inputs.k.shape");
  EXPECT_EQ(found[0].expected, "[2, 2, 5, 3]");
  EXPECT_EQ(found[0].found, "[2, 4, 5, 3]");

  in.k = filled({2, 2, 5, 3}, 1.0);
  in.v.values.resize(3);
  found = validate(p, in);
  ASSERT_EQ(found.size(), 1u);
  EXPECT_EQ(found[0].field, "inputs.v.values");
}

TEST(Validate, AbsurdExtentsAreRejectedNotOverflowed) {
  CoreProblem p{shape_of(4, 5), 1.0f, {}};
  p.shape.q_len = std::int64_t{1} << 40;
  p.shape.kv_len = std::int64_t{1} << 40;
  EXPECT_NE(find_field(validate(p), "shape"), nullptr);
}

BlockShape block_shape() {
  BlockShape s;
  s.batch = 1;
  s.q_len = 3;
  s.kv_len = 4;
  s.model_dim = 8;
  s.q_heads = 2;
  s.kv_heads = 1;
  s.key_dim = 4;
  s.value_dim = 3;
  return s;
}

BlockInputs block_inputs(const BlockShape& s) {
  BlockInputs in;
  in.x_q = filled({s.batch, s.q_len, s.model_dim}, 1.0);
  in.x_kv = filled({s.batch, s.kv_len, s.model_dim}, 1.0);
  in.w_q = filled({s.model_dim, s.q_heads * s.key_dim}, 1.0);
  in.w_k = filled({s.model_dim, s.kv_heads * s.key_dim}, 1.0);
  in.w_v = filled({s.model_dim, s.kv_heads * s.value_dim}, 1.0);
  in.w_o = filled({s.q_heads * s.value_dim, s.model_dim}, 1.0);
  return in;
}

TEST(Validate, BlockInputs) {
  BlockProblem p{block_shape(), 0.5f, {}};
  BlockInputs in = block_inputs(p.shape);
  EXPECT_TRUE(validate(p, in).empty());
  in.b_o = filled({8}, 0.0);  // optional biases: absent or exactly shaped
  EXPECT_TRUE(validate(p, in).empty());
  in.b_q = filled({4}, 0.0);
  auto found = validate(p, in);
  ASSERT_EQ(found.size(), 1u);
  EXPECT_EQ(found[0].field, "inputs.b_q.shape");
  EXPECT_EQ(found[0].expected, "[8] or absent");

  in = block_inputs(p.shape);
  in.w_o = filled({8, 6}, 1.0);  // transposed output projection
  found = validate(p, in);
  ASSERT_EQ(found.size(), 1u);
  EXPECT_EQ(found[0].field, "inputs.w_o.shape");
  EXPECT_EQ(found[0].expected, "[6, 8]");

  p.shape.model_dim = 0;
  found = validate(p, in);
  EXPECT_NE(find_field(found, "shape.model_dim"), nullptr);
  p.shape = block_shape();
  p.mask.kind = MaskKind::key_padding;
  p.mask.key_lengths = {9};
  EXPECT_NE(find_field(validate(p), "mask.key_lengths[0]"), nullptr);
}

}  // namespace
}  // namespace headroom
