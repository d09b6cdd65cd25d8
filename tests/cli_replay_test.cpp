// The replay command printed for a failing case reproduces its verdict: the
// binary as invoked, --kernel or --kernel-cmd, the budget and every judging
// option that differs from its default. Each test runs the printed line.
#include <gtest/gtest.h>

#include <filesystem>
#include <fstream>
#include <map>
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

TEST(Replay, ACorpusIsReadOneFolderAtATimeAndKeepsNamesUnique) {
  // Folders are planned first (each read whole, so a malformed one is refused
  // before anything runs) and read again when their turn comes. Two corpora
  // holding the same case give two records, the second named after its folder.
  const auto dir = fresh_dir("two_corpora");
  const fs::path one = kSource + "/corpora/no_max_shift";
  fs::copy(one, dir / "copy", fs::copy_options::recursive);
  ASSERT_EQ(shell(kTool + " replay --kernel f32_textbook --determinism-runs 1 --json run.json " + one.string() + " copy",
                  dir),
            0);
  const RunRecord r = read_run_record(dir / "run.json");
  std::map<std::string, const CaseRecord*> by_name;
  for (const auto& c : r.cases) by_name[c.name] = &c;
  std::size_t pairs = 0;
  for (const auto& c : r.cases) {
    const std::size_t at = c.name.find('@');
    if (at == std::string::npos) continue;
    ++pairs;
    EXPECT_EQ(c.name.compare(at + 1, 5, "copy/"), 0) << c.name << ": named after the copy's folder";
    const auto twin = by_name.find(c.name.substr(0, at));
    ASSERT_NE(twin, by_name.end()) << c.name;
    // The same values judged again: the same figures, bit for bit.
    EXPECT_EQ(c.figures.max_scaled_error, twin->second->figures.max_scaled_error) << c.name;
    EXPECT_EQ(c.figures.rmse, twin->second->figures.rmse) << c.name;
  }
  EXPECT_GT(pairs, 0u);
  EXPECT_EQ(2 * pairs, r.cases.size()) << "every case of the copy is named after its folder";
}

}  // namespace
}  // namespace headroom
