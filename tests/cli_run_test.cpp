// End-to-end tests of the command line: exit codes, an interrupted run resumed
// from its journal, and shards merged into the unsharded record.
#include <gtest/gtest.h>

#include <signal.h>
#include <sys/wait.h>
#include <unistd.h>

#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <string>
#include <thread>
#include <vector>

#include "headroom/record.h"
#include "leftovers.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;

const std::string kTool = std::string(HEADROOM_BINARY_DIR) + "/tools/headroom";
const std::string kSource = HEADROOM_SOURCE_DIR;

fs::path fresh_dir(const std::string& name) {
  fs::path d = fs::temp_directory_path() / ("headroom_cli_test_" + name + "_" + std::to_string(::getpid()));
  fs::remove_all(d);
  fs::create_directories(d);
  return d;
}

int run(const std::string& args) {
  const int status = std::system((kTool + " " + args + " >/dev/null 2>&1").c_str());
  return WIFEXITED(status) ? WEXITSTATUS(status) : -1;
}

std::size_t lines_in(const fs::path& p) {
  std::ifstream in(p);
  std::size_t n = 0;
  for (std::string line; std::getline(in, line);) ++n;
  return n;
}

TEST(Cli, ExitCodesSayPassFailAndBadInput) {
  const auto dir = fresh_dir("codes");
  EXPECT_EQ(run("qualify --kernel f32_textbook --budget " + kSource + "/budgets/bundled.toml --json " +
                (dir / "a.json").string()),
            0);
  EXPECT_EQ(run("replay --kernel oob_write_row " + kSource + "/corpora/oob_write_row --json " + (dir / "b.json").string()), 1);
  EXPECT_EQ(run("qualify --kernel no_such_kernel"), 2);
  EXPECT_EQ(run("replay --kernel f32_textbook " + (dir / "missing").string()), 2);
  EXPECT_EQ(run("qualify --kernel f32_textbook --shard 4/3"), 2);
  EXPECT_EQ(run("qualify --kernel f32_textbook --budget " + (dir / "none.toml").string()), 2);
  EXPECT_EQ(run("frobnicate"), 2);
}

TEST(Cli, KilledRunResumesToTheUninterruptedRecord) {
  const auto dir = fresh_dir("resume");
  // Standard's small families (its production-shaped sections would make this slow).
  const std::string common = "qualify --kernel f32_tiled_16 --suite standard --family masks --family tile_edges "
                             "--family ragged --family long_sequence --family block_gaussian --no-isolation "
                             "--determinism-runs 1 ";
  ASSERT_EQ(run(common + "--json " + (dir / "whole.json").string()), 0);

  const fs::path out = dir / "cut.json", journal = dir / "cut.json.journal";
  const pid_t pid = fork();
  ASSERT_GE(pid, 0);
  if (pid == 0) {
    const std::string cmd = "exec " + kTool + " " + common + "--json " + out.string() + " >/dev/null 2>&1";
    ::execl("/bin/sh", "sh", "-c", cmd.c_str(), static_cast<char*>(nullptr));
    _exit(127);
  }
  // Kill it (SIGKILL: nothing gets to clean up) once a few cases are journaled.
  const auto deadline = std::chrono::steady_clock::now() + std::chrono::seconds(120);
  while (lines_in(journal) < 6 && std::chrono::steady_clock::now() < deadline)
    std::this_thread::sleep_for(std::chrono::milliseconds(20));
  ::kill(pid, SIGKILL);
  int status = 0;
  ::waitpid(pid, &status, 0);
  ASSERT_GE(lines_in(journal), 6u) << "the run did not journal cases in time";
  ASSERT_FALSE(fs::exists(out)) << "the run finished before it could be killed";

  ASSERT_EQ(run(common + "--resume --json " + out.string()), 0);
  const RunRecord whole = read_run_record(dir / "whole.json");
  const RunRecord resumed = read_run_record(out);
  EXPECT_EQ(to_json(resumed), to_json(whole));
  EXPECT_FALSE(fs::exists(journal)) << "a finished run leaves no journal";
}

