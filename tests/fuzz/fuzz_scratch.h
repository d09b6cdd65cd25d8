// headroom fuzzing — what the file-reading targets share: a finding's abort,
// and a private scratch folder for the bytes they read back as files.
#pragma once

#include <stdlib.h>

#include <cstdlib>
#include <filesystem>
#include <string>

namespace headroom::fuzzing {

/// Aborts (a libFuzzer finding) unless `ok`.
inline void check(bool ok) {
  if (!ok) std::abort();
}

/// Returns: a folder of this process's own, made on first use under /dev/shm
/// (memory, when there is one) or the temporary folder, named for `target`,
/// and removed when the process exits. One target per process: the first
/// call's `target` names it.
inline const std::filesystem::path& scratch_dir(const char* target) {
  namespace fs = std::filesystem;
  // The name is kept in a plain array too: exit handlers run after the static
  // path below is destroyed (it is constructed after the handler is registered).
  static char name[4096];
  static const fs::path dir = [target] {
    const std::string base = fs::exists("/dev/shm") ? "/dev/shm" : fs::temp_directory_path().string();
    std::string templ = base + "/headroom-" + target + "-XXXXXX";
    check(templ.size() < sizeof name && mkdtemp(templ.data()) != nullptr);
    templ.copy(name, templ.size());
    std::atexit([] {
      std::error_code ec;
      fs::remove_all(fs::path(name), ec);
    });
    return fs::path(templ);
  }();
  return dir;
}

}  // namespace headroom::fuzzing
