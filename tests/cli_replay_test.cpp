// The replay command printed for a failing case reproduces its verdict: the
// binary as invoked, --kernel or --kernel-cmd, the budget and every judging
// option that differs from its default. Each test runs the printed line.
#include <gtest/gtest.h>

#include <filesystem>
#include <fstream>
#include <string>

#include "cli_support.h"
#include "headroom/record.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;
using testing::kSource;
using testing::kTool;

fs::path fresh_dir(const std::string& name) { return testing::fresh_cli_dir("replay_" + name); }

// Runs `command` in `dir` with PATH holding no headroom; returns the exit code.
int shell(const std::string& command, const fs::path& dir) {
  return testing::shell_in(dir, "PATH=/usr/bin:/bin && " + command + " >/dev/null 2>&1");
}

void write(const fs::path& p, const std::string& text) { std::ofstream(p) << text; }

const CaseRecord* first_failing(const RunRecord& r) {
  for (const auto& c : r.cases)
    if (!c.within_budget) return &c;
  return nullptr;
}

TEST(Replay, GeneratedCaseLineCarriesBinaryBudgetAndJudgingOptions) {
  const auto dir = fresh_dir("generated");
  // Under this budget the textbook kernel fails (no ULP error allowed); under the defaults it passes.
  write(dir / "b.toml", "version = 1\n[kernel.f32_textbook]\nmax_ulp = 0\n");
  ASSERT_EQ(shell(kTool + " qualify --kernel f32_textbook --suite quick --shard 1/4 --budget b.toml --determinism-runs 1 "
                          "--time-limit 30 --json run.json",
                  dir),
            1);
  const RunRecord r = read_run_record(dir / "run.json");
  const CaseRecord* c = first_failing(r);
  ASSERT_NE(c, nullptr);
  EXPECT_EQ(c->replay.rfind(kTool + " case make ", 0), 0u) << c->replay;
  EXPECT_NE(c->replay.find(" && " + kTool + " replay --kernel f32_textbook --budget b.toml"), std::string::npos)
      << c->replay;
  EXPECT_NE(c->replay.find("--time-limit 30"), std::string::npos) << c->replay;
  EXPECT_NE(c->replay.find("--determinism-runs 1"), std::string::npos) << c->replay;
  // The printed line gives the same verdict: exit 1.
  EXPECT_EQ(shell(c->replay, dir), 1) << c->replay;
}

TEST(Replay, ExternalProgramLineUsesKernelCmd) {
  const auto dir = fresh_dir("program");
  const std::string program = "/usr/bin/python3 " + kSource + "/examples/external/numpy_kernel.py";
  write(dir / "b.toml", "version = 1\n[kernel.numpy_textbook]\nmax_scaled_error = 0\n");
  ASSERT_EQ(shell(kTool + " replay --kernel-cmd '" + program + "' --budget b.toml --determinism-runs 1 " + kSource +
                      "/corpora/racy_reduction --json run.json",
                  dir),
            1);
  const RunRecord r = read_run_record(dir / "run.json");
  const CaseRecord* c = first_failing(r);
  ASSERT_NE(c, nullptr);
  EXPECT_NE(c->replay.find(" replay --kernel-cmd '" + program + "' --budget b.toml"), std::string::npos) << c->replay;
  EXPECT_EQ(shell(c->replay, dir), 1) << c->replay;
}

}  // namespace
}  // namespace headroom
