// headroom — the process that runs an external program and ends everything it starts.
//
// Internal to the attach stage (external programs, one-shot and persistent).
// headroom forks a supervisor ("hr-program") per program run; the supervisor
// leads a process group of its own, is a subreaper (PR_SET_CHILD_SUBREAPER),
// so whatever the program starts — forked, setsid, double-forked — stays its
// descendant, and forks the program (`/bin/sh -c LINE`, exec_child of
// process.h) in a second group. It then waits for one of:
//
//   - the program ends by itself: every descendant still running is killed
//     and reaped, and counted with the first one's command name (the calls
//     report them as `stray_process`, as isolated plug-in calls do);
//   - SIGTERM, SIGINT or SIGHUP (end_supervised: a time limit, headroom ended
//     by a signal, a session closed) or headroom's death (PR_SET_PDEATHSIG,
//     SIGTERM): the program's group and every descendant are SIGKILLed and reaped.
//
// It then writes its report on a pipe and exits; it holds none of the
// program's descriptors, so the program's pipes reach end of file once every
// descendant is gone. A program can still kill its supervisor (it runs as the
// same user): reap_supervised then kills the program's group, which ends all
// but what left it with setsid.
#pragma once

#include <sys/types.h>

#include <cstdint>
#include <string>

namespace headroom::attach_detail {

struct Supervised {
  pid_t pid = -1;   ///< the supervisor (its own group's leader); −1: fork failed (errno set)
  int report = -1;  ///< the read end of its report pipe (non-blocking, close-on-exec)
};

/// Forks a supervisor that runs `/bin/sh -c line` with descriptors 0, 1, 2 from
/// `in`, `out_w`, `err_w`, and RLIMIT_AS when as_limit ≠ 0. The caller still
/// owns (and closes) its copies of in, out_w and err_w. The supervisor dies
/// with the thread that forks it, and ends the program first.
Supervised start_supervised(const char* line, int in, int out_w, int err_w, std::uint64_t as_limit);

/// Asks a supervisor to end its program and every descendant now (SIGCONT,
/// then SIGTERM). Async-signal-safe.
void end_supervised(pid_t supervisor) noexcept;

struct SupervisedEnd {
  bool reported = false;  ///< false: the supervisor itself was killed (`status` is its own)
  int status = 0;         ///< the program's wait status (the supervisor's when not reported)
  bool ended_on_request = false;  ///< killed by end_supervised (or headroom's death)
  int strays = 0;         ///< descendants still running when the program ended by itself (killed)
  std::string stray_name; ///< the first one's command name (/proc/PID/comm)
};

/// Waits for supervisor `s` to exit — after end_supervised, or once it has
/// ended by itself — and reaps it; one that has not exited within
/// kSupervisorGrace_s is SIGKILLed (its program's group too). Closes s.report.
/// Returns: its report.
SupervisedEnd reap_supervised(Supervised& s);

/// Seconds reap_supervised waits for a supervisor to finish killing and reaping.
inline constexpr double kSupervisorGrace_s = 10.0;

}  // namespace headroom::attach_detail
