// headroom — the child that makes isolated calls, and ending what it leaves behind (isolation_child.h).
//
// Between fork and _exit the child runs only the calls themselves and
// async-signal-safe functions (prctl, sigaction, setrlimit, open, read,
// kill, waitpid, _exit), so a parent with other threads cannot deadlock it on
// a lock held at fork time — except inside the kernel itself, which is the
// kernel's business (glibc's malloc is made fork-safe by glibc's own fork).
#include "attach/isolation_child.h"

#include <dirent.h>
#include <fcntl.h>
#include <signal.h>
#include <stdlib.h>
#include <string.h>
#include <sys/prctl.h>
#include <sys/resource.h>
#include <sys/syscall.h>
#include <sys/wait.h>
#include <ucontext.h>
#include <unistd.h>

#include <cstdio>
#include <new>
#include <stdexcept>

namespace headroom::attach_detail {
namespace {

constexpr int kExceptionExit = 125;

// Child-only state. The alternate stack is static so that a kernel that
// overflowed its own stack still gets its fault recorded.
Control* g_control = nullptr;
alignas(16) unsigned char g_alt_stack[64 * 1024];

void on_fault(int sig, siginfo_t* info, void* context) {
  g_control->fault_signo = sig;
  g_control->fault_addr = reinterpret_cast<std::uintptr_t>(info->si_addr);
  g_control->fault_write = -1;
#if defined(__x86_64__)
  // Page-fault error code, bit 1: the access was a write (Intel SDM vol. 3A, §4.7).
  const auto* uc = static_cast<const ucontext_t*>(context);
  if (info->si_code > 0) g_control->fault_write = (uc->uc_mcontext.gregs[REG_ERR] & 2) != 0 ? 1 : 0;
#else
  (void)context;
#endif
  g_control->fault_recorded = 1;
  // SA_RESETHAND restored the default action: re-raising (or re-executing the
  // faulting access on return) ends the child with this signal.
  raise(sig);
}

// Registered last, so it runs first when the kernel calls exit(): it records
// the status and ends the child before any of the parent's atexit handlers
// (stdio flushes, test framework teardown) can run in it.
void on_child_exit(int status, void*) {
  g_control->exit_called = 1;
  g_control->exit_code = status;
  _exit(status);
}

// Returns: the number read from a decimal string, or −1.
long parse_number(const char* s, const char* end) {
  long v = 0;
  if (s == end) return -1;
  for (; s < end; ++s) {
    if (*s < '0' || *s > '9') return -1;
    v = v * 10 + (*s - '0');
  }
  return v;
}

// Reads at most cap − 1 bytes of a small /proc file into buf (NUL-terminated).
// Returns: the bytes read, or −1.
ssize_t read_small(const char* path, char* buf, std::size_t cap) {
  const int fd = open(path, O_RDONLY | O_CLOEXEC);
  if (fd < 0) return -1;
  ssize_t n = read(fd, buf, cap - 1);
  close(fd);
  buf[n > 0 ? n : 0] = '\0';
  return n;
}

// Address space in use now (/proc/self/statm, first field, in pages; proc(5)).
std::uint64_t address_space_bytes() {
  char buf[128];
  if (read_small("/proc/self/statm", buf, sizeof buf) <= 0) return 0;
  const char* end = buf;
  while (*end >= '0' && *end <= '9') ++end;
  const long pages = parse_number(buf, end);
  return pages < 0 ? 0 : static_cast<std::uint64_t>(pages) * static_cast<std::uint64_t>(sysconf(_SC_PAGESIZE));
}

// Formats "/proc/self/task/<tid>/children" or "/proc/<pid>/stat" without snprintf's locale.
void proc_path(char* out, const char* head, long id, const char* tail) {
  char digits[24];
  int n = 0;
  do {
    digits[n++] = static_cast<char>('0' + id % 10);
    id /= 10;
  } while (id > 0);
  while (*head) *out++ = *head++;
  while (n > 0) *out++ = digits[--n];
  while (*tail) *out++ = *tail++;
  *out = '\0';
}

// The children of this process: the pids listed in every thread's
// /proc/self/task/TID/children (Linux ≥ 3.5, CONFIG_PROC_CHILDREN). Returns:
// how many were put in `out` (≤ cap), or −1 when the files are missing.
int list_children(pid_t* out, int cap) {
  const int dir = open("/proc/self/task", O_RDONLY | O_DIRECTORY | O_CLOEXEC);
  if (dir < 0) return -1;
  alignas(8) char entries[4096];
  int found = 0;
  bool readable = false;
  for (;;) {
    const long n = syscall(SYS_getdents64, dir, entries, sizeof entries);
    if (n <= 0) break;
    for (long at = 0; at < n;) {
      auto* e = reinterpret_cast<dirent64*>(entries + at);
      at += e->d_reclen;
      const long tid = parse_number(e->d_name, e->d_name + strlen(e->d_name));
      if (tid < 0) continue;
      char path[64], list[4096];
      proc_path(path, "/proc/self/task/", tid, "/children");
      if (read_small(path, list, sizeof list) < 0) continue;
      readable = true;
      for (char* p = list; *p != '\0' && found < cap;) {
        char* q = p;
        while (*q >= '0' && *q <= '9') ++q;
        const long pid = parse_number(p, q);
        if (pid > 0) out[found++] = static_cast<pid_t>(pid);
        p = *q != '\0' ? q + 1 : q;
      }
    }
  }
  close(dir);
  return readable ? found : -1;
}

// Returns: the state letter in a /proc stat file ("PID (COMM) STATE ...") and the command name in `name`.
char state_in(const char* path, char* name, std::size_t cap) {
  char stat[512];
  if (read_small(path, stat, sizeof stat) <= 0) return 'X';
  // "pid (comm) S ppid ...": comm may hold ')' itself, so take the last one.
  char* open_paren = strchr(stat, '(');
  char* close_paren = strrchr(stat, ')');
  if (open_paren == nullptr || close_paren == nullptr || close_paren[1] == '\0') return '?';
  std::size_t len = static_cast<std::size_t>(close_paren - open_paren - 1);
  if (len >= cap) len = cap - 1;
  memcpy(name, open_paren + 1, len);
  name[len] = '\0';
  return close_paren[2];
}

// Returns: the state letter of process `pid` and its command name in `name`.
char state_of(pid_t pid, char* name, std::size_t cap) {
  char path[64];
  proc_path(path, "/proc/", pid, "/stat");
  return state_in(path, name, cap);
}

}  // namespace

bool any_thread_runnable(pid_t pid) {
  char path[64];
  proc_path(path, "/proc/", pid, "/task");
  const int dir = open(path, O_RDONLY | O_DIRECTORY | O_CLOEXEC);
  if (dir < 0) return false;
  alignas(8) char entries[4096];
  bool runnable = false;
  for (long n; !runnable && (n = syscall(SYS_getdents64, dir, entries, sizeof entries)) > 0;) {
    for (long at = 0; at < n && !runnable;) {
      auto* e = reinterpret_cast<dirent64*>(entries + at);
      at += e->d_reclen;
      const long tid = parse_number(e->d_name, e->d_name + strlen(e->d_name));
      if (tid < 0) continue;
      char task[64], stat_path[96], comm[32];
      proc_path(task, "/proc/", pid, "/task/");
      proc_path(stat_path, task, tid, "/stat");
      runnable = state_in(stat_path, comm, sizeof comm) == 'R';
    }
  }
  close(dir);
  return runnable;
}

int end_all_children(char* name, std::size_t cap) {
  if (cap > 0) name[0] = '\0';
  int running = 0;
  // A bounded number of rounds: each round kills every child, and a killed
  // child's own children come to this process (a subreaper) for the next one.
  for (int round = 0; round < 64; ++round) {
    pid_t kids[256];
    const int n = list_children(kids, 256);
    if (n <= 0) {
      // None left, or no children files to list them (a kernel built without
      // CONFIG_PROC_CHILDREN): reap what has ended; the waiter's kill of the
      // process group is then all that ends the rest.
      while (waitpid(-1, nullptr, WNOHANG) > 0) {
      }
      break;
    }
    for (int i = 0; i < n; ++i) {
      char comm[32];
      const char state = state_of(kids[i], comm, sizeof comm);
      if (state != 'Z' && state != 'X') {
        if (running++ == 0 && cap > 0) {
          std::size_t len = strnlen(comm, sizeof comm);
          if (len >= cap) len = cap - 1;
          memcpy(name, comm, len);
          name[len] = '\0';
        }
      }
      kill(kids[i], SIGKILL);
    }
    for (int i = 0; i < n; ++i) {
      while (waitpid(kids[i], nullptr, 0) < 0 && errno == EINTR) {
      }
    }
  }
  return running;
}

void run_child(Control* control, const std::function<int(int)>& call, int calls, std::uint64_t memory_bytes,
               pid_t parent) {
  g_control = control;
  // If the parent dies (SIGKILL, a crash) the child dies with it, not running
  // on as an orphan that nobody will time out. The signal follows the forking
  // thread, which waits for this child before it can end (prctl(2)); checking
  // the parent afterwards closes the race with a parent that died already.
  prctl(PR_SET_PDEATHSIG, SIGKILL);
  if (getppid() != parent) _exit(1);
  // Its own process group (the waiter kills the group), and the reaper of
  // whatever the kernel starts, setsid or double-forked alike.
  setpgid(0, 0);
  prctl(PR_SET_CHILD_SUBREAPER, 1);
  prctl(PR_SET_NAME, "hr-call");
  sigset_t all;
  sigemptyset(&all);
  sigprocmask(SIG_SETMASK, &all, nullptr);
  stack_t ss{};
  ss.ss_sp = g_alt_stack;
  ss.ss_size = sizeof g_alt_stack;
  sigaltstack(&ss, nullptr);
  struct sigaction sa {};
  sa.sa_sigaction = on_fault;
  sa.sa_flags = SA_SIGINFO | SA_ONSTACK | SA_RESETHAND;
  sigemptyset(&sa.sa_mask);
  sigaction(SIGSEGV, &sa, nullptr);
  sigaction(SIGBUS, &sa, nullptr);
  // Whatever the parent (or a sanitizer runtime) installed, the child dies of
  // these signals plainly so the waiter sees which one it was.
  for (int sig : {SIGFPE, SIGILL, SIGABRT, SIGTRAP, SIGSYS, SIGPIPE, SIGTERM, SIGINT, SIGCHLD}) signal(sig, SIG_DFL);
  rlimit no_core{0, 0};
  setrlimit(RLIMIT_CORE, &no_core);
  if (memory_bytes != 0) {
    const std::uint64_t now = address_space_bytes();
    const std::uint64_t as_limit = now > UINT64_MAX - memory_bytes ? UINT64_MAX : now + memory_bytes;
    rlimit as{as_limit, as_limit};
    setrlimit(RLIMIT_AS, &as);
  }
  // headroom's stdout may carry a JSON record: whatever the kernel prints
  // goes to stderr instead, where it is still seen but corrupts nothing.
  dup2(STDERR_FILENO, STDOUT_FILENO);
  on_exit(on_child_exit, nullptr);
  try {
    for (int i = 0; i < calls; ++i) {
      control->rcs[i] = call(i);
      control->calls_returned = i + 1;
    }
  } catch (const std::bad_alloc& e) {
    control->bad_alloc = 1;
    control->exception = 1;
    snprintf(control->message, sizeof control->message, "%s", e.what());
    _exit(kExceptionExit);
  } catch (const std::exception& e) {
    control->exception = 1;
    snprintf(control->message, sizeof control->message, "%s", e.what());
    _exit(kExceptionExit);
  } catch (...) {
    control->exception = 1;
    snprintf(control->message, sizeof control->message, "%s", "a non-standard exception");
    _exit(kExceptionExit);
  }
  control->strays = end_all_children(control->stray_name, sizeof control->stray_name);
  control->returned = 1;
  _exit(0);
}

}  // namespace headroom::attach_detail
