// headroom — running kernel calls in a child process, and what became of them.
//
// Internal to the attach stage. A call child inherits (or maps, isolation_worker.h)
// the MAP_SHARED buffers of a GuardedArena, installs a SIGSEGV/SIGBUS handler
// (SA_SIGINFO, on its own stack) that records the faulting address in a shared
// control page, sets RLIMIT_CORE = 0 and RLIMIT_AS, points its stdout at stderr
// (so kernel output cannot corrupt what headroom prints), makes its calls in
// order and _exits.
//
// Processes: the child leads its own process group and is a subreaper
// (PR_SET_CHILD_SUBREAPER), so whatever the kernel starts — forked, setsid,
// double-forked — stays its descendant. When the calls have returned, the
// child kills and reaps every descendant still running and records how many
// there were and the first one's command name (a `stray_process` fault);
// whatever else is left when the child ends (it crashed or was killed) dies
// with its process group, or with the worker that is its subreaper.
//
// Time: the waiter reads the child's CPU time (all its threads) and SIGKILLs
// the child once it passes the CPU limit, so a sound kernel on a loaded
// machine, which waits for a core without using CPU, is not timed out. A
// kernel that sleeps or blocks uses no CPU: the waiter also counts the wall
// time in which no thread of the child is running or waiting for a core
// (sampled every ≤ 100 ms from /proc/PID/task/*/stat) and ends the child once
// that passes its own limit. Waiting for a core counts against neither. The
// child is always reaped: no zombie, no descriptor left behind.
#pragma once

#include <cstdint>
#include <functional>
#include <string>

namespace headroom::attach_detail {

/// The most calls one child makes (the determinism check's repeated calls).
inline constexpr int kMaxCallsPerChild = 4;

struct CallLimits {
  double cpu_s = 0;                ///< CPU seconds of the child, all threads; ≤ 0: none
  double asleep_s = 0;             ///< wall seconds with no thread runnable (asleep, blocked); ≤ 0: none
  std::uint64_t memory_bytes = 0;  ///< address space the calls may add; 0: no RLIMIT_AS
};

struct CallOutcome {
  enum class How : unsigned char {
    returned,   ///< every call returned (`rcs`)
    signaled,   ///< the child died of `signo` (fault_* set for SIGSEGV/SIGBUS caught by the handler)
    exited,     ///< the process ended with `exit_code` before the call returned
    exception,  ///< a call threw a C++ exception (`message`)
    timeout,    ///< killed past the CPU limit (or the asleep limit: `asleep`)
    failed      ///< fork, pidfd or the worker failed (`message`)
  };
  How how = How::returned;
  int calls_returned = 0;          ///< calls that returned before the child ended (all, when returned)
  int rcs[kMaxCallsPerChild] = {};  ///< their return codes, in order
  int rc = 0;                      ///< rcs[0] when how == returned
  int signo = 0;
  bool fault_recorded = false;
  std::uintptr_t fault_addr = 0;
  int fault_write = -1;     ///< 1 write, 0 read, −1 unknown (known on x86-64 only)
  int exit_code = 0;
  bool exit_called = false; ///< exit() (not _exit) was called inside the call
  bool bad_alloc = false;
  bool asleep = false;      ///< timeout: asleep or blocked past its limit, not the CPU limit
  std::string message;
  double seconds = 0;       ///< wall clock from fork to reaping
  double cpu_seconds = 0;   ///< CPU time of the child (user + system, all threads)
  int strays = 0;           ///< processes the calls started and left running (killed)
  std::string stray_name;   ///< the first one's command name (/proc/PID/comm)
};

/// Returns: the outcome of `call(0)` … `call(calls − 1)` made in order in one
/// child forked from this process. Preconditions: 1 ≤ calls ≤ kMaxCallsPerChild.
CallOutcome call_isolated(const std::function<int(int)>& call, int calls, const CallLimits& limits);

/// Returns: the outcome of `call()` run in this process (exceptions caught).
CallOutcome call_in_process(const std::function<int()>& call);

/// Returns: e.g. "SIGSEGV (Segmentation fault)".
std::string signal_text(int signo);

/// Returns: the detail of a `stray_process` fault, plug-in or external program:
/// "left 2 process(es) it started running after the call returned, the first "NAME" (killed)".
std::string strays_text(int strays, const std::string& first_name);

}  // namespace headroom::attach_detail
