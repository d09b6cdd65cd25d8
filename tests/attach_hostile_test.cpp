// headroom tests — hostile kernels: plug-ins and programs that fight the harness, each a named fault or a clear error.
//
// The specimens live in tests/hostile/ (not among the bundled kernels). Each
// test provokes one hostility, checks what headroom reports, and then runs a
// sound case to show the harness is still whole: same process, same answers.
#include <fcntl.h>
#include <sys/wait.h>
#include <unistd.h>

#include <cerrno>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <string>
#include <vector>

#include <gtest/gtest.h>

#include "attach_cases.h"
#include "headroom/attach.h"
#include "headroom/input_error.h"
#include "leftovers.h"
#include "memory_limit_under_asan.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;
using Clock = std::chrono::steady_clock;

bool contains(const std::string& s, const std::string& part) { return s.find(part) != std::string::npos; }

double seconds_since(Clock::time_point start) { return std::chrono::duration<double>(Clock::now() - start).count(); }

const Case& small_case() {
  static const Case c = testing::core_case({1, 2, 1, 3, 5, 4, 4}, MaskKind::none, 11);
  return c;
}

RunOptions isolated(double time_limit_s = 20.0, std::uint64_t memory = std::uint64_t{4} << 30) {
  return RunOptions{true, time_limit_s, memory};
}

KernelRun run_on(AttachedKernel& k, const Case& c, const RunOptions& opt) {
  return k.run(receive(c, k.declaration()), opt);
}

// The example plug-in's answer on the small case: what every surviving hostile plug-in must return too.
const KernelRun& sound_answer() {
  static const KernelRun r = [] {
    auto k = attach_library(HEADROOM_EXAMPLE_PLUGIN);
    return run_on(*k, small_case(), isolated());
  }();
  return r;
}

// After each hostility: the harness still runs a sound case, in this same process, to the same bits.
void expect_sound_case_runs() {
  auto k = attach_library(HEADROOM_EXAMPLE_PLUGIN);
  const KernelRun r = run_on(*k, small_case(), isolated());
  ASSERT_EQ(r.status, RunStatus::ok) << r.detail;
  EXPECT_TRUE(bit_identical(r.out, sound_answer().out));
  EXPECT_TRUE(bit_identical(r.lse, sound_answer().lse));
}

int count_threads() {
  int n = 0;
  for (const auto& e : fs::directory_iterator("/proc/self/task")) {
    (void)e;
    ++n;
  }
  return n;
}

// The attached kernels' isolation workers aside, no child process: none left running, none unreaped.
void expect_no_child_left() {
  const auto left = testing::children_besides_workers();
  EXPECT_TRUE(left.empty()) << "a child process was left: " << left.front();
}

// Redirects this process's fd 1 into a file for its lifetime; text() is what reached it.
class StdoutCapture {
 public:
  StdoutCapture() {
    std::fflush(stdout);
    saved_ = dup(1);
    char name[] = "/tmp/headroom-stdout-XXXXXX";
    file_ = mkstemp(name);
    path_ = name;
    dup2(file_, 1);
  }
  ~StdoutCapture() {
    restore();
    close(file_);
    unlink(path_.c_str());
  }
  void restore() {
    if (saved_ < 0) return;
    std::fflush(stdout);
    dup2(saved_, 1);
    close(saved_);
    saved_ = -1;
  }
  std::string text() {
    restore();
    std::ifstream in(path_);
    return {std::istreambuf_iterator<char>(in), std::istreambuf_iterator<char>()};
  }

 private:
  int saved_ = -1;
  int file_ = -1;
  std::string path_;
};

// ---- plug-ins -----------------------------------------------------------------

TEST(HostilePlugin, ExitInsideTheCallIsACrashAndHeadroomsOutputIsIntact) {
  auto k = attach_library(HEADROOM_HOSTILE_EXITS);
  StdoutCapture capture;
  std::printf("before\n");
  const KernelRun r = run_on(*k, small_case(), isolated());
  std::printf("after\n");
  const std::string out = capture.text();
  EXPECT_EQ(r.status, RunStatus::crash) << r.detail;
  EXPECT_TRUE(contains(r.detail, "called exit(5)")) << r.detail;
  EXPECT_EQ(out, "before\nafter\n") << "the kernel's atexit handler wrote into headroom's stdout";
  expect_no_child_left();
  expect_sound_case_runs();
}

