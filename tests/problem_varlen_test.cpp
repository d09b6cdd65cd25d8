// headroom tests — packed variable-length batches in the problem model
// (varlen.h): each sequence its own problem, offsets validated.
#include <gtest/gtest.h>

#include "headroom/varlen.h"

namespace headroom {
namespace {

// Three sequences: (Tq 3, Tk 5), (Tq 0, Tk 2), (Tq 2, Tk 1): packed Tq 5, Tk 8.
CoreProblem packed(MaskKind kind) {
  CoreProblem p;
  p.shape = {1, 2, 1, 5, 8, 4, 4};
  p.mask.kind = kind;
  p.mask.cu_q_lens = offsets_of({3, 0, 2});
  p.mask.cu_kv_lens = offsets_of({5, 2, 1});
  return p;
}

TEST(Varlen, OffsetsAndLengthsAreInverse) {
  EXPECT_EQ(offsets_of({3, 0, 2}), (std::vector<std::int64_t>{0, 3, 3, 5}));
  EXPECT_EQ(lengths_of({0, 3, 3, 5}), (std::vector<std::int64_t>{3, 0, 2}));
}

TEST(Varlen, RowsBelongToTheSequenceHoldingThemSkippingEmptyOnes) {
  const CoreProblem p = packed(MaskKind::none);
  EXPECT_EQ(sequence_of_row(p.mask, 0).n, 0);
  EXPECT_EQ(sequence_of_row(p.mask, 2).n, 0);
  EXPECT_EQ(sequence_of_row(p.mask, 3).n, 2);  // sequence 1 has no rows
  EXPECT_EQ(sequence_of_row(p.mask, 4).kv_begin, 7);
  EXPECT_EQ(row_place(p.mask, 4), "sequence 2 (query 1 of 2)");
  EXPECT_EQ(key_place(p.mask, 5), "key 0 of sequence 1");
}

TEST(Varlen, EachRowSeesOnlyItsOwnSequencesKeys) {
  const CoreProblem p = packed(MaskKind::none);
  for (std::int64_t i = 0; i < 5; ++i)
    for (std::int64_t j = 0; j < 8; ++j) {
      const bool own = i < 3 ? j < 5 : j == 7;
      EXPECT_EQ(p.mask.visible(p.shape, 0, 1, i, j), own) << i << "," << j;
    }
}

TEST(Varlen, CausalAlignmentAndWindowsUseEachSequencesOwnLengths) {
  CoreProblem p = packed(MaskKind::causal_bottom_right);
  // Sequence 0 (Tq 3, Tk 5): local query i sees j <= i + 2; sequence 2
  // (Tq 2, Tk 1): query 0 sees nothing (fully masked), query 1 key 0.
  EXPECT_TRUE(p.mask.visible(p.shape, 0, 0, 0, 2));
  EXPECT_FALSE(p.mask.visible(p.shape, 0, 0, 0, 3));
  EXPECT_TRUE(p.mask.visible(p.shape, 0, 0, 2, 4));
  EXPECT_FALSE(p.mask.visible(p.shape, 0, 0, 3, 7));
  EXPECT_TRUE(p.mask.visible(p.shape, 0, 0, 4, 7));
  p.mask.kind = MaskKind::causal_top_left;
  EXPECT_FALSE(p.mask.visible(p.shape, 0, 0, 0, 1));
  EXPECT_TRUE(p.mask.visible(p.shape, 0, 0, 3, 7));  // local (0, 0)
  p.mask.window_left = 0;                            // the diagonal only, per sequence
  EXPECT_TRUE(p.mask.visible(p.shape, 0, 0, 1, 1));
  EXPECT_FALSE(p.mask.visible(p.shape, 0, 0, 1, 0));
}

TEST(Varlen, TheKernelIsToldSequencesAndLargestLengths) {
  const CoreProblem p = packed(MaskKind::none);
  const CoreShape told = declared_shape(p.shape, p.mask);
  EXPECT_EQ(told.batch, 3);
  EXPECT_EQ(told.q_len, 3);
  EXPECT_EQ(told.kv_len, 5);
  EXPECT_EQ(declared_shape(p.shape, Mask{}), p.shape);
}

TEST(Varlen, ValidationNamesEachInconsistency) {
  EXPECT_TRUE(validate(packed(MaskKind::causal_bottom_right)).empty());
  auto first_field = [](const CoreProblem& p) {
    const auto e = validate(p);
    return e.empty() ? std::string("none") : e.front().field;
  };
  CoreProblem p = packed(MaskKind::none);
  p.mask.cu_kv_lens.back() = 9;
  EXPECT_EQ(first_field(p), "mask.cu_kv_lens[3]");
  p = packed(MaskKind::none);
  p.mask.cu_q_lens = {0, 4, 3, 5};
  EXPECT_EQ(first_field(p), "mask.cu_q_lens[2]");
  p = packed(MaskKind::none);
  p.mask.cu_kv_lens.pop_back();
  EXPECT_EQ(first_field(p), "mask.cu_kv_lens");
  p = packed(MaskKind::key_padding);
  p.mask.key_lengths = {8};
  EXPECT_EQ(first_field(p), "mask.kind");
  p = packed(MaskKind::none);
  p.shape.batch = 2;
  EXPECT_EQ(first_field(p), "shape.batch");
}

}  // namespace
}  // namespace headroom
