// headroom — a progress bar with an estimate of the time left, drawn on stderr only when it is a terminal.
//
// The CLI calls update() after each case. The estimate is the mean time per
// finished case so far times the cases left: simple, and unbiased when case
// costs do not drift through the suite (suites mix families, so they do not
// much). Nothing is drawn, and nothing costs, when the stream is not a
// terminal: logs and CI output stay free of carriage returns.
#pragma once

#include <chrono>
#include <cstddef>
#include <cstdio>
#include <string>

namespace headroom {

/// Returns: the estimate of seconds left after `done` of `total` cases took
/// `elapsed_s`: elapsed_s / done · (total − done); 0 when done ≥ total;
/// negative (unknown) when done = 0.
double seconds_left(std::size_t done, std::size_t total, double elapsed_s);

/// Returns: "12s", "3m05s", "1h02m", or "?" for a negative (unknown) estimate.
std::string duration_text(double seconds);

/// Returns: the bar as one line of at most `width` columns, without a line end:
/// "[#####.....]  50% 5/10 ~12s left  label" (the label cut to fit).
/// Preconditions: width ≥ 20.
std::string progress_line(std::size_t done, std::size_t total, double elapsed_s, const std::string& label,
                          std::size_t width);

class ProgressBar {
 public:
  /// Draws on `stream` when `enabled`; by default when `stream` is a terminal.
  explicit ProgressBar(std::size_t total, std::FILE* stream = stderr);
  ProgressBar(std::size_t total, std::FILE* stream, bool enabled);
  ProgressBar(const ProgressBar&) = delete;
  ProgressBar& operator=(const ProgressBar&) = delete;
  /// Clears the bar, so that what is printed next starts on a clean line.
  ~ProgressBar();

  /// Records that `done` cases are finished (the last being `label`) and
  /// redraws, at most ten times a second except for the last case.
  void update(std::size_t done, const std::string& label = "");
  /// Erases the bar (idempotent).
  void finish();
  bool enabled() const { return enabled_; }

 private:
  using Clock = std::chrono::steady_clock;
  std::size_t total_;
  std::FILE* stream_;
  bool enabled_;
  bool drawn_ = false;
  Clock::time_point start_ = Clock::now();
  Clock::time_point last_draw_{};
};

}  // namespace headroom
