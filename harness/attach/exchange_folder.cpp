// headroom — the exchange folders of external-program calls (exchange_folder.h).
#include "attach/exchange_folder.h"

#include <dirent.h>
#include <fcntl.h>
#include <signal.h>
#include <stdlib.h>
#include <sys/stat.h>
#include <unistd.h>

#include <atomic>
#include <cerrno>
#include <charconv>
#include <climits>
#include <cstring>
#include <mutex>
#include <stdexcept>
#include <string>
#include <system_error>

#include "headroom/external_program.h"

namespace headroom {
namespace attach_detail {
namespace {

namespace fs = std::filesystem;

constexpr std::string_view kPrefix = "headroom-run-";

// The folders now in use, for remove_exchange_folders() in a signal handler:
// a slot is claimed (0 → 1), its path written, then published (1 → 2); the
// handler reads only published slots. More folders at once than slots go unlisted.
constexpr int kSlots = 16;
std::atomic<int> g_state[kSlots];
char g_paths[kSlots][PATH_MAX];
static_assert(std::atomic<int>::is_always_lock_free);

int list_folder(const std::string& path) {
  if (path.size() >= PATH_MAX) return -1;
  for (int i = 0; i < kSlots; ++i) {
    int free = 0;
    if (g_state[i].compare_exchange_strong(free, 1)) {
      std::memcpy(g_paths[i], path.c_str(), path.size() + 1);
      g_state[i].store(2);
      return i;
    }
  }
  return -1;
}

// Removes the tree `name` under `parent` with system calls only (openat,
// getdents64, unlinkat): async-signal-safe, unlike std::filesystem. Symbolic
// links are removed, never followed. Nesting past `depth` is left in place.
void remove_tree_at(int parent, const char* name, int depth) noexcept {
  const int fd = openat(parent, name, O_RDONLY | O_DIRECTORY | O_NOFOLLOW | O_CLOEXEC);
  if (fd >= 0) {
    alignas(8) char buf[2048];
    // Entries are unlinked as they are listed; start the listing over until
    // a pass finds nothing left (bounded, so a folder refilled as fast as it
    // is emptied cannot hold the handler forever).
    for (int pass = 0; pass < 64; ++pass) {
      bool removed = false;
      for (;;) {
        const ssize_t n = getdents64(fd, buf, sizeof buf);
        if (n <= 0) break;
        for (ssize_t off = 0; off < n;) {
          const auto* d = reinterpret_cast<const dirent64*>(buf + off);
          off += d->d_reclen;
          const char* e = d->d_name;
          if (e[0] == '.' && (e[1] == '\0' || (e[1] == '.' && e[2] == '\0'))) continue;
          if (unlinkat(fd, e, 0) == 0) {
            removed = true;
          } else if (errno == EISDIR && depth > 0) {
            remove_tree_at(fd, e, depth - 1);
            removed = true;
          }
        }
      }
      if (!removed) break;
      lseek(fd, 0, SEEK_SET);
    }
    close(fd);
  }
  unlinkat(parent, name, AT_REMOVEDIR);
}

// The pid in "headroom-run-<pid>-XXXXXX", or 0 for a name of another form.
pid_t owner_pid(const std::string& name) {
  if (name.compare(0, kPrefix.size(), kPrefix) != 0) return 0;
  const char* b = name.data() + kPrefix.size();
  const char* e = name.data() + name.size();
  pid_t pid = 0;
  const auto r = std::from_chars(b, e, pid);
  if (r.ec != std::errc{} || r.ptr == e || *r.ptr != '-' || pid <= 0) return 0;
  return pid;
}

}  // namespace

ExchangeFolder::ExchangeFolder() {
  const fs::path temp = fs::temp_directory_path();
  static std::once_flag swept;
  std::call_once(swept, [&] { sweep_abandoned_exchange_folders(temp); });
  std::string pattern = (temp / (std::string(kPrefix) + std::to_string(getpid()) + "-XXXXXX")).string();
  if (mkdtemp(pattern.data()) == nullptr) {
    throw std::runtime_error("cannot create an exchange folder under " + temp.string() + ": " + std::strerror(errno));
  }
  path_ = pattern;
  slot_ = list_folder(path_.string());
}

ExchangeFolder::~ExchangeFolder() {
  std::error_code ec;
  fs::remove_all(path_, ec);
  // Unlisted only once gone: a signal arriving meanwhile still removes it.
  if (slot_ >= 0) g_state[slot_].store(0);
}

}  // namespace attach_detail

int sweep_abandoned_exchange_folders(const std::filesystem::path& temp_dir) {
  namespace fs = std::filesystem;
  using attach_detail::owner_pid;
  int removed = 0;
  std::error_code ec;
  for (fs::directory_iterator it(temp_dir, ec), end; !ec && it != end; it.increment(ec)) {
    const std::string name = it->path().filename().string();
    const pid_t pid = owner_pid(name);
    if (pid == 0 || pid == getpid()) continue;
    if (kill(pid, 0) == 0 || errno != ESRCH) continue;  // running (or not ours to signal): in use
    struct stat st {};
    if (lstat(it->path().c_str(), &st) != 0 || !S_ISDIR(st.st_mode) || st.st_uid != geteuid()) continue;
    std::error_code rm;
    if (fs::remove_all(it->path(), rm) > 0 && !rm) ++removed;
  }
  return removed;
}

void remove_exchange_folders() noexcept {
  for (int i = 0; i < attach_detail::kSlots; ++i)
    if (attach_detail::g_state[i].load() == 2) attach_detail::remove_tree_at(AT_FDCWD, attach_detail::g_paths[i], 8);
}

}  // namespace headroom
