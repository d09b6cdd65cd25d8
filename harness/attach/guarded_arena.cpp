// headroom — guard pages and canaries for one kernel call (guarded_arena.h).
#include "attach/guarded_arena.h"

#include <sys/mman.h>
#include <unistd.h>

#include "attach/arena_space.h"

#include <cerrno>
#include <cstring>
#include <stdexcept>
#include <utility>

namespace headroom::attach_detail {
namespace {

// A fixed, position-dependent pattern: a kernel that writes garbage (or the
// same byte everywhere) cannot leave it intact by chance.
unsigned char canary_byte(std::size_t slot, std::size_t pos) {
  return static_cast<unsigned char>(0xA5u ^ (pos * 131u) ^ (slot * 29u) ^ (pos >> 8));
}

void fill_pattern(unsigned char* p, std::size_t n, std::size_t slot, std::size_t origin) {
  for (std::size_t i = 0; i < n; ++i) p[i] = canary_byte(slot, origin + i);
}

// Returns: the index of the first byte differing from the pattern, or n.
std::size_t first_damaged(const unsigned char* p, std::size_t n, std::size_t slot, std::size_t origin) {
  for (std::size_t i = 0; i < n; ++i) {
    if (p[i] != canary_byte(slot, origin + i)) return i;
  }
  return n;
}

std::size_t round_up(std::size_t n, std::size_t page) { return (n + page - 1) / page * page; }

// Returns: the buffers mapped from a fresh memfd at a block of the arena space, or nullptr.
unsigned char* map_in_space(std::size_t size, int& fd) {
  const auto block = take_space(size);
  if (!block) return nullptr;
  fd = memfd_create("headroom-kernel-buffers", MFD_CLOEXEC);
  if (fd >= 0 && ftruncate(fd, static_cast<off_t>(size)) == 0) {
    void* p = mmap(block->base, size, PROT_READ | PROT_WRITE, MAP_SHARED | MAP_FIXED, fd, 0);
    if (p != MAP_FAILED) return static_cast<unsigned char*>(p);
  }
  if (fd >= 0) close(fd);
  fd = -1;
  return_space(*block);
  return nullptr;
}

}  // namespace

GuardedArena::GuardedArena(GuardedArena&& other) noexcept
    : slots_(std::move(other.slots_)), base_(std::exchange(other.base_, nullptr)),
      size_(std::exchange(other.size_, 0)), page_(other.page_), protected_(other.protected_),
      fd_(std::exchange(other.fd_, -1)) {}

GuardedArena& GuardedArena::operator=(GuardedArena&& other) noexcept {
  if (this != &other) {
    release();
    slots_ = std::move(other.slots_);
    base_ = std::exchange(other.base_, nullptr);
    size_ = std::exchange(other.size_, 0);
    page_ = other.page_;
    protected_ = other.protected_;
    fd_ = std::exchange(other.fd_, -1);
  }
  return *this;
}

GuardedArena::~GuardedArena() { release(); }

void GuardedArena::release() {
  if (base_ != nullptr && fd_ >= 0) {
    // Back to a PROT_NONE reservation, so the block stays part of the arena space.
    void* p = mmap(base_, size_, PROT_NONE, MAP_PRIVATE | MAP_ANONYMOUS | MAP_FIXED | MAP_NORESERVE, -1, 0);
    if (p != MAP_FAILED) return_space({base_, size_});
    close(fd_);
  } else if (base_ != nullptr) {
    munmap(base_, size_);
  }
  base_ = nullptr;
  size_ = 0;
  fd_ = -1;
}


std::size_t GuardedArena::add(std::string name, Role role, std::size_t bytes) {
  if (base_ != nullptr) throw std::logic_error("GuardedArena::add after allocate");
  if (bytes == 0) throw std::logic_error("GuardedArena::add: empty buffer " + name);
  slots_.push_back({std::move(name), role, bytes, 0, 0, 0});
  return slots_.size() - 1;
}

void GuardedArena::allocate() {
  page_ = static_cast<std::size_t>(sysconf(_SC_PAGESIZE));
  std::size_t offset = 0;
  for (Slot& s : slots_) {
    const std::size_t extra = s.role == Role::output ? 2 * kCanaryBytes : 0;
    const std::size_t region = round_up(s.bytes + extra, page_);
    s.region_offset = offset;
    s.guard_offset = offset + region;
    s.data_offset = s.guard_offset - s.bytes - (s.role == Role::output ? kCanaryBytes : 0);
    offset = s.guard_offset + page_;
  }
  size_ = offset;
  base_ = map_in_space(size_, fd_);
  if (base_ == nullptr) {
    void* p = mmap(nullptr, size_, PROT_READ | PROT_WRITE, MAP_SHARED | MAP_ANONYMOUS, -1, 0);
    if (p == MAP_FAILED) {
      size_ = 0;
      throw std::runtime_error(std::string("cannot map kernel buffers: ") + std::strerror(errno));
    }
    base_ = static_cast<unsigned char*>(p);
  }
  for (std::size_t i = 0; i < slots_.size(); ++i) {
    const Slot& s = slots_[i];
    if (s.role == Role::output) {
      fill_pattern(base_ + s.data_offset - kCanaryBytes, kCanaryBytes, i, 0);
      fill_pattern(base_ + s.data_offset + s.bytes, kCanaryBytes, i, kCanaryBytes);
    }
    fill_pattern(base_ + s.guard_offset, page_, i, 2 * kCanaryBytes);
  }
}

std::vector<GuardedArena::Protection> GuardedArena::protections() const {
  std::vector<Protection> out;
  for (const Slot& s : slots_) {
    out.push_back({s.guard_offset, page_, PROT_NONE});
    if (s.role == Role::input) out.push_back({s.region_offset, s.guard_offset - s.region_offset, PROT_READ});
  }
  return out;
}

void GuardedArena::protect() {
  for (const Protection& p : protections()) {
    if (mprotect(base_ + p.offset, p.length, p.prot) != 0)
      throw std::runtime_error(std::string("cannot protect kernel buffers: ") + std::strerror(errno));
  }
  protected_ = true;
}

std::optional<std::string> GuardedArena::damage() const {
  for (std::size_t i = 0; i < slots_.size(); ++i) {
    const Slot& s = slots_[i];
    const char* kind = s.role == Role::output ? "output " : "input ";
    if (s.role == Role::output) {
      const unsigned char* before = base_ + s.data_offset - kCanaryBytes;
      std::size_t at = first_damaged(before, kCanaryBytes, i, 0);
      if (at != kCanaryBytes) {
        return "wrote " + std::to_string(kCanaryBytes - at) + " bytes before the start of " + kind + s.name +
               " (canary damaged)";
      }
      at = first_damaged(base_ + s.data_offset + s.bytes, kCanaryBytes, i, kCanaryBytes);
      if (at != kCanaryBytes) {
        return "wrote byte " + std::to_string(at) + " past the end of " + kind + s.name + " (canary damaged)";
      }
    }
    if (!protected_) {
      const std::size_t tail = s.role == Role::output ? kCanaryBytes : 0;
      std::size_t at = first_damaged(base_ + s.guard_offset, page_, i, 2 * kCanaryBytes);
      if (at != page_) {
        return "wrote byte " + std::to_string(at + tail) + " past the end of " + kind + s.name +
               " (guard page damaged)";
      }
    }
  }
  return std::nullopt;
}

std::optional<GuardedArena::Hit> GuardedArena::locate(std::uintptr_t addr) const {
  const auto base = reinterpret_cast<std::uintptr_t>(base_);
  if (base_ == nullptr || addr < base || addr >= base + size_) return std::nullopt;
  const std::size_t off = addr - base;
  for (const Slot& s : slots_) {
    const std::size_t end = s.data_offset + s.bytes;  // one past the buffer's last byte
    if (off >= s.guard_offset && off < s.guard_offset + page_) {
      return Hit{s.name, s.role, true, off - end};
    }
    if (protected_ && s.role == Role::input && off >= s.region_offset && off < s.guard_offset) {
      return Hit{s.name, s.role, false, off >= s.data_offset ? off - s.data_offset : 0};
    }
  }
  return std::nullopt;
}

}  // namespace headroom::attach_detail
