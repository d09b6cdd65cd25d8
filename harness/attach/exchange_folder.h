// headroom — the private folder one external-program call exchanges its files through.
//
// An ExchangeFolder is made with mkdtemp (mode 0700) in the temporary
// directory as "headroom-run-<pid>-XXXXXX", <pid> being headroom's own, and is
// removed when it goes out of scope, when an exception passes, and, through
// remove_exchange_folders() in the handler of SIGINT, SIGTERM or SIGHUP, when
// headroom is ended by a signal. Only SIGKILL (or a crash of headroom itself)
// can leave one behind; the next ExchangeFolder made by any headroom sweeps
// those: a folder whose <pid> names no running process, owned by this user
// (sweep_abandoned_exchange_folders, external_program.h).
#pragma once

#include <filesystem>

namespace headroom::attach_detail {

class ExchangeFolder {
 public:
  /// Throws std::runtime_error when the folder cannot be made.
  ExchangeFolder();
  ExchangeFolder(const ExchangeFolder&) = delete;
  ExchangeFolder& operator=(const ExchangeFolder&) = delete;
  ~ExchangeFolder();
  const std::filesystem::path& path() const { return path_; }

 private:
  std::filesystem::path path_;
  int slot_ = -1;  // its place in the list remove_exchange_folders() reads; -1 when unlisted
};

}  // namespace headroom::attach_detail
