// headroom — the GoogleTest helper (gtest_support.h) on a backward kernel: the gradients are judged
// and their figures are in the message, a sound backward passes and a flawed one fails by them.
#include "headroom/gtest_support.h"

#include <gtest/gtest.h>

#include <string>

namespace headroom {
namespace {

const std::string kCase = HEADROOM_SOURCE_DIR "/corpora/backward_d_dropped/gaussian-s2-1x4x2x8x16x8x8-none";

TEST(WithinBudgetHelper, GivesEachGradientsFiguresAndFailsTheFlawedBackwardByThem) {
  const ::testing::AssertionResult sound = WithinBudget("f32_backward_tiled", kCase);
  const std::string said = sound.message();
  EXPECT_TRUE(sound) << said;
  EXPECT_NE(said.find("gradients judged, max scaled error fed the exact O and lse / end to end: d_q "), std::string::npos)
      << said;
  EXPECT_NE(said.find(", d_k "), std::string::npos) << said;
  EXPECT_NE(said.find(", d_v "), std::string::npos) << said;
  // D_i dropped: the forward is sound, the gradients are not (corpora/README.md).
  const ::testing::AssertionResult flawed = WithinBudget("backward_d_dropped", kCase);
  const std::string why = flawed.message();
  EXPECT_FALSE(flawed) << why;
  EXPECT_NE(why.find("reason: d_q max_gradient_scaled_error"), std::string::npos) << why;
  EXPECT_NE(why.find("gradients judged"), std::string::npos) << why;
  // A forward-only kernel says nothing of gradients.
  const std::string forward_only = WithinBudget("f32_tiled_64", kCase).message();
  EXPECT_EQ(forward_only.find("gradient"), std::string::npos) << forward_only;
}

}  // namespace
}  // namespace headroom
