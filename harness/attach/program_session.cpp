// headroom — an external kernel program serving many calls over stdin/stdout (program_session.h).
#include "attach/program_session.h"

#include <fcntl.h>
#include <poll.h>
#include <signal.h>
#include <sys/socket.h>
#include <sys/wait.h>
#include <unistd.h>

#include <cerrno>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstring>

#include <nlohmann/json.hpp>

#include "attach/process.h"
#include "attach/program_supervisor.h"

namespace headroom::attach_detail {
namespace {

using Clock = std::chrono::steady_clock;
using nlohmann::json;

constexpr std::size_t kErrTail = 2000;

void close_fd(int& fd) {
  if (fd >= 0) close(fd);
  fd = -1;
}

Clock::time_point deadline_after(double seconds) {
  if (!(seconds > 0 && seconds < 1e7)) return Clock::time_point::max();  // no limit (or NaN)
  return Clock::now() + std::chrono::duration_cast<Clock::duration>(std::chrono::duration<double>(seconds));
}

int poll_ms(Clock::time_point until) {
  if (until == Clock::time_point::max()) return -1;
  const double ms = std::chrono::duration<double, std::milli>(until - Clock::now()).count();
  return ms <= 0 ? 0 : static_cast<int>(std::ceil(std::min(ms, 1e9)));
}

// Appends what `fd` holds now. Returns: false at end of file or on an error.
bool read_some(int fd, std::string& into) {
  char buf[4096];
  const ssize_t n = read(fd, buf, sizeof buf);
  if (n > 0) {
    into.append(buf, static_cast<std::size_t>(n));
    return true;
  }
  return n < 0 && (errno == EINTR || errno == EAGAIN);
}

}  // namespace

ProgramSession::~ProgramSession() {
  if (pid_ != 0) stop(false);
}

void ProgramSession::drain_stderr() {
  while (err_ >= 0) {
    const std::size_t before = err_tail_.size();
    if (!read_some(err_, err_tail_)) {
      close_fd(err_);  // closed by the program: poll must not wake on it again (poll skips fd -1)
      break;
    }
    if (err_tail_.size() == before) break;
    if (err_tail_.size() > kErrTail) err_tail_.erase(0, err_tail_.size() - kErrTail);
  }
}

std::string ProgramSession::stop(bool kill_now) {
  if (!kill_now) {
    close_fd(in_);  // end of file on its stdin: the program's cue to exit
    const auto until = deadline_after(kQuitGrace_s);
    while (Clock::now() < until) {
      siginfo_t info{};
      if (waitid(P_PID, static_cast<id_t>(pid_), &info, WEXITED | WNOHANG | WNOWAIT) == 0 && info.si_pid == pid_) break;
      pollfd p{pidfd_, POLLIN, 0};
      if (pidfd_ >= 0) {
        poll(&p, 1, poll_ms(until));
      } else {
        usleep(5000);
      }
    }
  }
  drain_stderr();
  // Not reaped yet, so its id cannot have been reused; one that has ended
  // already (with its program and all it started) ignores this.
  end_supervised(pid_);
  unlist_supervisor(slot_);
  slot_ = -1;
  Supervised supervisor{pid_, report_};
  const SupervisedEnd end = reap_supervised(supervisor);
  report_ = -1;
  ProcessResult r;
  set_end(r, end);
  r.err_tail = err_tail_;
  for (int* fd : {&pidfd_, &in_, &out_, &err_}) close_fd(*fd);
  pid_ = 0;
  pending_.clear();
  err_tail_.clear();
  return describe_end(r, 0);
}

std::string ProgramSession::read_line(std::string& line, double time_limit_s) {
  const auto until = deadline_after(time_limit_s);
  bool ended = false;
  while (true) {
    const std::size_t nl = pending_.find('\n');
    if (nl != std::string::npos && nl <= kMaxLine) {
      line = pending_.substr(0, nl);
      pending_.erase(0, nl + 1);
      return "";
    }
    if (pending_.size() > kMaxLine) return "a line longer than " + std::to_string(kMaxLine) + " bytes on stdout";
    if (ended) return "ended";
    if (Clock::now() >= until) return "timeout";
    pollfd fds[3] = {{out_, POLLIN, 0}, {err_, POLLIN, 0}, {pidfd_, POLLIN, 0}};
    int timeout = poll_ms(until);
    if (pidfd_ < 0) timeout = timeout < 0 ? 5 : std::min(timeout, 5);
    if (poll(fds, pidfd_ >= 0 ? 3 : 2, timeout) < 0 && errno != EINTR) return "ended";
    if ((fds[1].revents & (POLLIN | POLLHUP | POLLERR)) != 0) drain_stderr();
    if ((fds[0].revents & (POLLIN | POLLHUP | POLLERR)) != 0 && !read_some(out_, pending_)) ended = true;
    bool leader_done = pidfd_ >= 0 && (fds[2].revents & POLLIN) != 0;
    if (pidfd_ < 0) {
      siginfo_t info{};
      leader_done = waitid(P_PID, static_cast<id_t>(pid_), &info, WEXITED | WNOHANG | WNOWAIT) == 0 && info.si_pid == pid_;
    }
    if (leader_done) {
      // A reply written just before the end still counts: take what stdout holds.
      while (pending_.size() <= kMaxLine) {
        const std::size_t before = pending_.size();
        if (!read_some(out_, pending_) || pending_.size() == before) break;
      }
      ended = true;
    }
  }
}

SessionReply ProgramSession::start(double time_limit_s) {
  SessionReply r;
  int sv[2] = {-1, -1}, out_pipe[2] = {-1, -1}, err_pipe[2] = {-1, -1};
  if (socketpair(AF_UNIX, SOCK_STREAM | SOCK_CLOEXEC, 0, sv) != 0 || pipe2(out_pipe, O_CLOEXEC) != 0 ||
      pipe2(err_pipe, O_CLOEXEC) != 0) {
    r.how = SessionReply::How::ended;
    r.detail = std::string("cannot create pipes: ") + std::strerror(errno);
    for (int fd : {sv[0], sv[1], out_pipe[0], out_pipe[1], err_pipe[0], err_pipe[1]})
      if (fd >= 0) close(fd);
    return r;
  }
  const std::string line = command_ + " serve";
  std::fflush(nullptr);
  const Supervised supervisor = start_supervised(line.c_str(), sv[1], out_pipe[1], err_pipe[1], 0);
  const pid_t pid = supervisor.pid;
  const int fork_errno = errno;
  close(sv[1]);
  close(out_pipe[1]);
  close(err_pipe[1]);
  if (pid < 0) {
    r.how = SessionReply::How::ended;
    r.detail = std::string("fork failed: ") + std::strerror(fork_errno);
    for (int fd : {sv[0], out_pipe[0], err_pipe[0]}) close(fd);
    return r;
  }
  pid_ = pid;
  report_ = supervisor.report;
  slot_ = list_supervisor(pid);
  pidfd_ = open_pidfd(pid);
  in_ = sv[0];
  out_ = out_pipe[0];
  err_ = err_pipe[0];
  fcntl(out_, F_SETFL, O_NONBLOCK);
  fcntl(err_, F_SETFL, O_NONBLOCK);
  ++starts_;
  std::string ready;
  const std::string got = read_line(ready, time_limit_s);
  if (got == "timeout") {
    stop(true);
    r.how = SessionReply::How::timeout;
    char buf[96];
    std::snprintf(buf, sizeof buf, "no ready line within the time limit of %g s (killed, with every process it started)",
                  time_limit_s);
    r.detail = buf;
    return r;
  }
  if (got == "ended") {
    r.how = SessionReply::How::ended;
    r.detail = "ended before its ready line: " + stop(true);
    return r;
  }
  std::string problem = got;
  if (problem.empty()) {
    const json j = json::parse(ready, nullptr, false);
    if (!j.is_object() || !j.contains("serve") || j["serve"] != kServeProtocolVersion)
      problem = "ready line " + ready.substr(0, 200) + " is not {\"serve\": " + std::to_string(kServeProtocolVersion) + "}";
  }
  if (!problem.empty()) {
    r.how = SessionReply::How::broken;
    r.detail = problem + " (killed, with every process it started; " + stop(true) + ")";
  }
  return r;
}

SessionReply ProgramSession::call(const std::filesystem::path& dir, double time_limit_s, const char* verb) {
  if (pid_ == 0) {
    SessionReply s = start(time_limit_s);
    if (s.how != SessionReply::How::ok) {
      s.detail = "starting `" + command_ + " serve`: " + s.detail;
      return s;
    }
  }
  drain_stderr();
  err_tail_.clear();  // a call's message carries its own stderr
  const long long n = ++calls_;
  const std::string request = json{{"call", n}, {verb, dir.string()}}.dump() + "\n";
  SessionReply r;
  for (std::size_t sent = 0; sent < request.size();) {
    const ssize_t k = send(in_, request.data() + sent, request.size() - sent, MSG_NOSIGNAL);
    if (k < 0 && errno == EINTR) continue;
    if (k <= 0) {
      r.how = SessionReply::How::ended;
      r.detail = "`" + command_ + " serve` ended between calls: " + stop(true);
      return r;
    }
    sent += static_cast<std::size_t>(k);
  }
  std::string line;
  const std::string got = read_line(line, time_limit_s);
  if (got == "timeout") {
    char buf[96];
    std::snprintf(buf, sizeof buf, "over the time limit of %g s (killed, with every process it started)", time_limit_s);
    r.how = SessionReply::How::timeout;
    r.detail = "`" + command_ + " serve`: " + buf;
    const std::string end = stop(true);
    if (const auto at = end.find("; stderr: "); at != std::string::npos) r.detail += end.substr(at);
    return r;
  }
  if (got == "ended") {
    r.how = SessionReply::How::ended;
    r.detail = "`" + command_ + " serve` ended during the call: " + stop(true);
    return r;
  }
  std::string problem = got;
  json j;
  if (problem.empty()) {
    j = json::parse(line, nullptr, false);
    const std::string shown = line.substr(0, 200);
    if (!j.is_object()) {
      problem = "reply " + shown + " is not a JSON object";
    } else if (!j.contains("call") || j["call"] != n) {
      problem = "reply " + shown + " does not answer call " + std::to_string(n);
    } else if (!j.contains("status") || !j["status"].is_string()) {
      problem = "reply " + shown + " has no \"status\" string";
    } else if (j["status"] != "ok" && j["status"] != "unsupported" && j["status"] != "error") {
      problem = "reply " + shown + ": status must be \"ok\", \"unsupported\" or \"error\"";
    }
  }
  if (!problem.empty()) {
    r.how = SessionReply::How::broken;
    r.detail = "`" + command_ + " serve` broke the protocol: " + problem + " (killed, with every process it started)";
    stop(true);
    return r;
  }
  if (auto d = j.find("detail"); d != j.end() && d->is_string()) r.detail = d->get<std::string>();
  const std::string status = j["status"];
  r.how = status == "ok" ? SessionReply::How::ok
          : status == "unsupported" ? SessionReply::How::unsupported
                                    : SessionReply::How::error;
  if (r.how == SessionReply::How::error) {
    drain_stderr();
    std::string tail = err_tail_;
    while (!tail.empty() && (tail.back() == '\n' || tail.back() == ' ')) tail.pop_back();
    for (char& c : tail)
      if (c == '\n') c = ' ';
    r.detail = "`" + command_ + " serve` reported an error: " + (r.detail.empty() ? "(no detail)" : r.detail) +
               (tail.empty() ? "" : "; stderr: " + tail);
  }
  return r;
}

}  // namespace headroom::attach_detail
