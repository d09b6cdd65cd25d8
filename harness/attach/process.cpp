// headroom — a command line under a time limit in its own process group (process.h).
#include "attach/process.h"

#include <fcntl.h>
#include <poll.h>
#include <signal.h>
#include <sys/syscall.h>
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <atomic>
#include <cerrno>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstring>

#include "attach/isolation.h"
#include "attach/program_supervisor.h"
#include "headroom/external_program.h"

namespace headroom::attach_detail {
namespace {

constexpr std::size_t kErrTail = 2000;
// After the leader ends, how long a straggler holding its pipes may keep them.
constexpr double kDrainGrace_s = 0.2;

using Clock = std::chrono::steady_clock;

// The supervisors of the programs now running, for kill_running_programs() in
// a signal handler: lock-free atomics, so reading them there is safe. A
// supervisor is listed from fork until just before it is reaped (after which
// its id could be reused). More programs at once than slots go unlisted.
constexpr int kListedGroups = 16;
std::atomic<pid_t> g_running_supervisors[kListedGroups];
static_assert(std::atomic<pid_t>::is_always_lock_free);

}  // namespace

// glibc 2.36's <sys/pidfd.h> lacks C++ linkage guards, so call the system
// call directly (Linux ≥ 5.3; −1 elsewhere, and the callers fall back to polling).
int open_pidfd(pid_t pid) { return static_cast<int>(syscall(SYS_pidfd_open, pid, 0)); }

int list_supervisor(pid_t supervisor) {
  for (int i = 0; i < kListedGroups; ++i) {
    pid_t empty = 0;
    if (g_running_supervisors[i].compare_exchange_strong(empty, supervisor)) return i;
  }
  return -1;
}

void unlist_supervisor(int slot) {
  if (slot >= 0 && slot < kListedGroups) g_running_supervisors[slot].store(0);
}

[[noreturn]] void exec_child(const char* line, int in, int out_w, int err_w, std::uint64_t as_limit) {
  setpgid(0, 0);
  sigset_t none;
  sigemptyset(&none);
  sigprocmask(SIG_SETMASK, &none, nullptr);
  signal(SIGPIPE, SIG_DFL);
  dup2(in, 0);
  dup2(out_w, 1);
  dup2(err_w, 2);
  close_range(3, ~0u, 0);
  rlimit no_core{0, 0};
  setrlimit(RLIMIT_CORE, &no_core);
  if (as_limit != 0) {
    rlimit as{as_limit, as_limit};
    setrlimit(RLIMIT_AS, &as);
  }
  execl("/bin/sh", "sh", "-c", line, static_cast<char*>(nullptr));
  _exit(127);
}

namespace {

// Returns: false when the descriptor reached end of file (or failed).
bool drain(int fd, std::string& into, std::size_t cap, bool keep_tail, bool& truncated) {
  char buf[4096];
  ssize_t n = read(fd, buf, sizeof buf);
  if (n < 0) return errno == EINTR || errno == EAGAIN;
  if (n == 0) return false;
  into.append(buf, static_cast<std::size_t>(n));
  if (into.size() > cap) {
    truncated = true;
    if (keep_tail) {
      into.erase(0, into.size() - cap);
    } else {
      into.resize(cap);
    }
  }
  return true;
}

}  // namespace

void set_end(ProcessResult& r, const SupervisedEnd& end) {
  if (!end.reported) r.supervisor_lost = true;
  if (WIFSIGNALED(end.status)) {
    r.signaled = true;
    r.signo = WTERMSIG(end.status);
  } else if (WIFEXITED(end.status)) {
    r.exit_code = WEXITSTATUS(end.status);
  }
  if (end.reported && !end.ended_on_request) {
    r.strays = end.strays;
    r.stray_name = end.stray_name;
  }
}

std::string shell_quote(const std::string& s) {
  std::string q = "'";
  for (char c : s) {
    if (c == '\'') {
      q += "'\\''";
    } else {
      q += c;
    }
  }
  return q + "'";
}

ProcessResult run_shell(const std::string& line, double time_limit_s, std::uint64_t memory_limit_bytes,
                        std::size_t max_out) {
  ProcessResult r;
  if (!(time_limit_s < 1e7)) time_limit_s = 0;  // beyond ~4 months (or NaN): no limit, and no clock overflow
  int out_pipe[2] = {-1, -1}, err_pipe[2] = {-1, -1};
  const int devnull = open("/dev/null", O_RDONLY | O_CLOEXEC);
  if (devnull < 0 || pipe2(out_pipe, O_CLOEXEC) != 0 || pipe2(err_pipe, O_CLOEXEC) != 0) {
    r.started = false;
    r.error = std::string("cannot create pipes: ") + std::strerror(errno);
    for (int fd : {devnull, out_pipe[0], out_pipe[1], err_pipe[0], err_pipe[1]}) {
      if (fd >= 0) close(fd);
    }
    return r;
  }
  std::fflush(nullptr);
  const auto start = Clock::now();
  Supervised supervisor = start_supervised(line.c_str(), devnull, out_pipe[1], err_pipe[1], memory_limit_bytes);
  const pid_t pid = supervisor.pid;
  const int fork_errno = errno;
  close(devnull);
  close(out_pipe[1]);
  close(err_pipe[1]);
  if (pid < 0) {
    r.started = false;
    r.error = std::string("fork failed: ") + std::strerror(fork_errno);
    close(out_pipe[0]);
    close(err_pipe[0]);
    return r;
  }
  const int listed = list_supervisor(pid);
  const int pidfd = open_pidfd(pid);
  const auto deadline = start + std::chrono::duration_cast<Clock::duration>(std::chrono::duration<double>(time_limit_s));
  bool out_open = true, err_open = true, ended = false, err_truncated = false;
  auto drain_deadline = Clock::time_point::max();
  while (out_open || err_open || !ended) {
    const auto now = Clock::now();
    if (time_limit_s > 0 && now >= deadline) {
      r.timed_out = true;
      break;
    }
    if (ended && now >= drain_deadline) break;
    Clock::time_point until = time_limit_s > 0 ? deadline : Clock::time_point::max();
    if (ended) until = std::min(until, drain_deadline);
    int timeout_ms = -1;
    if (until != Clock::time_point::max()) {
      timeout_ms = static_cast<int>(std::ceil(std::chrono::duration<double, std::milli>(until - now).count()));
    }
    if (pidfd < 0 && !ended) timeout_ms = timeout_ms < 0 ? 5 : std::min(timeout_ms, 5);
    pollfd fds[3];
    int n = 0, out_i = -1, err_i = -1, pid_i = -1;
    if (out_open) out_i = n, fds[n++] = {out_pipe[0], POLLIN, 0};
    if (err_open) err_i = n, fds[n++] = {err_pipe[0], POLLIN, 0};
    if (!ended && pidfd >= 0) pid_i = n, fds[n++] = {pidfd, POLLIN, 0};
    int got = poll(fds, static_cast<nfds_t>(n), timeout_ms);
    if (got < 0 && errno != EINTR) break;
    if (out_i >= 0 && (fds[out_i].revents & (POLLIN | POLLHUP | POLLERR)) != 0) {
      out_open = drain(out_pipe[0], r.out, max_out, false, r.out_truncated);
    }
    if (err_i >= 0 && (fds[err_i].revents & (POLLIN | POLLHUP | POLLERR)) != 0) {
      err_open = drain(err_pipe[0], r.err_tail, kErrTail, true, err_truncated);
    }
    bool leader_done = false;
    if (pid_i >= 0) {
      leader_done = (fds[pid_i].revents & POLLIN) != 0;
    } else if (pidfd < 0 && !ended) {
      siginfo_t info{};
      leader_done = waitid(P_PID, static_cast<id_t>(pid), &info, WEXITED | WNOHANG | WNOWAIT) == 0 && info.si_pid == pid;
    }
    if (leader_done && !ended) {
      ended = true;
      drain_deadline = Clock::now() + std::chrono::duration_cast<Clock::duration>(std::chrono::duration<double>(kDrainGrace_s));
    }
  }
  // The supervisor ends by itself once the program has and it has killed
  // what the program left; past the time limit it is told to end everything.
  if (!ended) end_supervised(pid);
  unlist_supervisor(listed);
  const SupervisedEnd end = reap_supervised(supervisor);
  if (pidfd >= 0) close(pidfd);
  close(out_pipe[0]);
  close(err_pipe[0]);
  r.seconds = std::chrono::duration<double>(Clock::now() - start).count();
  if (!r.timed_out) set_end(r, end);
  return r;
}

std::string describe_end(const ProcessResult& r, double time_limit_s) {
  std::string s;
  if (!r.started) {
    s = r.error;
  } else if (r.timed_out) {
    char buf[80];
    std::snprintf(buf, sizeof buf, "over the time limit of %g s (killed, with every process it started)", time_limit_s);
    s = buf;
  } else if (r.supervisor_lost) {
    s = "its supervisor (hr-program) ended without a report (" +
        (r.signaled ? "killed by " + signal_text(r.signo) : "exit code " + std::to_string(r.exit_code)) +
        "; did the program kill it?), so only the program's process group was killed";
  } else if (r.signaled) {
    s = "killed by " + signal_text(r.signo);
  } else {
    s = "exit code " + std::to_string(r.exit_code);
    // A shell reports a child killed by signal N as exit status 128 + N (POSIX
    // Shell Command Language, §2.8.2): say which signal that was.
    if (r.exit_code > 128 && r.exit_code < 128 + 65 && sigabbrev_np(r.exit_code - 128) != nullptr) {
      s += " (128 + " + std::to_string(r.exit_code - 128) + ": as a shell reports a process killed by " +
           signal_text(r.exit_code - 128) + ")";
    }
  }
  std::string tail = r.err_tail;
  while (!tail.empty() && (tail.back() == '\n' || tail.back() == ' ')) tail.pop_back();
  for (char& c : tail) {
    if (c == '\n') c = ' ';
  }
  if (!tail.empty()) s += "; stderr: " + tail;
  return s;
}

}  // namespace headroom::attach_detail

namespace headroom {

void kill_running_programs() noexcept {
  for (auto& supervisor : attach_detail::g_running_supervisors) {
    attach_detail::end_supervised(supervisor.load());
  }
}

}  // namespace headroom
