// headroom tests — external programs in persistent mode: one process, many calls, faults per call.
#include <signal.h>
#include <unistd.h>

#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <string>
#include <vector>

#include <gtest/gtest.h>

#include "attach_cases.h"
#include "headroom/attach.h"
#include "headroom/external_program.h"
#include "headroom/input_error.h"
#include "leftovers.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;
using testing::core_case;
using testing::count_exchange_folders;
using testing::count_fds;
using testing::ends_within;

bool contains(const std::string& s, const std::string& part) { return s.find(part) != std::string::npos; }

const std::string kServing = "/usr/bin/python3 " HEADROOM_SOURCE_DIR "/tests/hostile/serving_program.py";

// Sets the serving program's script for one test and reads back what it logged.
class Served : public ::testing::Test {
 protected:
  void SetUp() override {
    log_ = fs::temp_directory_path() / ("headroom-served-test-" + std::to_string(getpid()) + "-" +
                                        ::testing::UnitTest::GetInstance()->current_test_info()->name());
    fs::remove(log_);
    fs::remove(log_.string() + ".calls");
    setenv("HEADROOM_SERVE_LOG", log_.c_str(), 1);
    unsetenv("HEADROOM_SERVE_START");
  }
  void TearDown() override {
    fs::remove(log_);
    fs::remove(log_.string() + ".calls");
  }
  std::vector<pid_t> starts() const {
    std::vector<pid_t> pids;
    std::ifstream f(log_);
    for (long p; f >> p;) pids.push_back(static_cast<pid_t>(p));
    return pids;
  }
  // Runs one call per word of `script` on the same attached kernel.
  std::vector<KernelRun> calls(const std::string& script, double limit_s = 10.0) {
    setenv("HEADROOM_SERVE_SCRIPT", script.c_str(), 1);
    auto k = attach_program(kServing, 20.0);
    std::vector<KernelRun> runs;
    const std::size_t n = static_cast<std::size_t>(std::count(script.begin(), script.end(), ',')) + 1;
    for (std::size_t i = 0; i < n; ++i) {
      const Case c = core_case({1, 2, 1, 3, 4, 5, 5}, MaskKind::none, 500 + static_cast<std::uint32_t>(i));
      runs.push_back(k->run(receive(c, k->declaration()), RunOptions{true, limit_s, 0}));
    }
    return runs;
  }
  fs::path log_;
};

#define EXPECT_STATUS(run_, status_, part)                                                       \
  do {                                                                                           \
    EXPECT_EQ(run_status_name((run_).status), std::string(run_status_name(status_))) << (run_).detail; \
    EXPECT_TRUE(contains((run_).detail, part)) << "detail: " << (run_).detail << "\nexpected: " << (part); \
  } while (0)

TEST(ServedProgram, BitIdenticalToOneShotOnEveryMaskAndFaster) {
  auto one_shot = attach_program(HEADROOM_PROTOCOL_DRIVER, 10.0);
  auto served = attach_program(std::string(HEADROOM_PROTOCOL_DRIVER) + " --serve", 10.0);
  ASSERT_EQ(served->declaration().name, one_shot->declaration().name);
  double seconds[2] = {0, 0};
  std::uint32_t seed = 700;
  int calls = 0;
  for (MaskKind m : {MaskKind::none, MaskKind::causal_bottom_right, MaskKind::key_padding, MaskKind::dense, MaskKind::bias})
    for (int rep = 0; rep < 4; ++rep) {
      const Case c = core_case({2, 4, 2, 6, 5, 8, 8}, m, seed++, /*allow_empty_rows=*/true);
      const ReceivedCase r = receive(c, one_shot->declaration());
      KernelRun runs[2];
      AttachedKernel* kernels[2] = {one_shot.get(), served.get()};
      for (int i = 0; i < 2; ++i) {
        const auto start = std::chrono::steady_clock::now();
        runs[i] = kernels[i]->run(r, RunOptions{true, 10.0, 0});
        seconds[i] += std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
        ASSERT_EQ(runs[i].status, RunStatus::ok) << runs[i].detail;
      }
      EXPECT_TRUE(bit_identical(runs[0].out, runs[1].out)) << mask_kind_name(m);
      EXPECT_TRUE(bit_identical(runs[0].lse, runs[1].lse)) << mask_kind_name(m);
      ++calls;
    }
  // Printed, not asserted: speed belongs to benchmarks (BRIEF); a C++ program starts fast.
  std::printf("mean call: one-shot %.2f ms, persistent %.2f ms (%d calls)\n", 1e3 * seconds[0] / calls,
              1e3 * seconds[1] / calls, calls);
}

