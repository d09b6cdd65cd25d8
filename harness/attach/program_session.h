// headroom — an external kernel program that stays running and serves many calls (persistent mode).
//
// Internal to the attach stage; the protocol is docs/external-program.md,
// "Persistent mode". A program opts in by declaring "serve": 1 in `CMD
// describe` (protocol 2). headroom then starts `CMD serve` once, through
// /bin/sh, under a supervisor (program_supervisor.h: listed for
// kill_running_programs; what the program starts ends when it does), with
// stdin a socket headroom writes requests into, stdout a pipe it reads replies
// from and stderr a pipe whose last 2000 bytes are kept for messages; every
// other descriptor closed, no core dumps, no address-space limit. Lines, one
// JSON object each, UTF-8, '\n'-terminated, at most kMaxLine bytes:
//
//   program → headroom, once when ready:   {"serve": 1}
//   headroom → program, per call:          {"call": N, "run": "DIR"}
//                         a backward call: {"call": N, "run-backward": "DIR"}
//   program → headroom, per call:          {"call": N, "status": "ok" | "unsupported" | "error", "detail": "..."}
//
// DIR holds the same exchange as `CMD run DIR` (external_program.h). Closing
// stdin asks the program to exit; it gets kQuitGrace_s before it is
// SIGKILLed. Processes it starts may live between calls; they end with the
// session (killed, not counted as faults). A program that dies, overruns the
// time limit of a call or breaks the protocol is SIGKILLed with every process
// it started, the call gets the fault, and the next call starts it afresh.
// Calls are sequential.
#pragma once

#include <filesystem>
#include <string>

#include <sys/types.h>

#include "headroom/external_program.h"

namespace headroom::attach_detail {

/// The longest line either side may send, in bytes (a longer one is a protocol fault).
inline constexpr std::size_t kMaxLine = 64 * 1024;
/// Seconds a program has to exit after its stdin is closed.
inline constexpr double kQuitGrace_s = 1.0;

struct SessionReply {
  enum class How : unsigned char {
    ok,           ///< "status": "ok": read the exchange
    unsupported,  ///< "status": "unsupported": the program declines the problem
    error,        ///< "status": "error": the program failed this call and keeps running (`detail`)
    ended,        ///< the program ended (or could not start) before replying (`detail`)
    timeout,      ///< no reply within the time limit; the group was killed
    broken        ///< a reply that breaks the protocol (`detail`); the group was killed
  };
  How how = How::ok;
  std::string detail;
};

class ProgramSession {
 public:
  /// `command` is CMD; nothing starts until the first call.
  explicit ProgramSession(std::string command) : command_(std::move(command)) {}
  ProgramSession(const ProgramSession&) = delete;
  ProgramSession& operator=(const ProgramSession&) = delete;
  /// Closes stdin, waits up to kQuitGrace_s, then kills the program and all it started.
  ~ProgramSession();

  /// Returns: how the program answered one request naming `dir` under the key
  /// `verb` ("run", or "run-backward" for a backward call), within
  /// time_limit_s seconds (≤ 0: none) from the request; a (re)start first
  /// waits for the ready line under the same limit, counted separately.
  SessionReply call(const std::filesystem::path& dir, double time_limit_s, const char* verb = "run");

  /// Returns: how many times the program was started (tests).
  int starts() const { return starts_; }
  /// Returns: the pid of the running program's supervisor, or 0 when none runs (tests).
  pid_t pid() const { return pid_; }

 private:
  SessionReply start(double time_limit_s);
  // Reads one line into `line` by the deadline. Returns "" on success, else
  // "timeout", "ended" or a protocol problem.
  std::string read_line(std::string& line, double time_limit_s);
  void drain_stderr();
  // Ends the program and all it started, reaps the supervisor, closes every descriptor. Returns how it ended.
  std::string stop(bool kill_now);

  std::string command_;
  pid_t pid_ = 0;
  int pidfd_ = -1, in_ = -1, out_ = -1, err_ = -1, slot_ = -1, report_ = -1;
  std::string pending_, err_tail_;
  long long calls_ = 0;
  int starts_ = 0;
};

}  // namespace headroom::attach_detail