TEST(Cli, CtrlCOrSigtermTakesTheRunningExternalProgramDown) {
  // The program runs in a process group of its own, so neither a terminal's
  // Ctrl-C nor a SIGTERM to headroom reaches it; headroom must end it itself,
  // and remove the folder it exchanges files through. A SIGKILLed headroom
  // can do neither: the program's supervisor ends it (the folder is swept by
  // the next run, AbandonedExchangeFoldersAreSwept).
  const auto dir = fresh_dir("signals");
  std::ofstream(dir / "prog.sh") << R"(#!/bin/sh
here=$(dirname "$0")
if [ "$1" = describe ]; then
  echo '{"protocol": 1, "name": "sleeper", "level": "core", "input_format": "float32", "output_format": "float32",'
  echo ' "mask_kinds": ["none", "causal_top_left", "causal_bottom_right", "key_padding", "dense", "bias"], "masked_row": "zeros"}'
  exit 0
fi
echo $$ > "$here/program.pid.tmp" && mv "$here/program.pid.tmp" "$here/program.pid"
exec sleep 120
)";
  fs::permissions(dir / "prog.sh", fs::perms::owner_all);
  const fs::path tmp = dir / "tmp";  // the exchange folders of this test's headroom only
  for (const int sig : {SIGINT, SIGTERM, SIGHUP, SIGKILL}) {
    fs::remove(dir / "program.pid");
    fs::remove_all(tmp);
    fs::create_directories(tmp);
    const pid_t headroom_pid = fork();
    ASSERT_GE(headroom_pid, 0);
    if (headroom_pid == 0) {
      const std::string cmd = "TMPDIR=" + tmp.string() + " exec " + kTool +
                              " qualify --suite quick --time-limit 300 --kernel-cmd " +
                              (dir / "prog.sh").string() + " --json " + (dir / "out.json").string() +
                              " >/dev/null 2>&1";
      ::execl("/bin/sh", "sh", "-c", cmd.c_str(), static_cast<char*>(nullptr));
      _exit(127);
    }
    const auto deadline = std::chrono::steady_clock::now() + std::chrono::seconds(60);
    while (!fs::exists(dir / "program.pid") && std::chrono::steady_clock::now() < deadline)
      std::this_thread::sleep_for(std::chrono::milliseconds(10));
    pid_t program = 0;
    std::ifstream(dir / "program.pid") >> program;
    ::kill(headroom_pid, sig);
    int status = 0;
    ::waitpid(headroom_pid, &status, 0);
    ASSERT_GT(program, 0) << "the program never ran";
    EXPECT_TRUE(WIFSIGNALED(status) && WTERMSIG(status) == sig) << "headroom should end of signal " << sig;
    EXPECT_TRUE(testing::ends_within(program, 5.0)) << "the program outlived headroom after signal " << sig;
    if (sig != SIGKILL) {
      EXPECT_TRUE(fs::is_empty(tmp)) << "an exchange folder outlived headroom after signal " << sig << ": "
                                     << fs::directory_iterator(tmp)->path();
    }
    if (!testing::ends_within(program, 0.0)) ::kill(program, SIGKILL);  // a failing run leaves nothing either
  }
}

TEST(Cli, ProcessesAnExternalProgramLeavesRunningAreStrayProcessesAndEndWithTheCall) {
  // tests/hostile/bad_program.py "strays" writes the right answer, then leaves
  // a child in a session of its own and a double-forked grandchild, both named
  // "hr-stray", sleeping 60 s: neither is in the program's process group, and
  // the second is not even its descendant once its parent has exited.
  const auto dir = fresh_dir("strays");
  const fs::path pids = dir / "strays.pids";
  const std::string program = "/usr/bin/python3 " + kSource + "/tests/hostile/bad_program.py";
  const std::string line = "HEADROOM_HOSTILE_PROGRAM=strays HEADROOM_HOSTILE_PROGRAM_PIDS=" + pids.string() + " " +
                           kTool + " replay --kernel-cmd '" + program + "' --determinism-runs 1 --time-limit 30 " +
                           kSource + "/corpora/no_max_shift/large_logits-s18-z49-1x1x1x1x1x1x1-none-p0.0.0.0.0.0.0" +
                           " --json " + (dir / "run.json").string() + " >/dev/null 2>&1";
  const auto start = std::chrono::steady_clock::now();
  const int status = std::system(line.c_str());
  const double seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  std::vector<pid_t> strays, outlived;
  std::ifstream in(pids);
  for (long p; in >> p;) strays.push_back(static_cast<pid_t>(p));
  for (pid_t p : strays) {
    if (testing::ends_within(p, 0.0)) continue;
    outlived.push_back(p);
    ::kill(p, SIGKILL);  // a failing run leaves nothing either
  }
  ASSERT_GE(strays.size(), 2u) << "the program left no process";
  EXPECT_EQ(strays.size() % 2, 0u);
  EXPECT_TRUE(outlived.empty()) << outlived.size() << " of " << strays.size() << " outlived headroom, the first "
                                << outlived.front();
  EXPECT_LT(seconds, 30.0) << "headroom waited for the sleepers";
  // Exit 1: the fault is outside the default budget (no fault class tolerated).
  EXPECT_TRUE(WIFEXITED(status) && WEXITSTATUS(status) == 1) << status;
  const RunRecord r = read_run_record(dir / "run.json");
  ASSERT_EQ(r.cases.size(), 1u);
  const CaseRecord& c = r.cases[0];
  EXPECT_GE(c.faults.count("stray_process") ? c.faults.at("stray_process") : 0, 1);
  bool named = false;
  for (const auto& d : c.fault_details) {
    named = named || (d.rfind("stray_process: ", 0) == 0 && d.find("left 2 process(es)") != std::string::npos &&
                      d.find("\"hr-stray\"") != std::string::npos);
  }
  EXPECT_TRUE(named) << "no stray_process detail naming 2 processes and \"hr-stray\" among " << c.fault_details.size();
  for (const auto& d : c.fault_details) std::printf("%s\n", d.c_str());
}

TEST(Cli, ThreeShardsMergeToTheUnshardedRecord) {
  const auto dir = fresh_dir("shards");
  const std::string common = "qualify --kernel f16_f32acc --no-isolation --determinism-runs 1 ";
  ASSERT_EQ(run(common + "--json " + (dir / "all.json").string()), 0);
  std::string parts;
  for (int i = 1; i <= 3; ++i) {
    const auto part = dir / ("part" + std::to_string(i) + ".json");
    ASSERT_EQ(run(common + "--shard " + std::to_string(i) + "/3 --json " + part.string()), 0);
    parts += " " + part.string();
  }
  ASSERT_EQ(run("merge" + parts + " --json " + (dir / "merged.json").string()), 0);
  const RunRecord all = read_run_record(dir / "all.json");
  const RunRecord merged = read_run_record(dir / "merged.json");
  ASSERT_EQ(merged.cases.size(), all.cases.size());
  EXPECT_EQ(to_json(merged)["cases"], to_json(all)["cases"]);
  EXPECT_EQ(merged.verdict(), all.verdict());
}

}  // namespace
}  // namespace headroom