TEST_F(Served, StartsOnceForManyCalls) {
  const auto runs = calls("ok,ok,ok,ok,ok");
  for (const KernelRun& r : runs) EXPECT_EQ(r.status, RunStatus::ok) << r.detail;
  EXPECT_EQ(starts().size(), 1u);
  ASSERT_EQ(starts().size(), 1u);
  EXPECT_TRUE(ends_within(starts()[0], 5.0)) << "the program outlived its kernel";
}

TEST_F(Served, ACrashGetsTheFaultAndTheNextCallARestartedProgram) {
  const auto runs = calls("ok,crash,ok,exit,ok");
  EXPECT_STATUS(runs[0], RunStatus::ok, "");
  EXPECT_STATUS(runs[1], RunStatus::crash, "ended during the call");
  EXPECT_STATUS(runs[1], RunStatus::crash, "SIGSEGV");
  EXPECT_STATUS(runs[2], RunStatus::ok, "");
  EXPECT_STATUS(runs[3], RunStatus::crash, "exit code 3; stderr: kernel exploded");
  EXPECT_STATUS(runs[4], RunStatus::ok, "");
  const auto pids = starts();
  ASSERT_EQ(pids.size(), 3u);
  EXPECT_NE(pids[0], pids[1]);
  EXPECT_NE(pids[1], pids[2]);
}

TEST_F(Served, TheTimeLimitIsPerCallAndKillsOnlyTheHangingCall) {
  // The limit leaves the well-behaved calls room on a loaded machine: the third
  // call restarts Python and imports NumPy under it (a 1.5 s limit failed 2 of
  // 5 full CTest runs at a load average of about 10 on the 2-core machine),
  // while the hang sleeps 60 s, 10 limits.
  const auto start = std::chrono::steady_clock::now();
  const auto runs = calls("ok,hang,ok", 6.0);
  const double took = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  EXPECT_STATUS(runs[0], RunStatus::ok, "");
  EXPECT_STATUS(runs[1], RunStatus::timeout, "over the time limit of 6 s");
  EXPECT_STATUS(runs[2], RunStatus::ok, "");
  const auto pids = starts();
  ASSERT_EQ(pids.size(), 2u);
  EXPECT_TRUE(ends_within(pids[0], 5.0)) << "the hanging program was not killed";
  EXPECT_LT(took, 40.0) << "a hang of 60 s was waited out";
}

TEST_F(Served, ErrorAndUnsupportedRepliesKeepTheProgram) {
  const auto runs = calls("error,unsupported,ok");
  EXPECT_STATUS(runs[0], RunStatus::crash, "reported an error: boom");
  EXPECT_STATUS(runs[1], RunStatus::unsupported, "unsupported");
  EXPECT_STATUS(runs[2], RunStatus::ok, "");
  EXPECT_EQ(starts().size(), 1u);
}

TEST_F(Served, RepliesThatBreakTheProtocolAreBadOutputAndRestart) {
  const auto runs = calls("garbage,ok,wrong_call,ok");
  EXPECT_STATUS(runs[0], RunStatus::bad_output, "is not a JSON object");
  EXPECT_STATUS(runs[1], RunStatus::ok, "");
  EXPECT_STATUS(runs[2], RunStatus::bad_output, "does not answer call");
  EXPECT_STATUS(runs[3], RunStatus::ok, "");
  EXPECT_EQ(starts().size(), 3u);
}

TEST_F(Served, AProgramThatCannotStartFailsEachCallItWasNeededFor) {
  setenv("HEADROOM_SERVE_START", "no_ready", 1);
  auto runs = calls("ok,ok");
  EXPECT_STATUS(runs[0], RunStatus::crash, "ended before its ready line: exit code 4");
  EXPECT_STATUS(runs[1], RunStatus::crash, "ended before its ready line");
  EXPECT_EQ(starts().size(), 2u);
  setenv("HEADROOM_SERVE_START", "bad_ready", 1);
  runs = calls("ok");
  EXPECT_STATUS(runs[0], RunStatus::bad_output, "is not {\"serve\": 1}");
  setenv("HEADROOM_SERVE_START", "slow", 1);
  runs = calls("ok", 1.0);
  EXPECT_STATUS(runs[0], RunStatus::timeout, "no ready line within the time limit of 1 s");
}

