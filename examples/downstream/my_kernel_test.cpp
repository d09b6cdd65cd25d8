// my_kernel on single corpus cases, through headroom::WithinBudget.
#include <gtest/gtest.h>

#include <filesystem>
#include <string>

#include "headroom/gtest_support.h"

namespace {

// A causal (bottom-right) case that exposes a kernel applying the mask from the
// wrong corner: corpora/causal_flipped/, found by `headroom hunt`.
const std::filesystem::path kCausalCase = std::filesystem::path(CORPORA_DIR) / "causal_flipped" /
                                          "gaussian-s17-z46-1x1x1x1x2x1x1-causal_bottom_right-p0.1.1.1.1.1.1.1.1.1";

TEST(MyKernel, WithinDefaultBudgetOnACausalCase) {
  EXPECT_TRUE(headroom::WithinBudget(MY_KERNEL, kCausalCase));
}

// The same assertion must be able to fail: the bundled specimen with the
// flipped causal mask is outside budget on that case, and the message says how
// to replay it.
TEST(MyKernel, FlawedSpecimenIsCaughtWithAReplay) {
  const ::testing::AssertionResult r = headroom::WithinBudget("causal_flipped", kCausalCase);
  EXPECT_FALSE(r);
  EXPECT_NE(std::string(r.message()).find("replay: "), std::string::npos) << r.message();
}

// Bad input is a failure naming the folder, never a pass or a crash.
TEST(MyKernel, MissingCaseFolderFails) {
  const ::testing::AssertionResult r = headroom::WithinBudget(MY_KERNEL, "no-such-case-folder");
  EXPECT_FALSE(r);
  EXPECT_NE(std::string(r.message()).find("no-such-case-folder"), std::string::npos) << r.message();
}

}  // namespace
