// headroom — the isolation worker: one small process forking every isolated call's child (isolation_worker.h).
#include "attach/isolation_worker.h"

#include <poll.h>
#include <signal.h>
#include <string.h>
#include <sys/mman.h>
#include <sys/prctl.h>
#include <sys/socket.h>
#include <sys/wait.h>
#include <unistd.h>

#include <atomic>
#include <cerrno>
#include <cstdio>
#include <memory>
#include <new>
#include <string>

#include "attach/arena_space.h"
#include "attach/isolation_child.h"

namespace headroom::attach_detail {
namespace {

constexpr std::uint32_t kMagic = 0x68726b77;  // "hrkw"
constexpr int kMaxProtections = 64;

struct WireProtection {
  std::uint64_t offset, length;
  std::int32_t prot;
};

struct WireCall {
  std::uintptr_t thunk, fn, base;
  std::uint64_t size;
  std::uint32_t protections, problem_bytes;
  WireProtection protect[kMaxProtections];
  alignas(64) unsigned char problem[kMaxProblemBytes];
};

struct WireRequest {
  std::uint32_t magic, calls;
  double cpu_s, asleep_s;
  std::uint64_t memory_bytes;
  WireCall call[kMaxCallsPerChild];
};

// The child's control page and its end, copied byte for byte (one binary on both sides).
struct WireAnswer {
  std::uint32_t magic;
  std::int32_t fork_errno;  ///< ≠ 0: the worker could not fork; nothing else is set
  Control control;
  Ended ended;
  std::int32_t left_running;  ///< processes the worker itself ended after the child (its orphans)
  char left_name[32];
};

// Headroom's ends of every worker's socket. A worker closes the others' at
// once: else a second worker would hold the first one's socket open, and the
// first would never see headroom close it. Read without a lock in the
// freshly forked worker (a lock held at fork time would never be released).
std::atomic<int> g_parent_ends[64] = {};

void remember_end(int fd) {
  for (auto& slot : g_parent_ends) {
    int none = 0;
    if (slot.compare_exchange_strong(none, fd + 1)) return;
  }
}

void forget_end(int fd) {
  for (auto& slot : g_parent_ends) {
    int mine = fd + 1;
    if (slot.compare_exchange_strong(mine, 0)) return;
  }
}

// The worker's request and answer: static, not on its (forked, small) stack.
WireRequest g_request;
WireAnswer g_answer;

// In the call child: the worker's request, made one call at a time.
const WireRequest* g_calls = nullptr;
alignas(64) unsigned char g_problem[kMaxProblemBytes];

int call_from_request(int i) {
  const WireCall& c = g_calls->call[i];
  memcpy(g_problem, c.problem, c.problem_bytes);
  return reinterpret_cast<CallThunk>(c.thunk)(c.fn, g_problem);
}

// In the call child: maps every call's buffers where headroom has them and protects them.
bool map_buffers(const WireRequest& r, const int* fds) {
  for (std::uint32_t i = 0; i < r.calls; ++i) {
    const WireCall& c = r.call[i];
    auto* base = reinterpret_cast<unsigned char*>(c.base);
    // The range is the worker's own PROT_NONE reservation, inherited from headroom.
    if (mmap(base, c.size, PROT_READ | PROT_WRITE, MAP_SHARED | MAP_FIXED, fds[i], 0) == MAP_FAILED) return false;
    close(fds[i]);
    for (std::uint32_t k = 0; k < c.protections; ++k) {
      const WireProtection& p = c.protect[k];
      if (mprotect(base + p.offset, p.length, p.prot) != 0) return false;
    }
  }
  return true;
}

bool valid(const WireRequest& r, ssize_t got, int nfds) {
  if (got != static_cast<ssize_t>(sizeof r) || r.magic != kMagic || r.calls < 1 ||
      r.calls > static_cast<std::uint32_t>(kMaxCallsPerChild) || nfds != static_cast<int>(r.calls))
    return false;
  for (std::uint32_t i = 0; i < r.calls; ++i) {
    if (r.call[i].protections > kMaxProtections || r.call[i].problem_bytes > kMaxProblemBytes) return false;
  }
  return true;
}

// Returns: the bytes of one message and up to `max_fds` descriptors passed with it.
ssize_t receive(int sock, void* buf, std::size_t size, int* fds, int max_fds, int* nfds) {
  iovec iov{buf, size};
  alignas(cmsghdr) char space[CMSG_SPACE(sizeof(int) * kMaxCallsPerChild)];
  msghdr msg{};
  msg.msg_iov = &iov;
  msg.msg_iovlen = 1;
  msg.msg_control = space;
  msg.msg_controllen = sizeof space;
  ssize_t n;
  while ((n = recvmsg(sock, &msg, MSG_CMSG_CLOEXEC)) < 0 && errno == EINTR) {
  }
  *nfds = 0;
  for (cmsghdr* c = CMSG_FIRSTHDR(&msg); c != nullptr; c = CMSG_NXTHDR(&msg, c)) {
    if (c->cmsg_level != SOL_SOCKET || c->cmsg_type != SCM_RIGHTS) continue;
    const int count = static_cast<int>((c->cmsg_len - CMSG_LEN(0)) / sizeof(int));
    const int* got = reinterpret_cast<const int*>(CMSG_DATA(c));
    for (int i = 0; i < count; ++i) {
      if (*nfds < max_fds) {
        fds[(*nfds)++] = got[i];
      } else {
        close(got[i]);
      }
    }
  }
  return n;
}

[[noreturn]] void worker_main(int sock, pid_t parent) {
  // Dies with headroom: a worker nobody talks to would wait forever.
  prctl(PR_SET_PDEATHSIG, SIGKILL);
  if (getppid() != parent) _exit(0);
  prctl(PR_SET_CHILD_SUBREAPER, 1);
  prctl(PR_SET_NAME, "hr-worker");  // what ps and the tests see
  for (auto& slot : g_parent_ends) {
    const int fd = slot.load() - 1;
    if (fd >= 0 && fd != sock) close(fd);
  }
  // Ctrl-C and the like end headroom, and the worker with it (above); the
  // worker's own handlers would only race headroom's.
  for (int sig : {SIGINT, SIGTERM, SIGHUP, SIGQUIT, SIGPIPE}) signal(sig, SIG_IGN);
  signal(SIGCHLD, SIG_DFL);
  void* page = mmap(nullptr, sizeof(Control), PROT_READ | PROT_WRITE, MAP_SHARED | MAP_ANONYMOUS, -1, 0);
  if (page == MAP_FAILED) _exit(1);
  auto* control = static_cast<Control*>(page);
  for (;;) {
    int fds[kMaxCallsPerChild];
    int nfds = 0;
    const ssize_t got = receive(sock, &g_request, sizeof g_request, fds, kMaxCallsPerChild, &nfds);
    if (got <= 0) _exit(0);  // headroom closed its end
    if (!valid(g_request, got, nfds)) _exit(3);
    memset(control, 0, sizeof(Control));
    memset(static_cast<void*>(&g_answer), 0, sizeof g_answer);
    g_answer.magic = kMagic;
    const pid_t pid = fork();
    if (pid == 0) {
      close(sock);
      if (!map_buffers(g_request, fds)) _exit(4);
      g_calls = &g_request;
      run_child(control, call_from_request, static_cast<int>(g_request.calls), g_request.memory_bytes, getppid());
    }
    for (int i = 0; i < nfds; ++i) close(fds[i]);
    if (pid < 0) {
      g_answer.fork_errno = errno;
    } else {
      setpgid(pid, pid);
      g_answer.ended = await_child(pid, {g_request.cpu_s, g_request.asleep_s, g_request.memory_bytes});
      memcpy(&g_answer.control, control, sizeof(Control));
      // Whatever the call left behind came to the worker when the child ended.
      g_answer.left_running = end_all_children(g_answer.left_name, sizeof g_answer.left_name);
    }
    if (send(sock, &g_answer, sizeof g_answer, MSG_NOSIGNAL) != static_cast<ssize_t>(sizeof g_answer)) _exit(0);
  }
}

std::string how_it_ended(int status) {
  if (WIFSIGNALED(status)) return "killed by " + signal_text(WTERMSIG(status));
  if (WIFEXITED(status)) return "exit code " + std::to_string(WEXITSTATUS(status));
  return "status " + std::to_string(status);
}

}  // namespace

IsolationWorker::~IsolationWorker() { stop(); }

void IsolationWorker::stop() {
  if (socket_ >= 0) {
    forget_end(socket_);
    close(socket_);
    socket_ = -1;
  }
  if (pid_ > 0) {
    kill(pid_, SIGKILL);
    while (waitpid(pid_, nullptr, 0) < 0 && errno == EINTR) {
    }
    pid_ = -1;
  }
}

bool IsolationWorker::start() {
  if (pid_ > 0) return true;
  if (!arena_space_ready()) return false;  // buffers the worker could map would be missing
  int sv[2];
  if (socketpair(AF_UNIX, SOCK_SEQPACKET | SOCK_CLOEXEC, 0, sv) != 0) return false;
  std::fflush(nullptr);  // buffered output would otherwise be written twice
  const pid_t parent = getpid();
  const pid_t pid = fork();
  if (pid < 0) {
    close(sv[0]);
    close(sv[1]);
    return false;
  }
  if (pid == 0) {
    close(sv[0]);
    worker_main(sv[1], parent);
  }
  close(sv[1]);
  socket_ = sv[0];
  remember_end(socket_);
  pid_ = pid;
  return true;
}

std::optional<CallOutcome> IsolationWorker::run(const std::vector<WorkerCall>& calls, const CallLimits& limits) {
  if (calls.empty() || calls.size() > static_cast<std::size_t>(kMaxCallsPerChild)) return std::nullopt;
  auto request = std::make_unique<WireRequest>();
  request->magic = kMagic;
  request->calls = static_cast<std::uint32_t>(calls.size());
  request->cpu_s = limits.cpu_s;
  request->asleep_s = limits.asleep_s;
  request->memory_bytes = limits.memory_bytes;
  int fds[kMaxCallsPerChild];
  for (std::size_t i = 0; i < calls.size(); ++i) {
    const WorkerCall& c = calls[i];
    WireCall& w = request->call[i];
    const auto prot = c.arena->protections();
    if (c.arena->fd() < 0 || prot.size() > kMaxProtections || c.problem_bytes > kMaxProblemBytes) return std::nullopt;
    fds[i] = c.arena->fd();
    w.thunk = reinterpret_cast<std::uintptr_t>(c.thunk);
    w.fn = c.fn;
    w.base = reinterpret_cast<std::uintptr_t>(c.arena->base());
    w.size = c.arena->size();
    w.protections = static_cast<std::uint32_t>(prot.size());
    for (std::size_t k = 0; k < prot.size(); ++k) w.protect[k] = {prot[k].offset, prot[k].length, prot[k].prot};
    w.problem_bytes = static_cast<std::uint32_t>(c.problem_bytes);
    memcpy(w.problem, c.problem, c.problem_bytes);
  }
  std::lock_guard<std::mutex> hold(lock_);
  CallOutcome failed;
  failed.how = CallOutcome::How::failed;
  // A worker found dead before the request went out (it ended between calls)
  // is replaced silently; one that dies after it took the request fails the call.
  bool sent = false;
  for (int attempt = 0; attempt < 2 && !sent; ++attempt) {
    if (!start()) return std::nullopt;
    iovec iov{request.get(), sizeof(WireRequest)};
    alignas(cmsghdr) char space[CMSG_SPACE(sizeof(int) * kMaxCallsPerChild)] = {};
    msghdr msg{};
    msg.msg_iov = &iov;
    msg.msg_iovlen = 1;
    msg.msg_control = space;
    msg.msg_controllen = CMSG_SPACE(sizeof(int) * calls.size());
    cmsghdr* cm = CMSG_FIRSTHDR(&msg);
    cm->cmsg_level = SOL_SOCKET;
    cm->cmsg_type = SCM_RIGHTS;
    cm->cmsg_len = CMSG_LEN(sizeof(int) * calls.size());
    memcpy(CMSG_DATA(cm), fds, sizeof(int) * calls.size());
    ssize_t n;
    while ((n = sendmsg(socket_, &msg, MSG_NOSIGNAL)) < 0 && errno == EINTR) {
    }
    sent = n == static_cast<ssize_t>(sizeof(WireRequest));
    if (!sent) stop();
  }
  if (!sent) return std::nullopt;
  // The worker enforces the limits (a call waiting for a core may take any
  // wall time): wait for its answer, or for it to end.
  pollfd p{socket_, POLLIN, 0};
  int ready;
  while ((ready = poll(&p, 1, -1)) < 0 && errno == EINTR) {
  }
  auto answer = std::make_unique<WireAnswer>();
  ssize_t got = -1;
  if (ready > 0) {
    while ((got = recv(socket_, answer.get(), sizeof(WireAnswer), 0)) < 0 && errno == EINTR) {
    }
  }
  if (got != static_cast<ssize_t>(sizeof(WireAnswer)) || answer->magic != kMagic) {
    const pid_t worker = pid_;
    int status = 0;
    if (socket_ >= 0) {
      forget_end(socket_);
      close(socket_);
      socket_ = -1;
    }
    while (waitpid(worker, &status, 0) < 0 && errno == EINTR) {
    }
    pid_ = -1;
    failed.message = "the isolation worker (pid " + std::to_string(worker) + ") ended during the call (" +
                     how_it_ended(status) + "); the next call starts a fresh one";
    return failed;
  }
  if (answer->fork_errno != 0) {
    failed.message = std::string("fork failed: ") + strerror(answer->fork_errno);
    return failed;
  }
  CallOutcome out = outcome_of(answer->control, answer->ended);
  if (answer->left_running > 0) {
    if (out.strays == 0) out.stray_name.assign(answer->left_name, strnlen(answer->left_name, sizeof answer->left_name));
    out.strays += answer->left_running;
  }
  return out;
}

}  // namespace headroom::attach_detail
