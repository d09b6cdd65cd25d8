// headroom — opening and reading an input file, bounded (input_file.h).
#include "headroom/input_file.h"

#include <fcntl.h>
#include <sys/stat.h>
#include <unistd.h>

#include <cerrno>
#include <cstring>

#include "headroom/input_error.h"

namespace headroom {
namespace {

std::string what_it_is(mode_t mode) {
  if (S_ISDIR(mode)) return "a directory";
  if (S_ISFIFO(mode)) return "a FIFO (named pipe)";
  if (S_ISCHR(mode)) return "a character device";
  if (S_ISBLK(mode)) return "a block device";
  if (S_ISSOCK(mode)) return "a socket";
  if (S_ISLNK(mode)) return "a symbolic link";
  return "not a regular file";
}

[[noreturn]] void refuse(const std::string& file, const std::string& problem, std::string_view fix) {
  throw InputError(file, "file", problem, std::string(fix));
}

// Checks the open descriptor `fd` of `file` and wraps it; closes it on refusal.
InputFile checked(int fd, const std::string& file, const InputKind& kind, bool single_link) {
  struct stat st {};
  if (fstat(fd, &st) != 0) {
    const int e = errno;
    close(fd);
    refuse(file, std::string("cannot be examined: ") + std::strerror(e), kind.fix);
  }
  InputFile f(fd, static_cast<std::uint64_t>(st.st_size));
  if (!S_ISREG(st.st_mode))
    refuse(file, "is " + what_it_is(st.st_mode) + ", not a regular file; a " + std::string(kind.name) + " is read whole",
           kind.fix);
  if (single_link && st.st_nlink > 1)
    refuse(file, "has " + std::to_string(st.st_nlink) + " hard links: it may be a file outside its folder",
           "copy the file into the folder instead of linking it");
  if (f.size() > kind.max_bytes)
    refuse(file,
           "is " + std::to_string(f.size()) + " bytes, over the cap of " + std::to_string(kind.max_bytes) +
               " bytes for a " + std::string(kind.name),
           kind.fix);
  // Back to blocking reads: the descriptor is a regular file now.
  const int flags = fcntl(fd, F_GETFL);
  if (flags >= 0) fcntl(fd, F_SETFL, flags & ~O_NONBLOCK);
  return f;
}

[[noreturn]] void cannot_open(const std::string& file, int e, const InputKind& kind) {
  if (e == ENOENT) refuse(file, "no such file", kind.fix);
  if (e == ELOOP) refuse(file, "is a symbolic link: the path must not leave its folder", "copy the file in instead of linking it");
  refuse(file, std::string("cannot be opened: ") + std::strerror(e), kind.fix);
}

}  // namespace

InputFile::~InputFile() {
  if (fd_ >= 0) close(fd_);
}

InputFile open_input_file(const std::filesystem::path& path, const InputKind& kind) {
  // O_NONBLOCK: opening a FIFO for reading would otherwise wait for a writer.
  const int fd = open(path.c_str(), O_RDONLY | O_CLOEXEC | O_NONBLOCK | O_NOCTTY);
  if (fd < 0) cannot_open(path.string(), errno, kind);
  return checked(fd, path.string(), kind, false);
}

InputFile open_input_file_in(int dir_fd, const std::filesystem::path& dir, const std::string& name,
                             const InputKind& kind) {
  const std::string file = (dir / name).string();
  if (name.empty() || name == "." || name == ".." || name.find('/') != std::string::npos)
    refuse(file, "is not a plain file name", "name a file inside the folder");
  const int fd = openat(dir_fd, name.c_str(), O_RDONLY | O_CLOEXEC | O_NONBLOCK | O_NOCTTY | O_NOFOLLOW);
  if (fd < 0) cannot_open(file, errno, kind);
  return checked(fd, file, kind, true);
}

std::string read_all(const InputFile& f, const std::filesystem::path& path) {
  std::string text(static_cast<std::size_t>(f.size()) + 1, '\0');
  std::size_t got = 0;
  while (got < text.size()) {
    const ssize_t n = pread(f.fd(), text.data() + got, text.size() - got, static_cast<off_t>(got));
    if (n < 0 && errno == EINTR) continue;
    if (n < 0)
      throw InputError(path.string(), "file", std::string("cannot be read: ") + std::strerror(errno),
                       "check the file and its permissions");
    if (n == 0) break;
    got += static_cast<std::size_t>(n);
  }
  if (got > f.size())
    throw InputError(path.string(), "file", "grew while being read (past " + std::to_string(f.size()) + " bytes)",
                     "read it once nothing writes to it any more");
  text.resize(got);
  return text;
}

std::string read_input_file(const std::filesystem::path& path, const InputKind& kind) {
  return read_all(open_input_file(path, kind), path);
}

}  // namespace headroom