TEST(HostilePlugin, ChatterOnStdoutAndStderrLeavesHeadroomsStdoutIntact) {
  auto k = attach_library(HEADROOM_HOSTILE_CHATTER);
  StdoutCapture capture;
  std::printf("{\"headroom\": \"a JSON record on stdout\"}\n");
  const KernelRun r = run_on(*k, small_case(), isolated());
  std::printf("{\"end\": true}\n");
  const std::string out = capture.text();
  ASSERT_EQ(r.status, RunStatus::ok) << r.detail;
  EXPECT_TRUE(bit_identical(r.out, sound_answer().out)) << "chatter changed the answer";
  EXPECT_EQ(out, "{\"headroom\": \"a JSON record on stdout\"}\n{\"end\": true}\n")
      << "the kernel's output reached headroom's stdout (" << out.size() << " bytes)";
  expect_sound_case_runs();
}

TEST(HostilePlugin, OwnSignalHandlersDoNotHideHangsOrCrashes) {
  auto k = attach_library(HEADROOM_HOSTILE_SIGNALS);
  struct Mode {
    const char* name;
    RunStatus status;
    const char* detail;
  };
  const Mode modes[] = {
      {"hang", RunStatus::timeout, "time limit of 0.5 s"},         // SIGTERM/SIGALRM/SIGINT ignored, all blocked
      {"ignore", RunStatus::crash, "SIGSEGV"},                      // SIGSEGV set to SIG_IGN, then a guard-page read
      {"swallow", RunStatus::timeout, "time limit of 0.5 s"},      // a SIGSEGV handler that returns: faults forever
      {"sound", RunStatus::ok, ""},                                  // handlers installed, answer right
  };
  for (const Mode& m : modes) {
    // Set before attaching: the kernel runs in a copy of this process taken then (its isolation worker).
    setenv("HEADROOM_HOSTILE_SIGNALS", m.name, 1);
    k = attach_library(HEADROOM_HOSTILE_SIGNALS);
    const auto start = Clock::now();
    const KernelRun r = run_on(*k, small_case(), isolated(0.5));
    const double s = seconds_since(start);
    EXPECT_EQ(r.status, m.status) << m.name << ": " << run_status_name(r.status) << " " << r.detail;
    EXPECT_TRUE(contains(r.detail, m.detail)) << m.name << ": " << r.detail;
    EXPECT_LT(s, 10.0) << m.name;
    if (m.status == RunStatus::ok) {
      EXPECT_TRUE(bit_identical(r.out, sound_answer().out));
    }
    std::printf("signals %-8s -> %s in %.2f s: %s\n", m.name, run_status_name(r.status), s, r.detail.c_str());
    expect_no_child_left();
  }
  unsetenv("HEADROOM_HOSTILE_SIGNALS");
  expect_sound_case_runs();
}

TEST(HostilePlugin, ThreadsStillWritingAfterReturnDieWithTheChild) {
  auto k = attach_library(HEADROOM_HOSTILE_THREADS);
  const int threads = count_threads();
  const KernelRun r = run_on(*k, small_case(), isolated());
  ASSERT_EQ(r.status, RunStatus::ok) << r.detail;
  // The threads wrote NaN over the right answer before returning: the output
  // headroom scores is what the child left, and the NaN is the non_finite fault.
  ASSERT_EQ(r.out.values.size(), sound_answer().out.values.size());
  std::size_t nans = 0;
  for (double v : r.out.values) nans += std::isnan(v) ? 1 : 0;
  EXPECT_GT(nans, 0u) << "the scribbling threads' writes must be visible";
  EXPECT_EQ(count_threads(), threads) << "a kernel thread survived into headroom's process";
  expect_no_child_left();
  expect_sound_case_runs();
}

