// headroom tests — a full disk without root: a forked child whose file-size limit makes write() fail.
//
// With RLIMIT_FSIZE set and SIGXFSZ ignored, a write that would grow a file past
// the limit fails with EFBIG instead of killing the process (setrlimit(2),
// "RLIMIT_FSIZE"): the same failure path as ENOSPC for a writer that checks
// every write. The child reports what the call threw, through a pipe.
#pragma once

#include <signal.h>
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <exception>
#include <functional>
#include <string>

#include "headroom/input_error.h"

namespace headroom::testing {

struct ChildOutcome {
  std::string kind;     ///< "returned", "InputError", "other exception", or "died"
  std::string message;  ///< what() of the exception
};

/// Returns: how `call` ended in a child process whose files may not grow past `limit_bytes`.
inline ChildOutcome with_file_size_limit(std::uint64_t limit_bytes, const std::function<void()>& call) {
  int fds[2];
  if (pipe(fds) != 0) return {"died", "pipe failed"};
  const pid_t pid = fork();
  if (pid == 0) {
    close(fds[0]);
    signal(SIGXFSZ, SIG_IGN);
    rlimit limit{limit_bytes, limit_bytes};
    setrlimit(RLIMIT_FSIZE, &limit);
    std::string report;
    try {
      call();
      report = "returned\n";
    } catch (const InputError& e) {
      report = std::string("InputError\n") + e.what();
    } catch (const std::exception& e) {
      report = std::string("other exception\n") + e.what();
    }
    (void)!write(fds[1], report.data(), report.size());
    _exit(0);
  }
  close(fds[1]);
  std::string report;
  char buf[4096];
  for (ssize_t n; (n = read(fds[0], buf, sizeof buf)) > 0;) report.append(buf, static_cast<std::size_t>(n));
  close(fds[0]);
  int status = 0;
  waitpid(pid, &status, 0);
  const auto nl = report.find('\n');
  if (nl == std::string::npos) return {"died", "status " + std::to_string(status)};
  return {report.substr(0, nl), report.substr(nl + 1)};
}

}  // namespace headroom::testing
