// headroom — a small, long-lived process that forks the children of isolated calls.
//
// Internal to the attach stage. Forking copies the forking process's page
// tables, so a child forked from headroom itself costs more the more headroom
// holds (on the standard suite that copy was most of all CPU time). A worker
// is forked once, when a kernel is attached (before any suite is built), and
// then forks one child per isolated call (or per batch of repeated calls): the
// cost of a call no longer depends on headroom's size.
//
// The call's buffers are a memfd in the arena space (arena_space.h): the
// worker passes the descriptor on, and its child maps it at the same
// addresses and applies the guard-page protections itself. The problem
// structure travels as bytes (its pointers hold in the child as they are);
// the kernel's code is the worker's own copy of headroom's, loaded before the
// fork. The worker waits for the child under the limits, ends its process
// group and every process it left behind (the worker is a subreaper), reaps
// it, and answers with the outcome.
//
// One call at a time per worker (calls are serialised here). A worker that
// dies (killed by a kernel, or by anyone) fails the call it was serving with a
// message saying so; the next call starts a fresh worker. The worker dies
// with headroom (PR_SET_PDEATHSIG), and ends when its AttachedKernel does.
#pragma once

#include <sys/types.h>

#include <cstddef>
#include <cstdint>
#include <mutex>
#include <optional>
#include <vector>

#include "attach/guarded_arena.h"
#include "attach/isolation.h"

namespace headroom::attach_detail {

/// A kernel entry in a form the worker can call: `thunk(fn, problem)`.
using CallThunk = std::int32_t (*)(std::uintptr_t fn, const void* problem);

/// The largest problem structure the worker carries, in bytes.
inline constexpr std::size_t kMaxProblemBytes = 4096;

struct WorkerCall {
  const GuardedArena* arena = nullptr;  ///< must be in the arena space (fd() ≥ 0)
  CallThunk thunk = nullptr;
  std::uintptr_t fn = 0;
  const void* problem = nullptr;        ///< points into nothing but `arena`
  std::size_t problem_bytes = 0;        ///< ≤ kMaxProblemBytes
};

class IsolationWorker {
 public:
  IsolationWorker() = default;
  IsolationWorker(const IsolationWorker&) = delete;
  IsolationWorker& operator=(const IsolationWorker&) = delete;
  ~IsolationWorker();

  /// Starts the worker now, if it is not running. Returns: whether it runs.
  bool start();

  /// Returns: the outcome of `calls` (1 … kMaxCallsPerChild) made in order in
  /// one child of the worker; nothing when the worker cannot be used (no arena
  /// space, a buffer outside it, the worker cannot start): the caller then
  /// forks the child itself (call_isolated).
  std::optional<CallOutcome> run(const std::vector<WorkerCall>& calls, const CallLimits& limits);

  /// Returns: the worker's process id, or −1 when none runs (for tests).
  pid_t pid() const { return pid_; }

 private:
  void stop();
  std::mutex lock_;
  pid_t pid_ = -1;
  int socket_ = -1;
};

}  // namespace headroom::attach_detail
