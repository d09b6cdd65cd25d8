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

}  // namespace
}  // namespace headroom
