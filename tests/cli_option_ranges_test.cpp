// Every numeric option of every headroom command, at and past the ends of its
// range: a value the program cannot honour is refused by the parser (exit 2,
// one line naming the option, the value, the range and the fix) before any
// work; the values at the ends are accepted. Cheap: no case runs.
#include <gtest/gtest.h>

#include <algorithm>
#include <filesystem>
#include <string>
#include <vector>

#include "cli_support.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;
using testing::kTool;

struct Outcome {
  int code = -1;
  std::string err;
};

Outcome run(const fs::path& dir, const std::string& args) {
  Outcome o;
  o.code = testing::shell_in(dir, kTool + " " + args + " >stdout.txt 2>stderr.txt");
  o.err = testing::file_text(dir / "stderr.txt");
  return o;
}

// One option: a command line on which it is the only thing the parser can
// refuse (what follows the parse then fails on purpose, cheaply, with a
// message naming something else), the ends of its range, and values past them.
struct OptionRange {
  const char* command;  ///< e.g. "qualify --kernel no_such_kernel"
  const char* option;
  const char* range;    ///< as the message says it
  std::vector<std::string> accepted;
  std::vector<std::string> refused;
};

// "no_such_kernel", a missing case folder or record: each command then stops
// at its first input, after the parser has let the option through.
const std::vector<OptionRange>& table() {
  static const std::vector<OptionRange> rows = {
      {"qualify --kernel no_such_kernel", "--threads", "an integer from 0 to 1024", {"0", "1024"},
       {"-1", "1025", "4294967297", "2.5", "abc", "", "1e3"}},
      {"hunt --kernel no_such_kernel", "--threads", "an integer from 0 to 1024", {"0", "1024"}, {"-1", "1025"}},
      {"replay --kernel no_such_kernel no_such_folder", "--threads", "an integer from 0 to 1024", {"1"}, {"-1"}},
      {"qualify --kernel no_such_kernel", "--time-limit", "a number above 0 and at most 1000000",
       {"1e-3", "1000000"}, {"0", "-1", "1000001", "1e300", "nan", "inf", "20s"}},
      {"hunt --kernel no_such_kernel", "--time-limit", "a number above 0 and at most 1000000", {"20"}, {"0"}},
      {"qualify --kernel no_such_kernel", "--determinism-runs", "an integer from 1 to 100", {"1", "100"},
       {"0", "101", "-2"}},
      {"qualify --kernel no_such_kernel", "--shard", "i/n with 1 ≤ i ≤ n ≤ 100000", {"1/1", "100000/100000"},
       {"3/2", "0/2", "1/0", "-1/2", "1/100001", "1/2x", "+1/2", " 1/2", "1", "99999999999999999999/2"}},
      {"hunt --kernel no_such_kernel", "--cases", "an integer from 1 to 1000000", {"1", "1000000"},
       {"0", "-5", "1000001"}},
      {"hunt --kernel no_such_kernel", "--seed", "an integer from 0 to 18446744073709551615", {"0", "18446744073709551615"},
       {"-1", "18446744073709551616", "0x10", "1.5"}},
      {"hunt --kernel no_such_kernel", "--max-shrink-steps", "an integer from 0 to 100000", {"0", "100000"},
       {"-1", "100001"}},
      {"hunt --kernel no_such_kernel", "--max-kv-len", "an integer from 16 to 131072", {"0", "16", "131072"},
       {"1", "15", "131073", "-16"}},
      {"reference --case no_such_folder --out out", "--threads", "an integer from 0 to 1024", {"0", "1024"},
       {"-1", "1025"}},
      {"reference --case no_such_folder --out out", "--target-log2", "an integer from -1000 to -53", {"-1000", "-53"},
       {"-52", "5000", "-1001", "0"}},
      {"compare no_such_base.json no_such_new.json", "--tolerance", "a number from 0 to 1000", {"0", "1000", "0.1"},
       {"-0.1", "1001", "nan", "inf", "-inf"}},
      {"case make --family no_such_family --out c", "--seed", "an integer from 0 to 18446744073709551615",
       {"0", "18446744073709551615"}, {"-1", "18446744073709551616"}},
      {"case make --family no_such_family --seed 1 --out c", "--size", "an integer from 0 to 1000", {"0", "1000"},
       {"-1", "1001"}},
      {"case make --family no_such_family --seed 1 --out c", "--model-dim", "an integer from 1 to 67108864",
       {"1", "67108864"}, {"0", "67108865", "-512"}},
  };
  return rows;
}

std::string shell_word(const std::string& s) { return "'" + s + "'"; }

TEST(OptionRanges, ValuesPastEitherEndAreRefusedByTheParserNamingOptionValueRangeAndFix) {
  const fs::path dir = testing::fresh_cli_dir("option_ranges_refused");
  int checked = 0;
  for (const OptionRange& r : table())
    for (const std::string& v : r.refused) {
      const std::string line = std::string(r.command) + " " + r.option + " " + shell_word(v);
      const Outcome o = run(dir, line);
      SCOPED_TRACE(line);
      EXPECT_EQ(o.code, 2) << o.err;
      EXPECT_EQ(std::count(o.err.begin(), o.err.end(), '\n'), 1) << o.err;
      EXPECT_NE(o.err.find(std::string(r.option) + ": \"" + v + "\""), std::string::npos) << o.err;
      EXPECT_NE(o.err.find(r.range), std::string::npos) << o.err;
      EXPECT_NE(o.err.find("(fix: write e.g. " + std::string(r.option) + " "), std::string::npos) << o.err;
      ++checked;
    }
  EXPECT_GE(checked, 60);
  // Nothing ran: no journal, no record, no case folder.
  for (const auto& e : fs::directory_iterator(dir))
    EXPECT_TRUE(e.path().filename() == "stdout.txt" || e.path().filename() == "stderr.txt") << e.path();
}

TEST(OptionRanges, TheEndsOfEachRangeAreAccepted) {
  const fs::path dir = testing::fresh_cli_dir("option_ranges_accepted");
  for (const OptionRange& r : table())
    for (const std::string& v : r.accepted) {
      const std::string line = std::string(r.command) + " " + r.option + " " + shell_word(v);
      const Outcome o = run(dir, line);
      SCOPED_TRACE(line);
      // The run stops at its deliberately missing kernel, folder, record or
      // family, not at the option.
      EXPECT_EQ(o.code, 2) << o.err;
      EXPECT_EQ(o.err.find(std::string(r.option) + ":"), std::string::npos) << o.err;
      EXPECT_TRUE(o.err.find("no_such") != std::string::npos) << o.err;
    }
}

}  // namespace
}  // namespace headroom
