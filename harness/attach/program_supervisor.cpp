// headroom — an external program under a subreaper that ends all it starts (program_supervisor.h).
//
// Between fork and _exit the supervisor calls only async-signal-safe
// functions (system calls, end_all_children), so a headroom with other
// threads cannot deadlock it on a lock held at fork time.
#include "attach/program_supervisor.h"

#include <fcntl.h>
#include <poll.h>
#include <pthread.h>
#include <signal.h>
#include <string.h>
#include <sys/prctl.h>
#include <sys/wait.h>
#include <unistd.h>

#include <cerrno>
#include <chrono>
#include <cmath>

#include "attach/isolation_child.h"
#include "attach/process.h"

namespace headroom::attach_detail {
namespace {

// What the supervisor writes on its report pipe: one note when the program
// has started (its pid, for reap_supervised's fallback), one when all ended.
// Each is far below PIPE_BUF, so it arrives whole.
struct Note {
  int kind;  // kStarted or kEnded
  pid_t program;
  int status;
  int requested;
  int strays;
  char stray_name[32];
};
constexpr int kStarted = 1, kEnded = 2;

void write_note(int fd, const Note& n) {
  while (write(fd, &n, sizeof n) < 0 && errno == EINTR) {
  }
}

[[noreturn]] void supervise(const char* line, int in, int out_w, int err_w, int report_w, std::uint64_t as_limit,
                            pid_t parent) {
  // headroom's handlers are not the supervisor's; the ending signals stay
  // blocked (they were blocked across the fork) and are taken by sigwaitinfo.
  // SIGCHLD must not be SIG_IGN, which would reap the program unseen.
  for (int sig : {SIGTERM, SIGINT, SIGHUP, SIGCHLD, SIGQUIT}) signal(sig, SIG_DFL);
  signal(SIGPIPE, SIG_IGN);  // a report nobody reads any more is no reason to stop ending things
  sigset_t ending;
  sigemptyset(&ending);
  for (int sig : {SIGTERM, SIGINT, SIGHUP, SIGCHLD}) sigaddset(&ending, sig);
  sigprocmask(SIG_SETMASK, &ending, nullptr);
  // headroom's death (SIGKILL included) is a request to end: the signal
  // follows the forking thread, which waits for this process (prctl(2)).
  prctl(PR_SET_PDEATHSIG, SIGTERM);
  if (getppid() != parent) _exit(1);
  setpgid(0, 0);
  prctl(PR_SET_CHILD_SUBREAPER, 1);
  prctl(PR_SET_NAME, "hr-program");
  // The program waits for end of file on `go` until its pid is noted: one
  // that kills its supervisor at once still has its group found and killed.
  int go[2] = {-1, -1};
  if (pipe2(go, O_CLOEXEC) != 0) go[0] = go[1] = -1;
  const pid_t program = fork();
  if (program == 0) {
    if (go[0] >= 0) {
      close(go[1]);
      char c;
      while (read(go[0], &c, 1) < 0 && errno == EINTR) {
      }
    }
    exec_child(line, in, out_w, err_w, as_limit);
  }
  Note end{};
  end.kind = kEnded;
  if (program > 0) {
    setpgid(program, program);  // as exec_child does: whichever runs first, the group exists before a kill
    Note started{};
    started.kind = kStarted;
    started.program = program;
    write_note(report_w, started);
  }
  // Keep nothing of headroom's open (its journal, log, pipes) but the report;
  // closing `go` lets the program start.
  int report = fcntl(report_w, F_DUPFD, 3);
  if (report < 0) report = report_w;
  if (report > 0) close_range(0, static_cast<unsigned>(report) - 1, 0);
  close_range(static_cast<unsigned>(report) + 1, ~0u, 0);
  if (program < 0) {
    end.status = 127 << 8;  // as the shell reports a command it could not start
    write_note(report, end);
    _exit(0);
  }
  bool done = false;
  // Reaps the program, and whatever it left that has ended meanwhile.
  auto reap_ended = [&] {
    for (int status = 0;;) {
      const pid_t w = waitpid(-1, &status, WNOHANG);
      if (w <= 0) break;
      if (w == program) {
        end.status = status;
        done = true;
      }
    }
  };
  while (!done) {
    siginfo_t info{};
    const int sig = sigwaitinfo(&ending, &info);
    if (sig < 0) continue;  // EINTR
    // A request may come after the program has ended on its own (headroom
    // saw its pipes close first): how it ended is still what it did.
    reap_ended();
    if (sig != SIGCHLD) {
      end.requested = done ? 0 : 1;
      break;
    }
  }
  if (!done) {
    kill(-program, SIGKILL);  // not reaped yet: its id still names its group
    // Its status says SIGKILL, unless it was already exiting (its pipes closed
    // before it became a zombie): then the status it exited with.
    while (waitpid(program, &end.status, 0) < 0 && errno == EINTR) {
    }
  }
  end.program = program;
  end.strays = end_all_children(end.stray_name, sizeof end.stray_name);
  write_note(report, end);
  _exit(0);
}

}  // namespace

Supervised start_supervised(const char* line, int in, int out_w, int err_w, std::uint64_t as_limit) {
  Supervised s;
  int report[2];
  if (pipe2(report, O_CLOEXEC) != 0) return s;
  // Every signal blocked across the fork: none may run headroom's handlers
  // in the supervisor before it has set its own.
  sigset_t all, old;
  sigfillset(&all);
  pthread_sigmask(SIG_SETMASK, &all, &old);
  const pid_t parent = getpid();
  const pid_t pid = fork();
  if (pid == 0) supervise(line, in, out_w, err_w, report[1], as_limit, parent);
  const int fork_errno = errno;
  pthread_sigmask(SIG_SETMASK, &old, nullptr);
  close(report[1]);
  if (pid < 0) {
    close(report[0]);
    errno = fork_errno;
    return s;
  }
  setpgid(pid, pid);  // also in the supervisor: whichever runs first, the group exists before any kill
  fcntl(report[0], F_SETFL, O_NONBLOCK);
  s.pid = pid;
  s.report = report[0];
  return s;
}

void end_supervised(pid_t supervisor) noexcept {
  if (supervisor <= 0) return;
  kill(supervisor, SIGCONT);  // a program may have stopped it
  kill(supervisor, SIGTERM);
}

SupervisedEnd reap_supervised(Supervised& s) {
  SupervisedEnd e;
  if (s.pid <= 0) return e;
  using Clock = std::chrono::steady_clock;
  const auto until = Clock::now() + std::chrono::duration_cast<Clock::duration>(std::chrono::duration<double>(kSupervisorGrace_s));
  const int pidfd = open_pidfd(s.pid);
  bool exited = false;
  while (!exited) {
    siginfo_t info{};
    exited = waitid(P_PID, static_cast<id_t>(s.pid), &info, WEXITED | WNOHANG | WNOWAIT) == 0 && info.si_pid == s.pid;
    const auto now = Clock::now();
    if (exited || now >= until) break;
    if (pidfd >= 0) {
      pollfd p{pidfd, POLLIN, 0};
      poll(&p, 1, static_cast<int>(std::ceil(std::chrono::duration<double, std::milli>(until - now).count())));
    } else {
      usleep(1000);
    }
  }
  if (pidfd >= 0) close(pidfd);
  if (!exited) kill(s.pid, SIGKILL);  // stuck: what it has not ended yet is the group kill's below
  int status = 0;
  while (waitpid(s.pid, &status, 0) < 0 && errno == EINTR) {
  }
  Note notes[2]{};
  int got = 0;
  for (; got < 2;) {
    const ssize_t n = read(s.report, &notes[got], sizeof(Note));
    if (n < 0 && errno == EINTR) continue;
    if (n != static_cast<ssize_t>(sizeof(Note))) break;
    ++got;
  }
  close(s.report);
  s.report = -1;
  const Note* started = nullptr;
  for (int i = 0; i < got; ++i) {
    if (notes[i].kind == kStarted) started = &notes[i];
    if (notes[i].kind == kEnded) {
      e.reported = true;
      e.status = notes[i].status;
      e.ended_on_request = notes[i].requested != 0;
      e.strays = notes[i].strays;
      e.stray_name.assign(notes[i].stray_name, strnlen(notes[i].stray_name, sizeof notes[i].stray_name));
    }
  }
  if (!e.reported) {
    // The supervisor was killed (by the program, most likely) or was stuck:
    // the program's group is all that can still be reached.
    e.status = status;
    if (started != nullptr && started->program > 0) kill(-started->program, SIGKILL);
  }
  return e;
}

}  // namespace headroom::attach_detail
