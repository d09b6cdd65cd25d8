// headroom — the two halves of an isolated call: the child that makes it, the waiter that ends it.
//
// Internal to the attach stage, shared by the direct path (isolation.cpp:
// headroom forks the child) and the worker path (isolation_worker.cpp: a
// small worker process forks it). See isolation.h for the contract.
#pragma once

#include <sys/types.h>

#include <cstddef>
#include <cstdint>
#include <functional>

#include "attach/isolation.h"

namespace headroom::attach_detail {

// Written by the child in a MAP_SHARED page, read by the waiter after it
// reaped the child (which orders the accesses).
struct Control {
  volatile int calls_returned;
  int rcs[kMaxCallsPerChild];
  volatile int returned;  ///< every call returned and the strays were ended
  volatile int fault_recorded;
  int fault_signo;
  std::uintptr_t fault_addr;
  int fault_write;
  volatile int exit_called;
  int exit_code;
  volatile int exception;
  int bad_alloc;
  int strays;
  char stray_name[32];
  char message[256];
};

/// In a freshly forked child: sets up the isolation (process group, subreaper,
/// death signal, fault handler, limits), makes call(0) … call(calls − 1), ends
/// the descendants still running, records everything in `control` and _exits.
[[noreturn]] void run_child(Control* control, const std::function<int(int)>& call, int calls,
                            std::uint64_t memory_bytes, pid_t parent);

/// How a child ended, as its waiter saw it.
struct Ended {
  bool timed_out = false;
  bool asleep = false;    ///< asleep or blocked past the limit (not the CPU limit)
  int status = 0;         ///< from wait4
  double seconds = 0;
  double cpu_seconds = 0;
};

/// Waits for child `pid` (of this process) under `limits`, SIGKILLs it past
/// them, kills what is left of its process group and reaps it.
Ended await_child(pid_t pid, const CallLimits& limits);

/// Returns: the outcome of a reaped child from its control page and its end.
CallOutcome outcome_of(const Control& control, const Ended& e);

/// Returns: whether any thread of process `pid` is running or waiting for a
/// core (state R in /proc/PID/task/TID/stat); false when none is, or it ended.
bool any_thread_runnable(pid_t pid);

/// Kills (SIGKILL) and reaps every child of this process, then those that
/// were reparented to it meanwhile (a subreaper's), until none is left.
/// Returns: how many were still running (zombies are reaped, not counted);
/// the first one's command name goes to `name` (NUL-terminated, `cap` bytes).
/// Uses only system calls (async-signal-safe).
int end_all_children(char* name, std::size_t cap);

}  // namespace headroom::attach_detail
