// Helpers for the tests that run the headroom command line itself.
#pragma once

#include <sys/wait.h>
#include <unistd.h>

#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>

namespace headroom::testing {

inline const std::string kTool = std::string(HEADROOM_BINARY_DIR) + "/tools/headroom";
inline const std::string kSource = HEADROOM_SOURCE_DIR;

/// Returns: an empty folder under the temporary directory, named for the test and the process.
inline std::filesystem::path fresh_cli_dir(const std::string& name) {
  namespace fs = std::filesystem;
  fs::path d = fs::temp_directory_path() / ("headroom_cli_" + name + "_" + std::to_string(::getpid()));
  fs::remove_all(d);
  fs::create_directories(d);
  return d;
}

/// Returns: the contents of a file ("" when it cannot be read).
inline std::string file_text(const std::filesystem::path& p) {
  std::ifstream in(p, std::ios::binary);
  std::stringstream s;
  s << in.rdbuf();
  return s.str();
}

/// Returns: the exit code of `command` run by /bin/sh in `dir` (−1 when it did not exit).
inline int shell_in(const std::filesystem::path& dir, const std::string& command) {
  const int status = std::system(("cd '" + dir.string() + "' && " + command).c_str());
  return WIFEXITED(status) ? WEXITSTATUS(status) : -1;
}

}  // namespace headroom::testing