TEST(HostilePlugin, ProcessesLeftRunningAreStrayProcessesAndEndWithTheCall) {
  // Forked, in a session of its own, double-forked: each is reported with its
  // name and is gone when the call is; a child the kernel waits for is fine.
  struct Mode {
    const char* name;
    RunStatus status;
  };
  const Mode modes[] = {{"child", RunStatus::stray_process},
                        {"setsid", RunStatus::stray_process},
                        {"double", RunStatus::stray_process},
                        {"waited", RunStatus::ok}};
  for (const Mode& m : modes) {
    int fds[2];
    ASSERT_EQ(pipe2(fds, O_NONBLOCK), 0);
    setenv("HEADROOM_HOSTILE_FORKS", m.name, 1);
    setenv("HEADROOM_HOSTILE_FORKS_FD", std::to_string(fds[1]).c_str(), 1);
    auto k = attach_library(HEADROOM_HOSTILE_FORKS);
    const KernelRun r = run_on(*k, small_case(), isolated());
    EXPECT_EQ(r.status, m.status) << m.name << ": " << run_status_name(r.status) << " " << r.detail;
    if (m.status == RunStatus::stray_process) {
      EXPECT_TRUE(contains(r.detail, "\"hr-stray\"")) << m.name << ": " << r.detail;
      pid_t stray = 0;
      ASSERT_EQ(read(fds[0], &stray, sizeof stray), static_cast<ssize_t>(sizeof stray)) << m.name;
      EXPECT_TRUE(testing::ends_within(stray, 0.0)) << m.name << ": the stray " << stray << " outlived the call";
      if (!testing::ends_within(stray, 0.0)) kill(stray, SIGKILL);
    } else {
      EXPECT_TRUE(bit_identical(r.out, sound_answer().out)) << m.name;
    }
    expect_no_child_left();
    std::printf("forks %-7s -> %s: %s\n", m.name, run_status_name(r.status), r.detail.c_str());
    close(fds[0]);
    close(fds[1]);
  }
  unsetenv("HEADROOM_HOSTILE_FORKS");
  unsetenv("HEADROOM_HOSTILE_FORKS_FD");
  expect_sound_case_runs();
}

TEST(HostilePlugin, AKernelKillingItsWorkerIsACrashAndTheNextCallRuns) {
  setenv("HEADROOM_HOSTILE_FORKS", "parent", 1);
  auto k = attach_library(HEADROOM_HOSTILE_FORKS);
  unsetenv("HEADROOM_HOSTILE_FORKS");
  const KernelRun r = run_on(*k, small_case(), isolated());
  EXPECT_EQ(r.status, RunStatus::crash) << r.detail;
  EXPECT_TRUE(contains(r.detail, "isolation worker")) << r.detail;
  EXPECT_TRUE(contains(r.detail, "SIGKILL")) << r.detail;
  expect_no_child_left();
  // The same kernel object again: a fresh worker, forked now, still sees the
  // environment of that moment, in which the mode is unset: a sound answer.
  const KernelRun again = run_on(*k, small_case(), isolated());
  ASSERT_EQ(again.status, RunStatus::ok) << again.detail;
  EXPECT_TRUE(bit_identical(again.out, sound_answer().out));
  expect_no_child_left();
}

TEST(HostilePlugin, UnboundedAllocationEndsAtTheMemoryLimit) {
  auto k = attach_library(HEADROOM_HOSTILE_GREEDY);
  const auto start = Clock::now();
  const KernelRun r = run_on(*k, small_case(), isolated(30.0, std::uint64_t{256} << 20));
  const double s = seconds_since(start);
  EXPECT_EQ(r.status, RunStatus::crash) << run_status_name(r.status) << " " << r.detail;
  EXPECT_TRUE(contains(r.detail, "memory limit of +256 MiB")) << r.detail;
  std::printf("greedy: %s after %.2f s: %s\n", run_status_name(r.status), s, r.detail.c_str());
  expect_no_child_left();
  expect_sound_case_runs();
}

