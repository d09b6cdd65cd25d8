// headroom — opening and reading an input file, bounded: a regular file only, never past a cap.
//
// Every reader of a file a user hands headroom (budget, run record, journal,
// case manifest and tensors, external-program outputs) opens it here, so that
// a FIFO cannot block it, a device (/dev/zero) cannot feed it without end and
// a directory or an oversized file is refused up front: each is an InputError
// (exit 2) naming the file, what it is, and the cap in bytes.
#pragma once

#include <cstdint>
#include <filesystem>
#include <string>
#include <string_view>

namespace headroom {

/// An open regular file (read-only, close-on-exec), closed on destruction.
class InputFile {
 public:
  InputFile(int fd, std::uint64_t size) : fd_(fd), size_(size) {}
  InputFile(InputFile&& o) noexcept : fd_(o.fd_), size_(o.size_) { o.fd_ = -1; }
  InputFile& operator=(InputFile&&) = delete;
  InputFile(const InputFile&) = delete;
  ~InputFile();
  int fd() const { return fd_; }
  /// Its size in bytes when opened (≤ the cap it was opened with).
  std::uint64_t size() const { return size_; }

 private:
  int fd_;
  std::uint64_t size_;
};

/// What an input file is, for messages: "a budget file", "a JSON record".
struct InputKind {
  std::string_view name;      ///< e.g. "budget file"
  std::uint64_t max_bytes;    ///< the cap: a larger file is refused unread
  std::string_view fix;       ///< what to give instead, e.g. "give the path of a budget file (TOML)"
};

/// Returns: `path` opened for reading. Never blocks: a FIFO is opened
/// non-blocking, then refused. Throws InputError(path, "file", ...) when it is
/// missing, unreadable, not a regular file (the message says "a FIFO", "a
/// character device", "a directory", ...) or larger than kind.max_bytes (the
/// message names both sizes).
InputFile open_input_file(const std::filesystem::path& path, const InputKind& kind);

/// Returns: file `name` (one path component) of the folder open as `dir_fd`
/// (shown as `dir` in messages), opened as open_input_file does and also
/// refusing a symbolic link (O_NOFOLLOW, openat: the path cannot leave the
/// folder) and a file with more than one hard link (st_nlink > 1: it may be
/// the same file as one outside the folder).
InputFile open_input_file_in(int dir_fd, const std::filesystem::path& dir, const std::string& name,
                             const InputKind& kind);

/// Returns: the whole content of `f`, read with at most f.size() + 1 bytes
/// asked of the system: a file that grew since it was opened is refused
/// (InputError naming `path`), never read without end.
std::string read_all(const InputFile& f, const std::filesystem::path& path);

/// Returns: read_all(open_input_file(path, kind), path).
std::string read_input_file(const std::filesystem::path& path, const InputKind& kind);

}  // namespace headroom
