// headroom — the progress bar (progress_bar.h).
#include "headroom/progress_bar.h"

#include <sys/ioctl.h>
#include <unistd.h>

#include <algorithm>
#include <cmath>

#include <fmt/format.h>

namespace headroom {
namespace {

// Columns of the terminal behind `stream`, 80 when it does not say.
std::size_t terminal_width(std::FILE* stream) {
  winsize ws{};
  if (::ioctl(::fileno(stream), TIOCGWINSZ, &ws) == 0 && ws.ws_col >= 20) return ws.ws_col;
  return 80;
}

}  // namespace

double seconds_left(std::size_t done, std::size_t total, double elapsed_s) {
  if (done >= total) return 0;
  if (done == 0) return -1;
  return elapsed_s / static_cast<double>(done) * static_cast<double>(total - done);
}

std::string duration_text(double seconds) {
  if (seconds < 0 || std::isnan(seconds)) return "?";
  const auto s = static_cast<long long>(std::llround(seconds));
  if (s < 60) return fmt::format("{}s", s);
  if (s < 3600) return fmt::format("{}m{:02}s", s / 60, s % 60);
  return fmt::format("{}h{:02}m", s / 3600, (s % 3600) / 60);
}

std::string progress_line(std::size_t done, std::size_t total, double elapsed_s, const std::string& label,
                          std::size_t width) {
  const std::size_t shown = std::min(done, total);
  const double fraction = total == 0 ? 1.0 : static_cast<double>(shown) / static_cast<double>(total);
  const std::string tail = fmt::format(" {:3.0f}% {}/{} ~{} left", 100 * fraction, shown, total,
                                       duration_text(seconds_left(shown, total, elapsed_s)));
  // The bar takes what the figures leave, between 10 and 40 cells.
  const std::size_t room = width > tail.size() + 2 ? width - tail.size() - 2 : 0;
  const std::size_t cells = std::clamp<std::size_t>(room, 10, 40);
  const auto full = static_cast<std::size_t>(std::floor(fraction * static_cast<double>(cells)));
  std::string line = "[" + std::string(full, '#') + std::string(cells - full, '.') + "]" + tail;
  if (!label.empty() && line.size() + 3 < width) {
    line += "  " + label.substr(0, width - line.size() - 2);
  }
  if (line.size() > width) line.resize(width);
  return line;
}

ProgressBar::ProgressBar(std::size_t total, std::FILE* stream)
    : ProgressBar(total, stream, ::isatty(::fileno(stream)) == 1) {}

ProgressBar::ProgressBar(std::size_t total, std::FILE* stream, bool enabled)
    : total_(total), stream_(stream), enabled_(enabled) {}

ProgressBar::~ProgressBar() { finish(); }

void ProgressBar::update(std::size_t done, const std::string& label) {
  if (!enabled_) return;
  const auto now = Clock::now();
  if (drawn_ && done < total_ && now - last_draw_ < std::chrono::milliseconds(100)) return;
  last_draw_ = now;
  const double elapsed = std::chrono::duration<double>(now - start_).count();
  // Leave the last column free: writing into it makes some terminals wrap.
  const std::string line = progress_line(done, total_, elapsed, label, terminal_width(stream_) - 1);
  // \r back to the start, the line, then erase the rest of an older, longer one (ECMA-48 EL).
  std::fputs(("\r" + line + "\x1b[K").c_str(), stream_);
  std::fflush(stream_);
  drawn_ = true;
}

void ProgressBar::finish() {
  if (!enabled_ || !drawn_) return;
  std::fputs("\r\x1b[K", stream_);
  std::fflush(stream_);
  drawn_ = false;
}

}  // namespace headroom