TEST(HostilePlugin, GarbageDeclarationsAreRefusedNamingTheField) {
  struct Garbage {
    const char* mode;
    const char* place;    // InputError::place() contains this
    const char* problem;  // InputError::problem() contains this
  };
  const Garbage cases[] = {
      {"null_declaration", "declaration", "NULL"},
      {"null_name", "field \"name\"", "NULL"},
      {"empty_name", "field \"name\"", "empty"},
      {"unterminated_name", "field \"name\"", "longer than 64"},
      {"shouting_name", "field \"name\"", "outside [a-z0-9_.-]"},
      {"negative_max_kv_len", "field \"max_kv_len\"", "-16"},
      {"level_7", "field \"level\"", "unknown level value 7"},
      {"input_format_99", "field \"input_format\"", "unknown format value 99"},
      {"output_format_negative", "field \"output_format\"", "unknown format value -1"},
      {"output_int8", "field \"output_format\"", "int8"},
      {"masked_row_42", "field \"masked_row\"", "42"},
      {"mask_bits_unknown", "field \"mask_kinds\"", "outside HR_MASK_"},
      {"no_masks", "field \"mask_kinds\"", "no mask kind"},
      {"layouts_unknown", "field \"layouts\"", "HR_LAYOUT_"},
      {"returns_lse_2", "field \"returns_lse\"", "2"},
      {"granularity_9", "granularity", "unknown granularity value 9"},
      {"asymmetric_minus_1", "asymmetric", "-1"},
      {"no_run_function", "field \"run_core\"", "without a run_core"},
      {"both_run_functions", "field \"run_block\"", "does not declare"},
      {"abi_version_max", "field \"abi_version\"", "4294967295"},
  };
  for (const Garbage& g : cases) {
    setenv("HEADROOM_HOSTILE_DECLARATION", g.mode, 1);
    try {
      attach_library(HEADROOM_HOSTILE_GARBAGE_DECLARATION);
      ADD_FAILURE() << g.mode << ": a garbage declaration was accepted";
    } catch (const InputError& e) {
      EXPECT_EQ(e.file(), HEADROOM_HOSTILE_GARBAGE_DECLARATION) << g.mode;
      EXPECT_TRUE(contains(e.place(), g.place)) << g.mode << ": " << e.what();
      EXPECT_TRUE(contains(e.problem(), g.problem)) << g.mode << ": " << e.what();
      EXPECT_FALSE(e.fix().empty()) << g.mode;
    }
  }
  // The same library with its sound declaration attaches and runs right.
  unsetenv("HEADROOM_HOSTILE_DECLARATION");
  auto k = attach_library(HEADROOM_HOSTILE_GARBAGE_DECLARATION);
  const KernelRun r = run_on(*k, small_case(), isolated());
  ASSERT_EQ(r.status, RunStatus::ok) << r.detail;
  EXPECT_TRUE(bit_identical(r.out, sound_answer().out));
}

// ---- external programs ----------------------------------------------------------

const std::string& program_command() {
  static const std::string c = std::string("/usr/bin/python3 ") + HEADROOM_HOSTILE_PROGRAM;
  return c;
}

// The program's own answer (NumPy float32) agrees with the example plug-in's to float32 rounding.
void expect_close_to_sound(const KernelRun& r) {
  ASSERT_EQ(r.out.values.size(), sound_answer().out.values.size());
  for (std::size_t i = 0; i < r.out.values.size(); ++i)
    EXPECT_NEAR(r.out.values[i], sound_answer().out.values[i], 1e-5) << "element " << i;
}

KernelRun run_program_mode(AttachedKernel& k, const char* mode, double time_limit_s, double* seconds = nullptr) {
  setenv("HEADROOM_HOSTILE_PROGRAM", mode, 1);
  const auto start = Clock::now();
  KernelRun r = run_on(k, small_case(), isolated(time_limit_s));
  if (seconds) *seconds = seconds_since(start);
  setenv("HEADROOM_HOSTILE_PROGRAM", "ok", 1);
  return r;
}

TEST(HostileProgram, BadOutputsAreNamedAndTheNextCaseRuns) {
  setenv("HEADROOM_HOSTILE_PROGRAM", "ok", 1);
  auto k = attach_program(program_command(), 60.0);
  struct Mode {
    const char* name;
    RunStatus status;
    const char* detail;
  };
  const Mode modes[] = {
      {"wrong_shape", RunStatus::bad_output, "o.npy: shape [1,2,4,4], expected [1,2,3,4]"},
      {"wrong_dtype", RunStatus::bad_output, "o.npy: dtype '<f8', expected '<f4'"},
      {"truncated", RunStatus::bad_output, "o.npy: data: truncated data"},
      {"huge_header", RunStatus::bad_output, "o.npy: data: truncated data"},
      {"huge_sparse", RunStatus::bad_output, "o.npy: data: "},
      {"fifo", RunStatus::bad_output, "not a regular file"},
      {"dev_zero", RunStatus::bad_output, "not a regular file"},
      {"nothing", RunStatus::bad_output, "o.npy: not written"},
      {"exit_3", RunStatus::crash, "exit code 3"},
      {"segfault", RunStatus::crash, "SIGSEGV"},
  };
  for (const Mode& m : modes) {
    double s = 0;
    const KernelRun r = run_program_mode(*k, m.name, 60.0, &s);
    EXPECT_EQ(r.status, m.status) << m.name << ": " << run_status_name(r.status) << " " << r.detail;
    EXPECT_TRUE(contains(r.detail, m.detail)) << m.name << ": " << r.detail;
    std::printf("program %-12s -> %s in %.2f s: %s\n", m.name, run_status_name(r.status), s, r.detail.c_str());
    // The same program, asked to behave, runs the next case.
    const KernelRun next = run_on(*k, small_case(), isolated(60.0));
    ASSERT_EQ(next.status, RunStatus::ok) << "after " << m.name << ": " << next.detail;
    expect_close_to_sound(next);
  }
  expect_no_child_left();
  expect_sound_case_runs();
}