TEST_F(Served, CrashingCallsLeakNothing) {
  testing::PrivateTempDir tmp;
  const int fds = count_fds();
  {
    const auto runs = calls("crash,ok,crash,ok,crash,ok,crash,ok");
    for (std::size_t i = 0; i < runs.size(); ++i)
      EXPECT_EQ(runs[i].status, i % 2 ? RunStatus::ok : RunStatus::crash) << runs[i].detail;
  }
  EXPECT_EQ(count_fds(), fds);
  EXPECT_EQ(count_exchange_folders(), 0);
  for (pid_t p : starts()) EXPECT_TRUE(ends_within(p, 2.0)) << p;
}

TEST_F(Served, ProcessesItStartsMayLiveBetweenCallsAndEndWithTheProgram) {
  // "strays" leaves a setsid child and a double-forked grandchild sleeping:
  // helpers a persistent program may keep. They end when the program is
  // killed (here at a call's time limit) and when the session ends.
  const fs::path strays = log_.string() + ".strays";
  fs::remove(strays);
  auto pids = [&] {
    std::vector<pid_t> v;
    std::ifstream f(strays);
    for (long p; f >> p;) v.push_back(static_cast<pid_t>(p));
    return v;
  };
  setenv("HEADROOM_SERVE_SCRIPT", "strays,hang,strays", 1);
  {
    auto k = attach_program(kServing, 20.0);
    auto call = [&](std::uint32_t seed, double limit_s) {
      const Case c = core_case({1, 2, 1, 3, 4, 5, 5}, MaskKind::none, seed);
      return k->run(receive(c, k->declaration()), RunOptions{true, limit_s, 0});
    };
    const KernelRun one = call(600, 10.0);  // (EXPECT_STATUS evaluates its run more than once)
    EXPECT_STATUS(one, RunStatus::ok, "");
    const std::vector<pid_t> first = pids();
    ASSERT_EQ(first.size(), 2u);
    for (pid_t p : first) EXPECT_FALSE(ends_within(p, 0.0)) << p << " ended between calls";
    const KernelRun hang = call(601, 1.0);
    EXPECT_STATUS(hang, RunStatus::timeout, "time limit of 1 s");
    for (pid_t p : first) EXPECT_TRUE(ends_within(p, 0.0)) << p << " outlived its program, killed at the time limit";
    const KernelRun again = call(602, 10.0);
    EXPECT_STATUS(again, RunStatus::ok, "");
    ASSERT_EQ(pids().size(), 4u);
  }
  std::vector<pid_t> outlived;
  for (pid_t p : pids()) {
    if (ends_within(p, 0.0)) continue;
    outlived.push_back(p);
    kill(p, SIGKILL);  // a failing run leaves nothing either
  }
  EXPECT_TRUE(outlived.empty()) << outlived.size() << " outlived the session, the first " << outlived.front();
  fs::remove(strays);
}

TEST(ServedDeclaration, OnlyProtocol2AndAKnownServeVersion) {
  const std::string base =
      R"("name": "k", "level": "core", "input_format": "float32", "output_format": "float32",
         "mask_kinds": ["none"], "masked_row": "zeros")";
  int serve = -1;
  declaration_from_json("{\"protocol\": 2, \"serve\": 1, " + base + "}", "prog", &serve);
  EXPECT_EQ(serve, 1);
  declaration_from_json("{\"protocol\": 2, " + base + "}", "prog", &serve);
  EXPECT_EQ(serve, 0);
  for (const char* bad : {"\"protocol\": 2, \"serve\": 2", "\"protocol\": 2, \"serve\": true", "\"protocol\": 1, \"serve\": 1"}) {
    try {
      declaration_from_json(std::string("{") + bad + ", " + base + "}", "prog", &serve);
      ADD_FAILURE() << bad << " was accepted";
    } catch (const InputError& e) {
      EXPECT_TRUE(contains(e.place(), "\"serve\"")) << bad << ": " << e.what();
    }
  }
}

}  // namespace
}  // namespace headroom
