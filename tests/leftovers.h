// headroom tests — what a kernel call may leave behind: open descriptors, exchange folders, processes.
//
// count_exchange_folders() counts headroom's "headroom-run-*" folders in the
// temporary directory. CTest runs test binaries side by side, so a test that
// compares counts first gives itself a private temporary directory
// (PrivateTempDir: TMPDIR, which std::filesystem::temp_directory_path reads on
// every call) and sees only the folders its own calls made.
#pragma once

#include <unistd.h>

#include <chrono>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <optional>
#include <string>
#include <thread>
#include <vector>

namespace headroom::testing {

inline int count_fds() {
  int n = 0;
  for (const auto& e : std::filesystem::directory_iterator("/proc/self/fd")) {
    (void)e;
    ++n;
  }
  return n;
}

inline int count_exchange_folders() {
  int n = 0;
  for (const auto& e : std::filesystem::directory_iterator(std::filesystem::temp_directory_path())) {
    if (e.path().filename().string().rfind("headroom-run-", 0) == 0) ++n;
  }
  return n;
}

/// Returns: whether process `pid` has ended (gone, or a zombie not reaped yet) within `within_s`.
inline bool ends_within(pid_t pid, double within_s) {
  const auto until = std::chrono::steady_clock::now() + std::chrono::duration<double>(within_s);
  do {
    std::ifstream stat("/proc/" + std::to_string(pid) + "/stat");
    std::string pid_field, comm, state;
    if (!(stat >> pid_field >> comm >> state) || state == "Z" || state == "X") return true;
    std::this_thread::sleep_for(std::chrono::milliseconds(10));
  } while (std::chrono::steady_clock::now() < until);
  return false;
}

/// Returns: this process's children other than live isolation workers (named
/// "hr-worker": one per attached library or bundled kernel, ended with it), as
/// "PID COMM STATE"; a zombie is listed whatever its name.
inline std::vector<std::string> children_besides_workers() {
  std::vector<std::string> out;
  for (const auto& task : std::filesystem::directory_iterator("/proc/self/task")) {
    std::ifstream list(task.path() / "children");
    long pid = 0;
    while (list >> pid) {
      std::ifstream stat("/proc/" + std::to_string(pid) + "/stat");
      std::string pid_field, comm, state;
      stat >> pid_field >> comm >> state;
      if (comm == "(hr-worker)" && state != "Z") continue;
      out.push_back(std::to_string(pid) + " " + comm + " " + state);
    }
  }
  return out;
}

/// While alive, TMPDIR names a fresh folder of this process's own; the old value returns after.
class PrivateTempDir {
 public:
  PrivateTempDir() {
    if (const char* old = std::getenv("TMPDIR")) old_ = old;
    dir_ = std::filesystem::temp_directory_path() / ("headroom-private-tmp-" + std::to_string(::getpid()));
    std::filesystem::create_directories(dir_);
    ::setenv("TMPDIR", dir_.c_str(), 1);
  }
  ~PrivateTempDir() {
    if (old_) {
      ::setenv("TMPDIR", old_->c_str(), 1);
    } else {
      ::unsetenv("TMPDIR");
    }
    std::error_code ec;
    std::filesystem::remove_all(dir_, ec);
  }
  PrivateTempDir(const PrivateTempDir&) = delete;
  PrivateTempDir& operator=(const PrivateTempDir&) = delete;

 private:
  std::filesystem::path dir_;
  std::optional<std::string> old_;
};

}  // namespace headroom::testing
