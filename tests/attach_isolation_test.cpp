// headroom tests — every isolation class provoked by a tiny misbehaving kernel, and nothing leaked.
#include <dirent.h>
#include <sys/prctl.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <cerrno>
#include <chrono>
#include <cmath>
#include <csignal>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <ctime>
#include <filesystem>
#include <stdexcept>
#include <string>
#include <vector>

#include <gtest/gtest.h>

#include "attach_cases.h"
#include "headroom/attach.h"
#include "headroom/kernel_abi.h"
#include "leftovers.h"
#include "memory_limit_under_asan.h"

namespace headroom {
namespace {

// ---- test-only kernels: each does one wrong thing -------------------------

std::int64_t count4(const std::int64_t e[4]) { return e[0] * e[1] * e[2] * e[3]; }

// Writes a correct-shaped output (zeros) so only the deliberate defect remains.
void write_zeros(const hr_core_problem* p) {
  std::memset(p->o.data, 0, static_cast<std::size_t>(count4(p->o.extents)) * sizeof(float));
  if (p->lse != nullptr) {
    for (std::int64_t i = 0; i < p->batch * p->q_heads * p->q_len; ++i) p->lse[i] = 0.0f;
  }
}

int g_input = 0;  // which input the reading kernel overruns: 0 q, 1 k, 2 v

std::int32_t reads_one_past_end(const hr_core_problem* p) {
  write_zeros(p);
  const hr_tensor& t = g_input == 0 ? p->q : g_input == 1 ? p->k : p->v;
  const std::size_t item = t.format == HR_FORMAT_FLOAT32 ? 4 : 2;
  const volatile unsigned char* base = static_cast<const unsigned char*>(t.data);
  // The first byte of the element just past the last one.
  volatile unsigned char x = base[static_cast<std::size_t>(count4(t.extents)) * item];
  (void)x;
  return HR_OK;
}

std::int32_t writes_row_past_end(const hr_core_problem* p) {
  write_zeros(p);
  auto* o = static_cast<float*>(p->o.data);
  const std::int64_t n = count4(p->o.extents);
  for (std::int64_t d = 0; d < p->value_dim; ++d) o[n + d] = 1.0f;  // row Tq of the last head: one row too far
  return HR_OK;
}

std::int32_t writes_far_past_end(const hr_core_problem* p) {
  write_zeros(p);
  auto* o = static_cast<volatile float*>(p->o.data);
  o[count4(p->o.extents) + 32] = 1.0f;  // 128 bytes past: beyond the 64-byte canary, in the guard page
  return HR_OK;
}

std::int32_t writes_before_start(const hr_core_problem* p) {
  write_zeros(p);
  auto* o = static_cast<volatile float*>(p->o.data);
  o[-1] = 1.0f;
  return HR_OK;
}

std::int32_t writes_lse_past_end(const hr_core_problem* p) {
  write_zeros(p);
  p->lse[p->batch * p->q_heads * p->q_len] = 0.0f;
  return HR_OK;
}

std::int32_t writes_into_input(const hr_core_problem* p) {
  write_zeros(p);
  auto* q = const_cast<volatile float*>(static_cast<const float*>(p->q.data));
  q[1] = 2.0f;
  return HR_OK;
}

std::int32_t aborts(const hr_core_problem*) { std::abort(); }

std::int32_t wild_pointer(const hr_core_problem*) {
  // A small non-null address: UBSan's null check does not intercept it, the MMU does.
  volatile std::uintptr_t address = 16;  // volatile: the compiler must not see through it
  *reinterpret_cast<volatile int*>(address) = 1;
  return HR_OK;
}

int recurse(int depth) {
  volatile char frame[1024];
  frame[0] = static_cast<char>(depth);
  if (depth > (1 << 30)) return 0;  // never reached: the stack ends first
  return recurse(depth + 1) + frame[0];
}

std::int32_t overflows_stack(const hr_core_problem*) { return recurse(0); }

std::int32_t hangs(const hr_core_problem*) {
  volatile std::uint64_t spins = 0;
  for (;;) {
    spins = spins + 1;
  }
}

// Spins until this process has used g_cpu_seconds of CPU time, then writes zeros: sound, CPU-bound.
double g_cpu_seconds = 0.6;

std::int32_t burns_cpu(const hr_core_problem* p) {
  timespec t{};
  do {
    clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &t);
  } while (static_cast<double>(t.tv_sec) + 1e-9 * static_cast<double>(t.tv_nsec) < g_cpu_seconds);
  write_zeros(p);
  return HR_OK;
}

std::int32_t sleeps_forever(const hr_core_problem*) {
  for (;;) pause();
}

int g_pid_pipe = -1;  // where reports_pid_then_hangs tells the test which process runs it

std::int32_t reports_pid_then_hangs(const hr_core_problem* p) {
  const pid_t me = getpid();
  if (write(g_pid_pipe, &me, sizeof me) != static_cast<ssize_t>(sizeof me)) return HR_OK;
  return hangs(p);
}

// Tells the test which process forked it: its parent's command name.
std::int32_t reports_parent(const hr_core_problem* p) {
  char comm[32] = {};
  FILE* f = std::fopen(("/proc/" + std::to_string(getppid()) + "/comm").c_str(), "r");
  if (f != nullptr) {
    if (std::fgets(comm, sizeof comm, f) == nullptr) comm[0] = '\0';
    std::fclose(f);
  }
  if (write(g_pid_pipe, comm, sizeof comm) != static_cast<ssize_t>(sizeof comm)) return HR_OK;
  write_zeros(p);
  return HR_OK;
}

std::int32_t calls_exit(const hr_core_problem*) { std::exit(3); }
std::int32_t calls_underscore_exit(const hr_core_problem*) { _exit(4); }
std::int32_t throws(const hr_core_problem*) { throw std::runtime_error("kernel gave up"); }
std::int32_t returns_42(const hr_core_problem* p) {
  write_zeros(p);
  return 42;
}
std::int32_t declines(const hr_core_problem*) { return HR_UNSUPPORTED; }
std::int32_t writes_nothing(const hr_core_problem*) { return HR_OK; }

std::int32_t allocates_a_gigabyte(const hr_core_problem* p) {
  // Left uninitialised: touching one byte keeps the call fast when it is allowed.
  auto* big = new char[std::size_t{1} << 30];
  static_cast<volatile char*>(big)[p->q_len] = 1;  // used, so the allocation cannot be elided
  delete[] big;
  write_zeros(p);
  return HR_OK;
}

// Built as an uninstrumented kernel would be: UBSan would otherwise end the
// child at the null-pointer arithmetic, before the fault the test is about.
__attribute__((no_sanitize("address", "undefined"))) std::int32_t mallocs_a_gigabyte_unchecked(
    const hr_core_problem* p) {
  auto* big = static_cast<volatile char*>(std::malloc(std::size_t{1} << 30));
  big[4096] = 1;  // NULL under the memory limit: a fault near address 0
  std::free(const_cast<char*>(big));
  write_zeros(p);
  return HR_OK;
}

// ---- helpers ----------------------------------------------------------------

hr_kernel kernel_with(std::int32_t (*run)(const hr_core_problem*), std::int32_t format = HR_FORMAT_FLOAT32) {
  hr_kernel k{};
  k.abi_version = HEADROOM_ABI_VERSION;
  k.name = "misbehaving";
  k.description = "test kernel";
  k.level = HR_LEVEL_CORE;
  k.input_format = format;
  k.output_format = HR_FORMAT_FLOAT32;
  k.mask_kinds = HR_MASK_NONE;
  k.masked_row = HR_MASKED_ROW_ZEROS;
  k.returns_lse = 1;
  k.layouts = HR_LAYOUT_BHTD;
  k.run_core = run;
  return k;
}

const Case& small_case() {
  static const Case c = testing::core_case({1, 2, 1, 3, 5, 4, 4}, MaskKind::none, 7);
  return c;
}

// Generous for a normal call even on a loaded machine; the hang test sets its own.
RunOptions quick(bool isolate = true) { return RunOptions{isolate, 5.0, std::uint64_t{256} << 20}; }

KernelRun run_kernel(std::int32_t (*run)(const hr_core_problem*), const RunOptions& opt = quick(),
                     std::int32_t format = HR_FORMAT_FLOAT32) {
  const hr_kernel k = kernel_with(run, format);
  auto kernel = attach_in_process(&k);
  return kernel->run(receive(small_case(), kernel->declaration()), opt);
}

bool contains(const std::string& s, const std::string& part) { return s.find(part) != std::string::npos; }

#define EXPECT_RUN(run, status_, part)                                                            \
  do {                                                                                            \
    const KernelRun& r_ = (run);                                                                  \
    EXPECT_EQ(run_status_name(r_.status), std::string(run_status_name(status_))) << r_.detail;    \
    EXPECT_TRUE(contains(r_.detail, part)) << "detail: " << r_.detail << "\nexpected: " << part;  \
  } while (0)

// ---- the fault classes ---------------------------------------------------------

TEST(AttachIsolation, ReadingOneElementPastAnyInputIsOobRead) {
  const char* names[] = {"q", "k", "v"};
  for (std::int32_t format : {HR_FORMAT_FLOAT32, HR_FORMAT_BINARY16}) {
    for (g_input = 0; g_input < 3; ++g_input) {
      const KernelRun r = run_kernel(reads_one_past_end, quick(), format);
      EXPECT_RUN(r, RunStatus::oob_read, std::string("byte 0 past the end of input ") + names[g_input]);
    }
  }
  g_input = 0;
}

TEST(AttachIsolation, WritingPastOrBeforeAnOutputIsOobWrite) {
  EXPECT_RUN(run_kernel(writes_row_past_end), RunStatus::oob_write, "past the end of output o (canary");
  EXPECT_RUN(run_kernel(writes_far_past_end), RunStatus::oob_write, "past the end of output o (guard page)");
  EXPECT_RUN(run_kernel(writes_before_start), RunStatus::oob_write, "before the start of output o");
  EXPECT_RUN(run_kernel(writes_lse_past_end), RunStatus::oob_write, "output lse");
  EXPECT_RUN(run_kernel(writes_into_input), RunStatus::oob_write, "wrote into input q at byte 4");
}

TEST(AttachIsolation, InProcessRunsStillCheckCanariesAndGuardPages) {
  EXPECT_RUN(run_kernel(writes_row_past_end, quick(false)), RunStatus::oob_write, "past the end of output o (canary");
  EXPECT_RUN(run_kernel(writes_far_past_end, quick(false)), RunStatus::oob_write, "(guard page damaged)");
  EXPECT_RUN(run_kernel(writes_before_start, quick(false)), RunStatus::oob_write, "before the start of output o");
}

TEST(AttachIsolation, CrashesAreNamedBySignal) {
  EXPECT_RUN(run_kernel(aborts), RunStatus::crash, "SIGABRT");
  const KernelRun wild = run_kernel(wild_pointer);
  EXPECT_RUN(wild, RunStatus::crash, "SIGSEGV");
  EXPECT_TRUE(contains(wild.detail, "at address 0x10")) << wild.detail;
  EXPECT_RUN(run_kernel(overflows_stack), RunStatus::crash, "SIGSEGV");
}

TEST(AttachIsolation, ExitAndExceptionsInsideTheKernelAreCrashes) {
  EXPECT_RUN(run_kernel(calls_exit), RunStatus::crash, "called exit(3)");
  EXPECT_RUN(run_kernel(calls_underscore_exit), RunStatus::crash, "exit code 4 before the kernel returned");
  EXPECT_RUN(run_kernel(throws), RunStatus::crash, "kernel gave up");
  EXPECT_RUN(run_kernel(returns_42), RunStatus::crash, "returned 42");
  EXPECT_RUN(run_kernel(throws, quick(false)), RunStatus::crash, "kernel gave up");
}

TEST(AttachIsolation, HangIsKilledAtTheTimeLimit) {
  const auto start = std::chrono::steady_clock::now();
  RunOptions opt = quick();
  opt.time_limit_s = 0.3;
  const KernelRun r = run_kernel(hangs, opt);
  const double s = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  EXPECT_RUN(r, RunStatus::timeout, "CPU time limit of 0.3 s");
  // Ended within a tenth of a CPU second of its limit; the wall time that
  // took depends on how loaded the machine is (not bounded here).
  EXPECT_TRUE(contains(r.detail, "(used 0.3")) << r.detail;
  EXPECT_GE(s, 0.3);
  std::printf("timeout: 0.3 s limit, call returned after %.3f s\n", s);
}

TEST(AttachIsolation, ASoundKernelOnALoadedMachineIsNotTimedOut) {
  // Two busy-loop processes per core, started here: the kernel gets at most
  // half a core, so its 0.3 CPU s take well over the 0.5 s limit in wall time.
  const long cores = std::max(1L, sysconf(_SC_NPROCESSORS_ONLN));
  std::vector<pid_t> busy;
  for (long i = 0; i < 2 * cores; ++i) {
    const pid_t pid = fork();
    ASSERT_GE(pid, 0);
    if (pid == 0) {
      prctl(PR_SET_PDEATHSIG, SIGKILL);
      volatile std::uint64_t spins = 0;
      for (;;) spins = spins + 1;
    }
    busy.push_back(pid);
  }
  RunOptions opt = quick();
  opt.time_limit_s = 0.5;
  opt.seconds_per_work = 0;  // exactly 0.5 CPU s
  g_cpu_seconds = 0.3;
  const auto start = std::chrono::steady_clock::now();
  const KernelRun r = run_kernel(burns_cpu, opt);
  const double wall = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  for (pid_t pid : busy) kill(pid, SIGKILL);
  for (pid_t pid : busy) waitpid(pid, nullptr, 0);
  EXPECT_EQ(r.status, RunStatus::ok) << r.detail;
  EXPECT_GT(wall, opt.time_limit_s) << "the machine was not loaded enough for a wall-clock limit to fire";
  std::printf("0.3 CPU s under %ld busy loops: %.2f s wall, limit 0.5 CPU s: %s\n", 2 * cores, wall,
              run_status_name(r.status));
}

TEST(AttachIsolation, ASleepingKernelEndsAtItsLimitToo) {
  // No CPU used: the limit applies to the time asleep instead.
  RunOptions opt = quick();
  opt.time_limit_s = 0.3;
  const auto start = std::chrono::steady_clock::now();
  const KernelRun r = run_kernel(sleeps_forever, opt);
  const double s = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  EXPECT_RUN(r, RunStatus::timeout, "asleep or blocked (no thread running or waiting for a core) for over 0.3 s");
  EXPECT_GE(s, 0.3);
  EXPECT_LT(s, 3.0);
  std::printf("asleep: 0.3 s limit, call returned after %.3f s\n", s);
}

TEST(AttachIsolation, TheDefaultLimitGrowsWithTheProblem) {
  RunOptions opt;
  const Case small = testing::core_case({1, 2, 1, 3, 5, 4, 4}, MaskKind::none, 7);
  EXPECT_NEAR(call_time_limit(small, opt), opt.time_limit_s, 1e-5);
  Case big = small;
  big.core.shape = {8, 32, 8, 256, 65536, 128, 128};  // 4.3e9 score elements × 256 multiply-adds
  EXPECT_NEAR(call_time_limit(big, opt), 20.0 + 5e-9 * 8.0 * 32 * 256 * 65536 * 256, 1.0);
  opt.seconds_per_work = 0;
  EXPECT_EQ(call_time_limit(big, opt), opt.time_limit_s);
}

TEST(AttachIsolation, MemoryLimitEndsAGreedyKernel) {
  RunOptions opt = quick();
  opt.time_limit_s = 10.0;  // a sanitizer's out-of-memory report takes a while to print
  opt.memory_limit_bytes = std::uint64_t{64} << 20;
  const KernelRun greedy = run_kernel(allocates_a_gigabyte, opt);
  const KernelRun unchecked = run_kernel(mallocs_a_gigabyte_unchecked, opt);
  EXPECT_EQ(greedy.status, RunStatus::crash) << greedy.detail;
  EXPECT_EQ(unchecked.status, RunStatus::crash) << unchecked.detail;
#if !defined(HEADROOM_TEST_UNDER_ASAN)
  // ASan's throwing operator new reports out-of-memory and ends the process
  // itself whatever allocator_may_return_null says (seen with GCC 12 and
  // clang 16), so the bad_alloc, and the reason, are only ours without it.
  EXPECT_TRUE(contains(greedy.detail, "memory limit of +64 MiB")) << greedy.detail;
#endif
  EXPECT_TRUE(contains(unchecked.detail, "memory limit of +64 MiB")) << unchecked.detail;
  // With room to spare the same kernel is fine.
  opt.memory_limit_bytes = std::uint64_t{4} << 30;
  EXPECT_EQ(run_kernel(allocates_a_gigabyte, opt).status, RunStatus::ok);
}

TEST(AttachIsolation, TheChildDiesWithAKilledHeadroom) {
  // A stand-in for headroom (a forked runner) calls a hanging kernel with a
  // long time limit and is SIGKILLed mid-call: nobody is left to time the
  // child out, so it must end by itself, at once.
  int fds[2];
  ASSERT_EQ(pipe(fds), 0);
  g_pid_pipe = fds[1];
  const pid_t runner = fork();
  ASSERT_GE(runner, 0);
  if (runner == 0) {
    RunOptions opt = quick();
    opt.time_limit_s = 60.0;
    (void)run_kernel(reports_pid_then_hangs, opt);
    _exit(0);
  }
  close(fds[1]);
  pid_t kernel_pid = 0;
  const bool told = read(fds[0], &kernel_pid, sizeof kernel_pid) == static_cast<ssize_t>(sizeof kernel_pid);
  close(fds[0]);
  kill(runner, SIGKILL);
  while (waitpid(runner, nullptr, 0) < 0 && errno == EINTR) {
  }
  ASSERT_TRUE(told) << "the kernel never started";
  EXPECT_TRUE(testing::ends_within(kernel_pid, 5.0)) << "isolated child " << kernel_pid << " outlived its parent";
  if (!testing::ends_within(kernel_pid, 0.0)) kill(kernel_pid, SIGKILL);  // a failing run leaves nothing either
}

TEST(AttachIsolation, CallsAreForkedByTheWorkerNotByHeadroom) {
  // The worker was forked when the kernel was attached: however large this
  // process grows afterwards, a call's fork copies only the worker.
  int fds[2];
  ASSERT_EQ(pipe(fds), 0);
  g_pid_pipe = fds[1];
  const KernelRun r = run_kernel(reports_parent);
  char comm[32] = {};
  ASSERT_EQ(read(fds[0], comm, sizeof comm), static_cast<ssize_t>(sizeof comm));
  close(fds[0]);
  close(fds[1]);
  EXPECT_EQ(r.status, RunStatus::ok) << r.detail;
  EXPECT_EQ(std::string(comm), "hr-worker\n");
}

TEST(AttachIsolation, DecliningAndForgettingAreNotFaults) {
  EXPECT_EQ(run_kernel(declines).status, RunStatus::unsupported);
  for (bool isolate : {true, false}) {
    const KernelRun r = run_kernel(writes_nothing, quick(isolate));
    ASSERT_EQ(r.status, RunStatus::ok) << r.detail;
    ASSERT_EQ(r.out.size(), 1 * 2 * 3 * 4);
    for (double v : r.out.values) EXPECT_TRUE(std::isnan(v)) << "an unwritten element must read as NaN";
    for (double v : r.lse.values) EXPECT_TRUE(std::isnan(v));
    EXPECT_EQ(r.unwritten, 1 * 2 * 3 * 4);  // counted as never written, not as NaNs the kernel computed
    EXPECT_EQ(r.first_unwritten, 0);
  }
}

TEST(AttachIsolation, HundredCrashesLeakNothing) {
  const testing::PrivateTempDir tmp;
  const int fds = testing::count_fds();
  const int folders = testing::count_exchange_folders();
  const auto start = std::chrono::steady_clock::now();
  for (int i = 0; i < 100; ++i) {
    const KernelRun r = run_kernel(i % 2 == 0 ? aborts : wild_pointer);
    ASSERT_EQ(r.status, RunStatus::crash) << r.detail;
  }
  const double s = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  std::printf("100 crashing isolated calls: %.3f s (%.2f ms each)\n", s, s * 10);
  EXPECT_EQ(testing::count_fds(), fds);
  EXPECT_EQ(testing::count_exchange_folders(), folders);
  errno = 0;
  EXPECT_EQ(waitpid(-1, nullptr, WNOHANG), -1);
  EXPECT_EQ(errno, ECHILD) << "a child was left unreaped";
  // And the machinery still works afterwards.
  EXPECT_EQ(run_kernel(writes_nothing).status, RunStatus::ok);
}

}  // namespace
}  // namespace headroom
