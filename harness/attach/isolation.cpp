// headroom — waiting for an isolated call under its CPU and asleep limits, forking it directly (isolation.h).
#include "attach/isolation.h"

#include <poll.h>
#include <signal.h>
#include <string.h>
#include <sys/mman.h>
#include <sys/resource.h>
#include <sys/syscall.h>
#include <sys/wait.h>
#include <time.h>
#include <unistd.h>

#include <algorithm>
#include <cerrno>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <new>
#include <stdexcept>

#include "attach/isolation_child.h"

namespace headroom::attach_detail {
namespace {

// glibc 2.36's <sys/pidfd.h> lacks C++ linkage guards, so call the system
// call directly (Linux ≥ 5.3; −1 elsewhere, and the waiter falls back to polling).
int open_pidfd(pid_t pid) { return static_cast<int>(syscall(SYS_pidfd_open, pid, 0)); }

double seconds_of(const timeval& t) { return static_cast<double>(t.tv_sec) + 1e-6 * static_cast<double>(t.tv_usec); }

// Returns: the CPU seconds process `pid` has used so far (all its threads), or
// −1 when its clock cannot be read (it ended).
double cpu_now(clockid_t clock) {
  timespec t{};
  if (clock_gettime(clock, &t) != 0) return -1;
  return static_cast<double>(t.tv_sec) + 1e-9 * static_cast<double>(t.tv_nsec);
}

// Returns: whether the child has ended (without reaping it), waiting at most timeout_ms.
bool ended_within(pid_t pid, int pidfd, int timeout_ms) {
  if (pidfd >= 0) {
    pollfd p{pidfd, POLLIN, 0};
    const int n = poll(&p, 1, timeout_ms);
    return n > 0 || (n < 0 && errno != EINTR);  // an error: let wait4 decide
  }
  // No pidfd (old kernel, descriptor limit): look at the child every millisecond.
  const auto until = std::chrono::steady_clock::now() + std::chrono::milliseconds(timeout_ms);
  do {
    siginfo_t info{};
    if (waitid(P_PID, static_cast<id_t>(pid), &info, WEXITED | WNOHANG | WNOWAIT) == 0 && info.si_pid == pid) return true;
    usleep(1000);
  } while (std::chrono::steady_clock::now() < until);
  return false;
}

}  // namespace

std::string signal_text(int signo) {
  const char* abbrev = sigabbrev_np(signo);
  const char* descr = sigdescr_np(signo);
  std::string s = abbrev != nullptr ? std::string("SIG") + abbrev : "signal " + std::to_string(signo);
  if (descr != nullptr) s += std::string(" (") + descr + ")";
  return s;
}

std::string strays_text(int strays, const std::string& first_name) {
  return "left " + std::to_string(strays) + " process(es) it started running after the call returned, the first \"" +
         first_name + "\" (killed)";
}

Ended await_child(pid_t pid, const CallLimits& limits) {
  using Clock = std::chrono::steady_clock;
  Ended e;
  const auto start = Clock::now();
  // Beyond ~4 months (or NaN) is no limit, and no clock overflow.
  const double cpu_limit = limits.cpu_s > 0 && limits.cpu_s < 1e7 ? limits.cpu_s : 0;
  const double asleep_limit = limits.asleep_s > 0 && limits.asleep_s < 1e7 ? limits.asleep_s : 0;
  const int pidfd = open_pidfd(pid);
  clockid_t clock{};
  const bool have_clock = cpu_limit > 0 && clock_getcpuclockid(pid, &clock) == 0;
  double asleep = 0;
  auto last = start;
  for (;;) {
    const auto now = Clock::now();
    // The interval since the last look counts as asleep when no thread can run now.
    if (asleep_limit > 0 && !any_thread_runnable(pid)) asleep += std::chrono::duration<double>(now - last).count();
    last = now;
    if (asleep_limit > 0 && asleep >= asleep_limit) {
      e.timed_out = e.asleep = true;
      break;
    }
    // Look again when a limit could first be reached, at least every 100 ms
    // (a kernel with many threads spends CPU faster than wall time).
    double wait_s = asleep_limit > 0 ? std::clamp(asleep_limit - asleep, 0.005, 0.1) : 1e9;
    if (cpu_limit > 0) {
      // No CPU clock: wall time stands in.
      const double used = have_clock ? cpu_now(clock) : std::chrono::duration<double>(now - start).count();
      if (used >= cpu_limit) {
        e.timed_out = true;
        break;
      }
      wait_s = std::min(wait_s, std::clamp(cpu_limit - (used < 0 ? 0 : used), 0.005, 0.1));
    }
    const int wait_ms = wait_s >= 1e6 ? -1 : static_cast<int>(std::ceil(wait_s * 1000));
    if (ended_within(pid, pidfd, wait_ms)) break;
  }
  if (e.timed_out) kill(pid, SIGKILL);
  // What the kernel started in the child's process group ends with it; killed
  // before the child is reaped, while its pid still names the group.
  kill(-pid, SIGKILL);
  rusage usage{};
  while (wait4(pid, &e.status, 0, &usage) < 0 && errno == EINTR) {
  }
  if (pidfd >= 0) close(pidfd);
  e.seconds = std::chrono::duration<double>(Clock::now() - start).count();
  e.cpu_seconds = seconds_of(usage.ru_utime) + seconds_of(usage.ru_stime);
  return e;
}

CallOutcome outcome_of(const Control& control, const Ended& e) {
  CallOutcome out;
  out.seconds = e.seconds;
  out.cpu_seconds = e.cpu_seconds;
  out.calls_returned = std::clamp(static_cast<int>(control.calls_returned), 0, kMaxCallsPerChild);
  std::copy(control.rcs, control.rcs + out.calls_returned, out.rcs);
  out.strays = control.strays;
  out.stray_name.assign(control.stray_name, strnlen(control.stray_name, sizeof control.stray_name));
  if (e.timed_out) {
    out.how = CallOutcome::How::timeout;
    out.asleep = e.asleep;
  } else if (WIFSIGNALED(e.status)) {
    out.how = CallOutcome::How::signaled;
    out.signo = WTERMSIG(e.status);
    out.fault_recorded = control.fault_recorded != 0 && control.fault_signo == out.signo;
    out.fault_addr = control.fault_addr;
    out.fault_write = control.fault_write;
  } else if (control.returned != 0) {
    out.how = CallOutcome::How::returned;
    out.rc = out.rcs[0];
  } else if (control.exception != 0) {
    out.how = CallOutcome::How::exception;
    out.bad_alloc = control.bad_alloc != 0;
    out.message.assign(control.message, strnlen(control.message, sizeof control.message));
  } else {
    out.how = CallOutcome::How::exited;
    out.exit_code = WIFEXITED(e.status) ? WEXITSTATUS(e.status) : e.status;
    out.exit_called = control.exit_called != 0;
  }
  return out;
}

CallOutcome call_isolated(const std::function<int(int)>& call, int calls, const CallLimits& limits) {
  CallOutcome out;
  if (calls < 1 || calls > kMaxCallsPerChild) throw std::logic_error("call_isolated: 1 to 4 calls per child");
  void* page = mmap(nullptr, sizeof(Control), PROT_READ | PROT_WRITE, MAP_SHARED | MAP_ANONYMOUS, -1, 0);
  if (page == MAP_FAILED) {
    out.how = CallOutcome::How::failed;
    out.message = std::string("cannot map the control page: ") + strerror(errno);
    return out;
  }
  auto* control = new (page) Control{};
  // Buffered output would otherwise be written twice if the child flushes it.
  std::fflush(nullptr);
  const pid_t parent = getpid();
  const pid_t pid = fork();
  if (pid < 0) {
    out.how = CallOutcome::How::failed;
    out.message = std::string("fork failed: ") + strerror(errno);
    munmap(page, sizeof(Control));
    return out;
  }
  if (pid == 0) run_child(control, call, calls, limits.memory_bytes, parent);
  setpgid(pid, pid);  // as the child does itself: whichever runs first, the group exists before it is killed
  out = outcome_of(*control, await_child(pid, limits));
  munmap(page, sizeof(Control));
  return out;
}

CallOutcome call_in_process(const std::function<int()>& call) {
  CallOutcome out;
  const auto start = std::chrono::steady_clock::now();
  try {
    out.rc = call();
    out.rcs[0] = out.rc;
    out.calls_returned = 1;
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
