// headroom — atomic file writes (atomic_file.h).
#include "headroom/atomic_file.h"

#include <fcntl.h>
#include <unistd.h>

#include <atomic>
#include <cerrno>
#include <cstring>
#include <string>

#include "headroom/input_error.h"

namespace headroom {
namespace {
std::atomic<unsigned> temp_counter{0};
}  // namespace

void write_file_atomically(const std::filesystem::path& path, std::string_view content) {
  const std::string file = path.string();
  const std::filesystem::path dir = path.has_parent_path() ? path.parent_path() : std::filesystem::path(".");
  // Appended piece by piece: GCC 12 at -O3 misreads "." + std::string&& (-Wstringop-overflow, a false positive).
  std::string temp_name = ".";
  temp_name += path.filename().string();
  temp_name += ".tmp-";
  temp_name += std::to_string(::getpid());
  temp_name += "-";
  temp_name += std::to_string(temp_counter++);
  const std::filesystem::path temp = dir / temp_name;
  auto fail = [&](const std::string& what) {
    const std::string reason = std::strerror(errno);
    ::unlink(temp.c_str());
    throw InputError(file, "write", what + ": " + reason, "check that the folder exists, is writable and has space");
  };
  const int fd = ::open(temp.c_str(), O_WRONLY | O_CREAT | O_EXCL | O_CLOEXEC, 0644);
  if (fd < 0) fail("cannot create " + temp.string());
  std::size_t done = 0;
  while (done < content.size()) {
    const ssize_t w = ::write(fd, content.data() + done, content.size() - done);
    if (w < 0 && errno == EINTR) continue;
    if (w <= 0) {
      if (w == 0) errno = ENOSPC;
      ::close(fd);
      fail("write failed");
    }
    done += static_cast<std::size_t>(w);
  }
  // Flushed before the rename, so the new name never points at data still in flight.
  if (::fsync(fd) != 0) {
    ::close(fd);
    fail("fsync failed");
  }
  if (::close(fd) != 0) fail("close failed");
  if (::rename(temp.c_str(), path.c_str()) != 0) fail("rename failed");
}

}  // namespace headroom
