// headroom — running one kernel call in a forked child, and what became of it.
//
// Internal to the attach stage. The child inherits the MAP_SHARED buffers of a
// GuardedArena, installs a SIGSEGV/SIGBUS handler (SA_SIGINFO, on its own
// stack) that records the faulting address in a shared control page, sets
// RLIMIT_CORE = 0 and RLIMIT_AS, points its stdout at stderr (so kernel output
// cannot corrupt what headroom prints), makes the call and _exits. The parent waits on
// a pidfd with the time limit, SIGKILLs the child past it, and always reaps
// it: no zombie, no descriptor is left behind.
#pragma once

#include <cstdint>
#include <functional>
#include <string>

namespace headroom::attach_detail {

struct CallOutcome {
  enum class How : unsigned char {
    returned,   ///< the call returned `rc`
    signaled,   ///< the child died of `signo` (fault_* set for SIGSEGV/SIGBUS caught by the handler)
    exited,     ///< the process ended with `exit_code` before the call returned
    exception,  ///< the call threw a C++ exception (`message`)
    timeout,    ///< killed after the time limit
    failed      ///< fork or pidfd failed (`message`)
  };
  How how = How::returned;
  int rc = 0;
  int signo = 0;
  bool fault_recorded = false;
  std::uintptr_t fault_addr = 0;
  int fault_write = -1;     ///< 1 write, 0 read, −1 unknown (known on x86-64 only)
  int exit_code = 0;
  bool exit_called = false; ///< exit() (not _exit) was called inside the call
  bool bad_alloc = false;
  std::string message;
  double seconds = 0;
};

/// Returns: the outcome of `call()` run in a forked child. time_limit_s ≤ 0
/// means no limit; memory_limit_bytes 0 means no RLIMIT_AS.
CallOutcome call_isolated(const std::function<int()>& call, double time_limit_s, std::uint64_t memory_limit_bytes);

/// Returns: the outcome of `call()` run in this process (exceptions caught).
CallOutcome call_in_process(const std::function<int()>& call);

/// Returns: e.g. "SIGSEGV (Segmentation fault)".
std::string signal_text(int signo);

}  // namespace headroom::attach_detail