TEST(HostileProgram, NeverExitingIsKilledAtTheTimeLimit) {
  setenv("HEADROOM_HOSTILE_PROGRAM", "ok", 1);
  auto k = attach_program(program_command(), 60.0);
  double s = 0;
  const KernelRun r = run_program_mode(*k, "never_exits", 1.5, &s);
  EXPECT_EQ(r.status, RunStatus::timeout) << r.detail;
  EXPECT_GE(s, 1.5);
  EXPECT_LT(s, 6.0);
  std::printf("program never_exits -> %s in %.2f s\n", run_status_name(r.status), s);
  const KernelRun next = run_on(*k, small_case(), isolated(60.0));
  ASSERT_EQ(next.status, RunStatus::ok) << next.detail;
  expect_close_to_sound(next);
  expect_no_child_left();
}

TEST(HostileProgram, AGrandchildHoldingThePipesDoesNotHoldHeadroom) {
  setenv("HEADROOM_HOSTILE_PROGRAM", "ok", 1);
  auto k = attach_program(program_command(), 60.0);
  double ok_s = 0, s = 0;
  run_program_mode(*k, "ok", 60.0, &ok_s);
  // The grandchild left its process group (setsid) and sleeps 3 s with the
  // program's stdout and stderr: headroom waits for the program, not for it,
  // and ends it as a stray (its name is the interpreter's: it never exec'd).
  const KernelRun r = run_program_mode(*k, "straggler", 60.0, &s);
  EXPECT_EQ(r.status, RunStatus::stray_process) << run_status_name(r.status) << " " << r.detail;
  EXPECT_TRUE(contains(r.detail, "left 1 process(es)")) << r.detail;
  EXPECT_TRUE(contains(r.detail, "\"python3\"")) << r.detail;
  EXPECT_LT(s, ok_s + 2.0) << "headroom waited for the straggler";
  std::printf("program straggler -> %s in %.2f s (a plain run: %.2f s): %s\n", run_status_name(r.status), s, ok_s,
              r.detail.c_str());
  expect_no_child_left();
}

TEST(HostileProgram, BadDescriptionsAreClearErrors) {
  setenv("HEADROOM_HOSTILE_PROGRAM", "describe_garbage", 1);
  try {
    attach_program(program_command(), 60.0);
    ADD_FAILURE() << "a garbage description was accepted";
  } catch (const InputError& e) {
    EXPECT_TRUE(contains(e.file(), program_command())) << e.what();
  }
  // Found by fuzz_declaration: nlohmann's out_of_range for 1e400 used to escape as a non-InputError.
  setenv("HEADROOM_HOSTILE_PROGRAM", "describe_huge", 1);
  try {
    attach_program(program_command(), 60.0);
    ADD_FAILURE() << "a description with 1e400 was accepted";
  } catch (const InputError& e) {
    EXPECT_TRUE(contains(e.problem(), "1e400")) << e.what();
  }
  setenv("HEADROOM_HOSTILE_PROGRAM", "describe_hangs", 1);
  const auto start = Clock::now();
  try {
    attach_program(program_command(), 1.0);
    ADD_FAILURE() << "a hanging describe was accepted";
  } catch (const InputError& e) {
    EXPECT_TRUE(contains(e.what(), "time limit")) << e.what();
  }
  EXPECT_LT(seconds_since(start), 6.0);
  setenv("HEADROOM_HOSTILE_PROGRAM", "ok", 1);
  expect_no_child_left();
  expect_sound_case_runs();
}

}  // namespace
}  // namespace headroom
