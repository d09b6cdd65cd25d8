// The command line's usage errors: one line naming the option and the fix, the
// nearest valid name for a misspelling, outputs checked before any case runs,
// and budget sections that name no kernel of the run.
#include <gtest/gtest.h>

#include <algorithm>
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

fs::path fresh_dir(const std::string& name) { return testing::fresh_cli_dir("usage_" + name); }
std::string read_file(const fs::path& p) { return testing::file_text(p); }

struct Outcome {
  int code = -1;
  std::string out, err;
};

// Runs headroom with `args` in `dir`; captures stdout and stderr.
Outcome run(const std::string& args, const fs::path& dir) {
  Outcome o;
  o.code = testing::shell_in(dir, kTool + " " + args + " >stdout.txt 2>stderr.txt");
  o.out = read_file(dir / "stdout.txt");
  o.err = read_file(dir / "stderr.txt");
  return o;
}

std::size_t lines(const std::string& s) { return static_cast<std::size_t>(std::count(s.begin(), s.end(), '\n')); }

// A usage error: exit 2, one line on stderr holding every needle and a fix.
void expect_usage_error(const Outcome& o, std::initializer_list<const char*> needles) {
  EXPECT_EQ(o.code, 2) << o.err;
  EXPECT_EQ(lines(o.err), 1u) << o.err;
  EXPECT_NE(o.err.find("(fix: "), std::string::npos) << o.err;
  EXPECT_LT(o.err.size(), 400u) << o.err;
  for (const char* n : needles) EXPECT_NE(o.err.find(n), std::string::npos) << "no \"" << n << "\" in: " << o.err;
}

TEST(Usage, UnknownCommandSuggestsTheNearest) {
  const auto dir = fresh_dir("command");
  expect_usage_error(run("qualfy --kernel f32_textbook", dir), {"unknown command \"qualfy\"", "`headroom qualify`"});
  expect_usage_error(run("case mak --family gaussian", dir), {"unknown command \"mak\"", "`headroom case make`"});
  expect_usage_error(run("", dir), {"no command given", "qualify"});
}

TEST(Usage, HelpIsACommandToo) {
  const auto dir = fresh_dir("help");
  Outcome o = run("help", dir);
  EXPECT_EQ(o.code, 0);
  EXPECT_NE(o.out.find("qualify"), std::string::npos) << o.out;
  o = run("help qualify", dir);
  EXPECT_EQ(o.code, 0);
  EXPECT_NE(o.out.find("--determinism-runs"), std::string::npos) << o.out;
}

TEST(Usage, UnknownOptionSuggestsTheNearestOfItsCommand) {
  const auto dir = fresh_dir("option");
  expect_usage_error(run("qualify --kernel f32_textbook --threds 2", dir),
                     {"headroom qualify: unknown option --threds", "did you mean --threads?"});
  expect_usage_error(run("compare a.json b.json --tolerence 0.2", dir), {"unknown option --tolerence", "--tolerance"});
}

TEST(Usage, BadValuesAndMissingArgumentsNameTheOptionAndTheFix) {
  const auto dir = fresh_dir("values");
  expect_usage_error(run("qualify --kernel f32_textbook --time-limit 0", dir), {"--time-limit", "\"0\" is not a number above 0"});
  expect_usage_error(run("replay --kernel f32_textbook", dir), {"headroom replay", "CASE_DIR", "case folders"});
  expect_usage_error(run("case make --family gaussian --seed 1", dir), {"--out is required", "case folder"});
}

TEST(Usage, OutputsAreCheckedBeforeAnyCaseRuns) {
  const auto dir = fresh_dir("outputs");
  // The deep suite would take minutes: an error after it would be seconds away only if checked first.
  Outcome o = run("qualify --kernel f32_textbook --suite deep --markdown missing/review.md", dir);
  expect_usage_error(o, {"--markdown missing/review.md", "does not exist", "mkdir -p missing"});
  EXPECT_FALSE(fs::exists(dir / "headroom-qualify.journal"));  // no case was run
  // A missing --json folder is reported as --json, not as a journal the user never named.
  o = run("qualify --kernel f32_textbook --suite deep --json gone/run.json", dir);
  expect_usage_error(o, {"--json gone/run.json", "does not exist"});
  EXPECT_EQ(o.err.find(".journal"), std::string::npos) << o.err;
  o = run("qualify --kernel f32_textbook --suite deep --html .", dir);
  expect_usage_error(o, {"--html .", "is a folder"});
}

TEST(Usage, CaseMakeCreatesTheParentOfItsOut) {
  const auto dir = fresh_dir("case_make");
  const Outcome o = run("case make --family gaussian --seed 3 --size 10 --out cases/today/c1", dir);
  EXPECT_EQ(o.code, 0) << o.err;
  EXPECT_TRUE(fs::exists(dir / "cases/today/c1/manifest.json"));
}

TEST(Usage, BudgetSectionForNoKernelOfTheRunWarnsOrFailsWhenStrict) {
  const auto dir = fresh_dir("budget");
  std::ofstream(dir / "b.toml") << "version = 1\n\n[kernel.f16_f32ac]\nmax_scaled_error = 0.5\n";
  const std::string common = "replay --kernel f16_f32acc --budget b.toml --determinism-runs 1 " + kSource +
                             "/corpora/f16_late_scale --json run.json";
  Outcome o = run(common + " --strict-budget", dir);
  expect_usage_error(o, {"b.toml", "line 3", "[kernel.f16_f32ac] names no kernel of this run", "[kernel.f16_f32acc]"});
  EXPECT_FALSE(fs::exists(dir / "run.json"));

  o = run(common, dir);
  EXPECT_NE(o.err.find("warning: b.toml line 3: [kernel.f16_f32ac] names no kernel of this run"), std::string::npos)
      << o.err;
  EXPECT_NE(o.out.find("did you mean [kernel.f16_f32acc]?"), std::string::npos) << o.out;  // in the summary too
  const RunRecord r = read_run_record(dir / "run.json");
  ASSERT_EQ(r.warnings.size(), 1u);
  EXPECT_NE(r.warnings[0].find("[kernel.f16_f32ac]"), std::string::npos);
}

}  // namespace
}  // namespace headroom
