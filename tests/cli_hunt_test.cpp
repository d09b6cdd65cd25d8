// hunt with its size knob: production shapes for half the cases of the
// families that take any shape (none without the knob), and a defect that
// lives only at group size 8 found there and shrunk to the smallest shape
// that still shows it (tests/plugins/shape_defect_plugin.c, defect 3).
#include <gtest/gtest.h>

#include <optional>
#include <string>

#include "cli_support.h"
#include "headroom/hunt.h"
#include "headroom/input_error.h"
#include "headroom/record.h"
#include "headroom/run_summary.h"
#include "headroom/shape_draw.h"

namespace headroom {
namespace {

using namespace headroom::testing;

TEST(CliHunt, SmallShapesWithoutTheKnob) {
  HuntOptions opt;
  opt.cases = 300;
  for (const auto& r : hunt_requests(opt, Level::core)) EXPECT_FALSE(r.shape) << r.family << " " << r.seed;
}

TEST(CliHunt, KnobGivesHalfTheShapeFamiliesProductionShapes) {
  HuntOptions opt;
  opt.cases = 600;
  opt.max_kv_len = 16384;
  std::size_t shaped = 0, could = 0;
  std::int64_t longest = 0;
  for (const auto& r : hunt_requests(opt, Level::core)) {
    if (!takes_any_shape(r.family)) {
      EXPECT_FALSE(r.shape) << r.family << " chooses its own lengths";
      continue;
    }
    ++could;
    if (!r.shape) continue;
    ++shaped;
    longest = std::max(longest, r.shape->kv_len);
    const CoreShape s = draw_production_shape(r.seed, opt.max_kv_len);
    EXPECT_EQ(r.shape->kv_len, s.kv_len);
    EXPECT_GE(r.shape->key_dim, 64);
  }
  EXPECT_NEAR(shaped / double(could), 0.5, 0.1) << shaped << " of " << could;
  EXPECT_GT(longest, 4096);
  for (std::int64_t bad : {8, 1 << 18}) {
    opt.max_kv_len = bad;
    EXPECT_THROW(hunt_requests(opt, Level::core), InputError);
  }
  const auto dir = fresh_cli_dir("hunt_knob");
  EXPECT_EQ(shell_in(dir, kTool + " hunt --kernel f32_textbook --cases 1 --max-kv-len 8 >out.txt 2>&1"), 2);
  EXPECT_NE(file_text(dir / "out.txt").find("--max-kv-len"), std::string::npos) << file_text(dir / "out.txt");
}

// The first seed whose hunt case (gaussian alone, one case) has a production
// shape with 8 query heads per kv head over more than one kv head, cheap to judge.
std::optional<std::uint64_t> seed_at_group_8(std::int64_t max_kv_len) {
  HuntOptions opt;
  opt.cases = 1;
  opt.families = {"gaussian"};
  opt.max_kv_len = max_kv_len;
  for (std::uint64_t seed = 1; seed < 2000; ++seed) {
    opt.seed = seed;
    const auto r = hunt_requests(opt, Level::core).front();
    if (!r.shape) continue;
    const CoreShape& s = *r.shape;
    if (s.q_heads / s.kv_heads == 8 && s.kv_heads > 1 && s.batch * s.q_heads * s.q_len * s.kv_len <= (1 << 16))
      return seed;
  }
  return std::nullopt;
}

TEST(CliHunt, FindsAGroup8DefectAtAProductionShapeAndShrinksIt) {
  const auto seed = seed_at_group_8(256);
  ASSERT_TRUE(seed);
  const auto dir = fresh_cli_dir("hunt_group8");
  const std::string plugin = std::string(HEADROOM_SHAPE_DEFECT_DIR) + "/libshape_defect_3.so";
  // Without the knob the same hunt draws no group of 8: it passes.
  EXPECT_EQ(shell_in(dir, kTool + " hunt --quiet --kernel " + plugin + " --family gaussian --cases 1 --seed " +
                              std::to_string(*seed) + " >out.txt 2>&1"),
            0)
      << file_text(dir / "out.txt");
  ASSERT_EQ(shell_in(dir, kTool + " hunt --kernel " + plugin + " --family gaussian --cases 1 --max-kv-len 256 --seed " +
                              std::to_string(*seed) + " --save saved --json r.json >out.txt 2>&1"),
            1)
      << file_text(dir / "out.txt");
  const std::string out = file_text(dir / "out.txt");
  EXPECT_NE(out.find("found budget"), std::string::npos) << out;
  const RunRecord r = read_run_record(dir / "r.json");
  ASSERT_EQ(r.cases.size(), 1u);
  const CaseRecord& c = r.cases.front();
  EXPECT_FALSE(c.within_budget);
  EXPECT_TRUE(c.faults.empty()) << "a wrong kv head is an error-budget failure, not a fault";
  // The smallest shape with a group of 8 over more than one kv head: every
  // other extent shrunk to 1, so each further shrink loses the group or the
  // second kv head and passes.
  const auto s = parse_shape(c.level, c.shape);
  ASSERT_TRUE(s) << c.shape;
  EXPECT_EQ(std::make_tuple(s->batch, s->q_heads, s->kv_heads, s->q_len, s->kv_len, s->key_dim, s->value_dim),
            std::make_tuple(1, 16, 2, 1, 1, 1, 1))
      << c.name;
  EXPECT_NE(c.replay.find("saved/"), std::string::npos) << c.replay;
}

}  // namespace
}  // namespace headroom
