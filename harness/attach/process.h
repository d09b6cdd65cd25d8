// headroom — running a shell command line under a time limit, in its own process group.
//
// Internal to the attach stage (external programs). The command runs as
// `/bin/sh -c LINE` with stdin from /dev/null, stdout captured (up to a cap),
// the tail of stderr kept for error messages, every other descriptor closed,
// no core dumps and RLIMIT_AS when asked. Past the time limit the whole
// process group is SIGKILLed; after the leader ends, stragglers in its group
// are killed too. The leader is always reaped.
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

/// Lists process group `group` for kill_running_programs() (external_program.h).
/// Returns: the slot to pass to unlist_group, or −1 when every slot is taken.
/// Unlist before reaping the leader, whose id could then be reused.
int list_group(pid_t group);
void unlist_group(int slot);

/// Returns: `s` quoted for /bin/sh (single quotes; a ' inside becomes '\'').
std::string shell_quote(const std::string& s);

/// Returns: one line describing a failed result: "exit code 3", "killed by
/// SIGSEGV (...)", "over the time limit of 2 s", then "; stderr: <tail>".
std::string describe_end(const ProcessResult& r, double time_limit_s);

}  // namespace headroom::attach_detail
