// headroom — one kernel call in a forked child (isolation.h).
//
// Between fork and _exit the child runs only the call itself and
// async-signal-safe functions (prctl, sigaction, setrlimit, _exit), so a parent with
// other threads cannot deadlock it on a lock held at fork time — except inside
// the kernel itself, which is the kernel's business (glibc's malloc is made
// fork-safe by glibc's own fork).
#include "attach/isolation.h"

#include <poll.h>
#include <signal.h>
#include <stdlib.h>
#include <string.h>
#include <sys/mman.h>
#include <sys/prctl.h>
#include <sys/syscall.h>
#include <sys/resource.h>
#include <sys/wait.h>
#include <ucontext.h>
#include <unistd.h>

#include <cerrno>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <fstream>
#include <new>
#include <stdexcept>

namespace headroom::attach_detail {
namespace {

// glibc 2.36's <sys/pidfd.h> lacks C++ linkage guards, so call the system
// call directly (Linux ≥ 5.3; −1 elsewhere, and the callers fall back to polling).
int open_pidfd(pid_t pid) { return static_cast<int>(syscall(SYS_pidfd_open, pid, 0)); }

// Written by the child, read by the parent after waitpid (which orders them).
struct Control {
  volatile int returned;
  int rc;
  volatile int fault_recorded;
  int fault_signo;
  std::uintptr_t fault_addr;
  int fault_write;
  volatile int exit_called;
  int exit_code;
  volatile int exception;
  int bad_alloc;
  char message[256];
};

constexpr int kExceptionExit = 125;

// Child-only state. The alternate stack is static so that a kernel that
// overflowed its own stack still gets its fault recorded.
Control* g_control = nullptr;
alignas(16) unsigned char g_alt_stack[64 * 1024];

void on_fault(int sig, siginfo_t* info, void* context) {
  g_control->fault_signo = sig;
  g_control->fault_addr = reinterpret_cast<std::uintptr_t>(info->si_addr);
  g_control->fault_write = -1;
#if defined(__x86_64__)
  // Page-fault error code, bit 1: the access was a write (Intel SDM vol. 3A, §4.7).
  const auto* uc = static_cast<const ucontext_t*>(context);
  if (info->si_code > 0) g_control->fault_write = (uc->uc_mcontext.gregs[REG_ERR] & 2) != 0 ? 1 : 0;
#else
  (void)context;
#endif
  g_control->fault_recorded = 1;
  // SA_RESETHAND restored the default action: re-raising (or re-executing the
  // faulting access on return) ends the child with this signal.
  raise(sig);
}

// Registered last, so it runs first when the kernel calls exit(): it records
// the status and ends the child before any of the parent's atexit handlers
// (stdio flushes, test framework teardown) can run in it.
void on_child_exit(int status, void*) {
  g_control->exit_called = 1;
  g_control->exit_code = status;
  _exit(status);
}

[[noreturn]] void child_main(Control* control, const std::function<int()>& call, std::uint64_t as_limit,
                             pid_t parent) {
  g_control = control;
  // If headroom dies (SIGKILL, a crash) the child dies with it, not running on
  // as an orphan that nobody will time out. The signal follows the forking
  // thread, which waits for this child before it can end (prctl(2)); checking
  // the parent afterwards closes the race with a parent that died already.
  prctl(PR_SET_PDEATHSIG, SIGKILL);
  if (getppid() != parent) _exit(1);
  sigset_t all;
  sigemptyset(&all);
  sigprocmask(SIG_SETMASK, &all, nullptr);
  stack_t ss{};
  ss.ss_sp = g_alt_stack;
  ss.ss_size = sizeof g_alt_stack;
  sigaltstack(&ss, nullptr);
  struct sigaction sa {};
  sa.sa_sigaction = on_fault;
  sa.sa_flags = SA_SIGINFO | SA_ONSTACK | SA_RESETHAND;
  sigemptyset(&sa.sa_mask);
  sigaction(SIGSEGV, &sa, nullptr);
  sigaction(SIGBUS, &sa, nullptr);
  // Whatever the parent (or a sanitizer runtime) installed, the child dies of
  // these signals plainly so the parent sees which one it was.
  for (int sig : {SIGFPE, SIGILL, SIGABRT, SIGTRAP, SIGSYS, SIGPIPE, SIGTERM, SIGINT}) signal(sig, SIG_DFL);
  rlimit no_core{0, 0};
  setrlimit(RLIMIT_CORE, &no_core);
  if (as_limit != 0) {
    rlimit as{as_limit, as_limit};
    setrlimit(RLIMIT_AS, &as);
  }
  // headroom's stdout may carry a JSON record: whatever the kernel prints
  // goes to stderr instead, where it is still seen but corrupts nothing.
  dup2(STDERR_FILENO, STDOUT_FILENO);
  on_exit(on_child_exit, nullptr);
  int rc = 0;
  try {
    rc = call();
  } catch (const std::bad_alloc& e) {
    control->bad_alloc = 1;
    control->exception = 1;
    snprintf(control->message, sizeof control->message, "%s", e.what());
    _exit(kExceptionExit);
  } catch (const std::exception& e) {
    control->exception = 1;
    snprintf(control->message, sizeof control->message, "%s", e.what());
    _exit(kExceptionExit);
  } catch (...) {
    control->exception = 1;
    snprintf(control->message, sizeof control->message, "%s", "a non-standard exception");
    _exit(kExceptionExit);
  }
  control->rc = rc;
  control->returned = 1;
  _exit(0);
}

// Address space in use now (/proc/self/statm, first field, in pages; proc(5)).
std::uint64_t address_space_bytes() {
  std::ifstream statm("/proc/self/statm");
  std::uint64_t pages = 0;
  statm >> pages;
  return pages * static_cast<std::uint64_t>(sysconf(_SC_PAGESIZE));
}

// Returns: false when the time limit passed before the child ended.
bool wait_for_end(pid_t pid, int pidfd, double limit_s) {
  if (!(limit_s < 1e7)) limit_s = 0;  // beyond ~4 months (or NaN): no limit, and no clock overflow
  using Clock = std::chrono::steady_clock;
  const auto deadline = Clock::now() + std::chrono::duration_cast<Clock::duration>(std::chrono::duration<double>(limit_s));
  for (;;) {
    int timeout_ms = -1;
    if (limit_s > 0) {
      auto left = std::chrono::duration<double, std::milli>(deadline - Clock::now()).count();
      if (left <= 0) return false;
      timeout_ms = static_cast<int>(std::ceil(left));
    }
    if (pidfd >= 0) {
      pollfd p{pidfd, POLLIN, 0};
      int n = poll(&p, 1, timeout_ms);
      if (n > 0) return true;
      if (n == 0) return false;
      if (errno != EINTR) return true;  // let waitpid decide
    } else {
      // No pidfd (old kernel, descriptor limit): poll the child every millisecond.
      siginfo_t info{};
      if (waitid(P_PID, static_cast<id_t>(pid), &info, WEXITED | WNOHANG | WNOWAIT) == 0 && info.si_pid == pid) return true;
      usleep(1000);
    }
  }
}

}  // namespace

std::string signal_text(int signo) {
  const char* abbrev = sigabbrev_np(signo);
  const char* descr = sigdescr_np(signo);
  std::string s = abbrev != nullptr ? std::string("SIG") + abbrev : "signal " + std::to_string(signo);
  if (descr != nullptr) s += std::string(" (") + descr + ")";
  return s;
}

CallOutcome call_isolated(const std::function<int()>& call, double time_limit_s, std::uint64_t memory_limit_bytes) {
  CallOutcome out;
  void* page = mmap(nullptr, sizeof(Control), PROT_READ | PROT_WRITE, MAP_SHARED | MAP_ANONYMOUS, -1, 0);
  if (page == MAP_FAILED) {
    out.how = CallOutcome::How::failed;
    out.message = std::string("cannot map the control page: ") + strerror(errno);
    return out;
  }
  auto* control = new (page) Control{};
  std::uint64_t as_limit = 0;
  if (memory_limit_bytes != 0) {
    const std::uint64_t now = address_space_bytes();
    as_limit = now > UINT64_MAX - memory_limit_bytes ? UINT64_MAX : now + memory_limit_bytes;
  }
  // Buffered output would otherwise be written twice if the child flushes it.
  std::fflush(nullptr);
  const auto start = std::chrono::steady_clock::now();
  const pid_t parent = getpid();
  const pid_t pid = fork();
  if (pid < 0) {
    out.how = CallOutcome::How::failed;
    out.message = std::string("fork failed: ") + strerror(errno);
    munmap(page, sizeof(Control));
    return out;
  }
  if (pid == 0) child_main(control, call, as_limit, parent);
  const int pidfd = open_pidfd(pid);
  const bool ended = wait_for_end(pid, pidfd, time_limit_s);
  if (!ended) kill(pid, SIGKILL);
  int status = 0;
  while (waitpid(pid, &status, 0) < 0 && errno == EINTR) {
  }
  if (pidfd >= 0) close(pidfd);
  out.seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  if (!ended) {
    out.how = CallOutcome::How::timeout;
  } else if (WIFSIGNALED(status)) {
    out.how = CallOutcome::How::signaled;
    out.signo = WTERMSIG(status);
    out.fault_recorded = control->fault_recorded != 0 && control->fault_signo == out.signo;
    out.fault_addr = control->fault_addr;
    out.fault_write = control->fault_write;
  } else if (control->returned != 0) {
    out.how = CallOutcome::How::returned;
    out.rc = control->rc;
  } else if (control->exception != 0) {
    out.how = CallOutcome::How::exception;
    out.bad_alloc = control->bad_alloc != 0;
    out.message.assign(control->message, strnlen(control->message, sizeof control->message));
  } else {
    out.how = CallOutcome::How::exited;
    out.exit_code = WIFEXITED(status) ? WEXITSTATUS(status) : status;
    out.exit_called = control->exit_called != 0;
  }
  munmap(page, sizeof(Control));
  return out;
}

CallOutcome call_in_process(const std::function<int()>& call) {
  CallOutcome out;
  const auto start = std::chrono::steady_clock::now();
  try {
    out.rc = call();
    out.how = CallOutcome::How::returned;
  } catch (const std::bad_alloc& e) {
    out.how = CallOutcome::How::exception;
    out.bad_alloc = true;
    out.message = e.what();
  } catch (const std::exception& e) {
    out.how = CallOutcome::How::exception;
    out.message = e.what();
  } catch (...) {
    out.how = CallOutcome::How::exception;
    out.message = "a non-standard exception";
  }
  out.seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  return out;
}

}  // namespace headroom::attach_detail
