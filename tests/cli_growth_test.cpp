// Error growth end to end: `qualify --shape` at four Tk gives each family a fit
// that the terminal report prints; a budget's max_growth_exponent fails the
// run (exit 1) and says why, and the JSON record carries the fit and the limit.
#include <gtest/gtest.h>

#include <fstream>
#include <string>

#include "cli_support.h"
#include "headroom/error_growth.h"
#include "headroom/record.h"

namespace headroom {
namespace {

using namespace headroom::testing;

const std::string kShapes =
    " --family gaussian --shape 1,2,1,4,64,32,32 --shape 1,2,1,4,256,32,32 --shape 1,2,1,4,1024,32,32"
    " --shape 1,2,1,4,4096,32,32";

TEST(CliGrowth, ReportsTheExponentAndABudgetCapsIt) {
  const auto dir = fresh_cli_dir("growth");
  ASSERT_EQ(shell_in(dir, kTool + " qualify --kernel f32_textbook" + kShapes + " --json r.json >out.txt 2>&1"), 0)
      << file_text(dir / "out.txt");
  const std::string out = file_text(dir / "out.txt");
  EXPECT_NE(out.find("float32: growth exponent"), std::string::npos) << out;
  const RunRecord r = read_run_record(dir / "r.json");
  const auto g = error_growth(r.cases);
  ASSERT_EQ(g.size(), 1u);
  ASSERT_EQ(g[0].families.size(), 1u);
  EXPECT_EQ(g[0].families[0].lengths, 4u);
  // A sound float32 kernel: well below the exponent 1 of an error that grows with every key.
  EXPECT_LT(g[0].exponent, 0.9);

  std::ofstream(dir / "b.toml") << "[format.float32]\nmax_growth_exponent = 0\n";
  EXPECT_EQ(shell_in(dir, kTool + " qualify --kernel f32_textbook --budget b.toml" + kShapes +
                              " --json capped.json >out.txt 2>&1"),
            1)
      << file_text(dir / "out.txt");
  EXPECT_NE(file_text(dir / "out.txt").find("is above the limit 0 (b.toml line 2)"), std::string::npos)
      << file_text(dir / "out.txt");
  const RunRecord capped = read_run_record(dir / "capped.json");
  EXPECT_EQ(capped.growth_limit, 0);
  EXPECT_EQ(capped.verdict(), "fail");
  for (const auto& c : capped.cases) EXPECT_TRUE(c.within_budget) << "the cap fails the run, not a case";
}

// A row dominated by one key (attention_sink: key 0 leads by 16-20 nats, the
// other 4095 keys weigh about e^-16 to e^-20 each) summed weight by weight in
// float32: once l ≈ 1, every weight below half its ulp (2^-24) rounds away, all
// in the same direction, so the error grows with every key instead of as √n
// (stagnation; checked outside headroom with NumPy float32 emulation of such a
// loop on this case: l = 1.0000324 against the exact 1.0000958). The default
// budget must fail that — the test-only textbook kernel of
// tests/plugins/shape_defect_plugin.c keeps one running sum — and must pass the
// same row summed a tile or a block at a time (Dao et al. 2022, alg. 1; Higham
// 2002, §4.2), as the bundled float32 kernels do.
TEST(CliGrowth, WeightByWeightSumsStagnateOnASinkRowAndTileSumsDoNot) {
  const auto dir = fresh_cli_dir("stagnation");
  const std::string shape = " --family attention_sink --shape 1,4,1,4,4096,64,64";
  const std::string one_running_sum = std::string(HEADROOM_SHAPE_DEFECT_DIR) + "/libshape_defect_0.so";
  EXPECT_EQ(shell_in(dir, kTool + " qualify --kernel " + one_running_sum + shape + " >out.txt 2>&1"), 1)
      << file_text(dir / "out.txt");
  EXPECT_NE(file_text(dir / "out.txt").find("max_rel_rmse"), std::string::npos) << file_text(dir / "out.txt");
  for (const std::string kernel : {"f32_textbook", "f32_tiled_64", "gqa_f32"})
    EXPECT_EQ(shell_in(dir, kTool + " qualify --kernel " + kernel + shape + " >out.txt 2>&1"), 0)
        << kernel << ": " << file_text(dir / "out.txt");
}

}  // namespace
}  // namespace headroom
