// tools/bench refuses a malformed or out-of-range option value as headroom
// does: one line on stderr naming the option, the value and the fix, and exit
// 2, before any measurement starts.
#include <gtest/gtest.h>

#include <sys/wait.h>

#include <algorithm>
#include <cstdlib>
#include <string>

#include "cli_support.h"

namespace headroom {
namespace {

struct Ran {
  int code = -1;
  std::string err;
};

Ran bench(const std::string& args) {
  const auto dir = testing::fresh_cli_dir("bench_options");
  const std::string line = std::string(HEADROOM_BENCH) + " " + args + " >/dev/null 2>" + (dir / "err").string();
  const int status = std::system(line.c_str());
  return {WIFEXITED(status) ? WEXITSTATUS(status) : -1, testing::file_text(dir / "err")};
}

TEST(BenchOptions, MalformedOrOutOfRangeValuesAreOneLineAndExit2) {
  const struct {
    const char* args;
    const char* option;
    const char* value;
  } cases[] = {
      {"--reps abc", "--reps", "\"abc\""},
      {"--reps 0", "--reps", "\"0\""},
      {"--threads -1", "--threads", "\"-1\""},
      {"--threads 4x", "--threads", "\"4x\""},
      {"--q-rows 1e3", "--q-rows", "\"1e3\""},
      {"--naive-rows 99999999999999999999", "--naive-rows", "\"99999999999999999999\""},
      {"--sizes 256:x", "--sizes", "\"x\""},
      {"--sizes 256", "--sizes", "\"256\""},
      {"--backward-sizes 64:0", "--backward-sizes", "\"0\""},
      {"--block-lengths 128,,512", "--block-lengths", "\"\""},
      {"--suites quick,fast", "--suites", "\"fast\""},
  };
  for (const auto& c : cases) {
    const Ran r = bench(c.args);
    EXPECT_EQ(r.code, 2) << c.args << ": " << r.err;
    EXPECT_EQ(std::count(r.err.begin(), r.err.end(), '\n'), 1) << c.args << ": " << r.err;
    EXPECT_EQ(r.err.rfind(std::string("bench: ") + c.option + ": ", 0), 0u) << c.args << ": " << r.err;
    EXPECT_NE(r.err.find(c.value), std::string::npos) << c.args << ": " << r.err;
    EXPECT_NE(r.err.find("(fix: "), std::string::npos) << c.args << ": " << r.err;
  }
}

}  // namespace
}  // namespace headroom
