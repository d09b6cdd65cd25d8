// headroom — running a shell command line under a time limit, and ending all it starts.
//
// Internal to the attach stage (external programs). The command runs as
// `/bin/sh -c LINE` under a supervisor (program_supervisor.h), in a process
// group of its own, with stdin from /dev/null, stdout captured (up to a cap),
// the tail of stderr kept for error messages, every other descriptor closed,
// no core dumps and RLIMIT_AS when asked. Past the time limit the program and
// every process it started are SIGKILLed; when it ends by itself, those of its
// processes still running are killed and counted (`strays`). The supervisor
// is always reaped.
#pragma once

#include <cstddef>
#include <cstdint>
#include <string>

#include <sys/types.h>

namespace headroom::attach_detail {

struct ProcessResult {
  bool started = true;      ///< false: fork failed (`error`)
  std::string error;
  bool timed_out = false;
  bool signaled = false;
  int signo = 0;
  int exit_code = 0;        ///< when it exited normally
  std::string out;          ///< stdout, at most max_out bytes
  bool out_truncated = false;
  std::string err_tail;     ///< the last ≤ 2000 bytes of stderr
  double seconds = 0;
  int strays = 0;           ///< processes it started and left running when it exited by itself (killed)
  std::string stray_name;   ///< the first one's command name (/proc/PID/comm)
  bool supervisor_lost = false;  ///< its supervisor died without a report (signaled/exit_code are the supervisor's)
};

/// Returns: how `/bin/sh -c line` ended. time_limit_s ≤ 0: no limit;
/// memory_limit_bytes 0: no RLIMIT_AS.
ProcessResult run_shell(const std::string& line, double time_limit_s, std::uint64_t memory_limit_bytes,
                        std::size_t max_out = std::size_t{1} << 20);

/// In a freshly forked child: makes it a process group leader, clears the
/// signal mask, points descriptors 0, 1, 2 at `in`, `out_w`, `err_w`, closes
/// every other one, disables core dumps, sets RLIMIT_AS when as_limit ≠ 0 and
/// execs `/bin/sh -c line` (exit 127 when that fails). Async-signal-safe.
[[noreturn]] void exec_child(const char* line, int in, int out_w, int err_w, std::uint64_t as_limit);

/// Returns: a pidfd for `pid` (Linux ≥ 5.3), or −1 (callers then poll waitid).
int open_pidfd(pid_t pid);

/// Lists a program's supervisor for kill_running_programs() (external_program.h).
/// Returns: the slot to pass to unlist_supervisor, or −1 when every slot is
/// taken. Unlist before reaping the supervisor, whose id could then be reused.
int list_supervisor(pid_t supervisor);
void unlist_supervisor(int slot);

struct SupervisedEnd;
/// Sets how the program ended in `r` (exit code or signal, strays) from its supervisor's report.
void set_end(ProcessResult& r, const SupervisedEnd& end);

/// Returns: `s` quoted for /bin/sh (single quotes; a ' inside becomes '\'').
std::string shell_quote(const std::string& s);

/// Returns: one line describing a failed result: "exit code 3", "killed by
/// SIGSEGV (...)", "over the time limit of 2 s", then "; stderr: <tail>".
std::string describe_end(const ProcessResult& r, double time_limit_s);

}  // namespace headroom::attach_detail
