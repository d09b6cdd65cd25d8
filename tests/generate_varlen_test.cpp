// headroom tests — the varlen_edges family (families.h): valid packed cases
// that reach lengths 0 and 1, one long sequence among short ones, offsets on
// tile edges and Tq ≠ Tk per sequence, at small and production shapes.
#include <gtest/gtest.h>

#include <set>

#include "headroom/generate.h"
#include "headroom/varlen.h"

namespace headroom {
namespace {

CaseRequest request(std::uint64_t seed) {
  CaseRequest r;
  r.family = "varlen_edges";
  r.seed = seed;
  return r;
}

TEST(GenerateVarlen, CasesAreValidPackedBatchesCoveringTheEdges) {
  bool zero_q = false, zero_kv = false, one = false, ragged = false, long_among_short = false;
  std::set<std::int64_t> tile_offsets;
  for (std::uint64_t seed = 1; seed <= 40; ++seed) {
    const Case c = make_case(request(seed));
    SCOPED_TRACE(c.name);
    ASSERT_TRUE(validate(c.core, c.core_inputs).empty()) << validate(c.core, c.core_inputs).front().message();
    const Mask& m = c.core.mask;
    ASSERT_TRUE(m.is_varlen());
    ASSERT_GE(sequence_count(m), 2);
    EXPECT_TRUE(m.kind == MaskKind::none || m.kind == MaskKind::causal_top_left ||
                m.kind == MaskKind::causal_bottom_right);
    std::int64_t longest = 0, shortest = 1 << 30;
    for (std::int64_t n = 0; n < sequence_count(m); ++n) {
      const SequenceSpan q = sequence(m, n);
      zero_q |= q.q_len == 0;
      zero_kv |= q.kv_len == 0;
      one |= q.q_len == 1 && q.kv_len == 1;
      ragged |= q.q_len > 1 && q.kv_len > 1 && q.q_len != q.kv_len;
      longest = std::max(longest, q.kv_len);
      shortest = std::min(shortest, q.kv_len);
      for (std::int64_t t : {16, 32, 64, 128})
        if (q.kv_begin > 0 && q.kv_begin % t == 0) tile_offsets.insert(t);
    }
    long_among_short |= longest >= 16 && shortest <= 3;
  }
  EXPECT_TRUE(zero_q);
  EXPECT_TRUE(zero_kv);
  EXPECT_TRUE(one);
  EXPECT_TRUE(ragged);
  EXPECT_TRUE(long_among_short);
  EXPECT_TRUE(tile_offsets.count(16) && tile_offsets.count(32) && tile_offsets.count(64)) << tile_offsets.size();
}

TEST(GenerateVarlen, ARequestedShapeIsReadAsSequencesAndLargestLengths) {
  for (std::uint64_t seed = 1; seed <= 3; ++seed) {
    CaseRequest r = request(seed);
    r.shape = CoreShape{8, 2, 1, 64, 1025, 128, 128};
    const Case c = make_case(r);
    ASSERT_TRUE(validate(c.core, c.core_inputs).empty());
    const CoreShape told = declared_shape(c.core.shape, c.core.mask);
    EXPECT_EQ(told.batch, 8);
    EXPECT_LE(told.q_len, 64);
    EXPECT_LE(told.kv_len, 1025);
    EXPECT_EQ(c.core.shape.q_heads, 2);
    EXPECT_EQ(c.core.shape.key_dim, 128);
  }
  // A key-padding request falls back to no mask: the lengths replace padding.
  CaseRequest padded = request(1);
  padded.mask = MaskKind::key_padding;
  const Case c = make_case(padded);
  EXPECT_EQ(c.core.mask.kind, MaskKind::none);
  EXPECT_TRUE(validate(c.core, c.core_inputs).empty());
}

}  // namespace
}  // namespace headroom
