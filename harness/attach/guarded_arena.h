// headroom — the memory of one kernel call: guard pages after inputs, canaries around outputs.
//
// Internal to the attach stage. All buffers of a call live in one anonymous
// MAP_SHARED mapping made before any fork, so a child's writes to outputs are
// seen by the parent. Per buffer, page-aligned:
//
//   input:  [slack][data .............][guard page]     data ends where the guard begins
//   output: [slack][canary|data|canary][guard page]     the trailing canary ends there
//
// The mapping is a memfd placed in the reserved arena space (arena_space.h)
// when there is room, so an isolation worker's child can map the same buffers
// at the same addresses (fd(), protections()); else plain MAP_SHARED memory.
//
// A read of one element past an input's end touches its guard page; a write
// one element past an output's end damages its canary (or, for a long stride,
// reaches the guard page). The start of a buffer is aligned to the element
// size only (the end is what sits on a page boundary).
#pragma once

#include <cstddef>
#include <cstdint>
#include <optional>
#include <string>
#include <vector>

namespace headroom::attach_detail {

/// Canary bytes on each side of an output: wider than any one element, so a
/// single stray element write lands wholly inside a canary.
inline constexpr std::size_t kCanaryBytes = 64;

class GuardedArena {
 public:
  enum class Role : unsigned char { input, output };

  GuardedArena() = default;
  GuardedArena(const GuardedArena&) = delete;
  GuardedArena& operator=(const GuardedArena&) = delete;
  GuardedArena(GuardedArena&& other) noexcept;
  GuardedArena& operator=(GuardedArena&& other) noexcept;
  ~GuardedArena();

  /// Returns: the index of a new buffer of `bytes` (≥ 1) bytes. Preconditions:
  /// before allocate(). `name` ("q", "q_scale", "o") appears in fault details.
  std::size_t add(std::string name, Role role, std::size_t bytes);

  /// Maps every buffer, zero-filled, with canaries and guard pages filled with
  /// the canary pattern. Throws std::runtime_error when mmap fails.
  void allocate();

  unsigned char* data(std::size_t i) const { return base_ + slots_[i].data_offset; }
  std::size_t bytes(std::size_t i) const { return slots_[i].bytes; }

  /// For isolated calls: guard pages PROT_NONE, input pages read-only.
  /// Throws std::runtime_error when mprotect fails.
  void protect();

  /// One mprotect that protect() makes: bytes [offset, offset + length) of the mapping.
  struct Protection {
    std::size_t offset;
    std::size_t length;
    int prot;  ///< PROT_NONE or PROT_READ
  };
  /// Returns: what protect() applies, for a process that maps the buffers itself.
  std::vector<Protection> protections() const;
  /// Records that another process applied protections() to its own mapping of
  /// these buffers (damage() and locate() then read guard hits as protect() does).
  void mark_protected_elsewhere() { protected_ = true; }

  /// Returns: the memfd behind the mapping, or −1 when it is not in the arena space.
  int fd() const { return fd_; }
  unsigned char* base() const { return base_; }
  std::size_t size() const { return size_; }

  /// Returns: the first damaged canary (or, when not protected, guard page)
  /// described as "<byte count> past the end of output o", or nothing.
  std::optional<std::string> damage() const;

  struct Hit {
    std::string name;       ///< the buffer whose guard page or data was hit
    Role role;
    bool in_guard;          ///< false: inside a read-only input's own pages
    std::size_t past_end;   ///< bytes from the buffer's last byte (in_guard), else offset into it
  };
  /// Returns: which buffer's guard page (or read-only input pages) hold `addr`.
  std::optional<Hit> locate(std::uintptr_t addr) const;

 private:
  struct Slot {
    std::string name;
    Role role;
    std::size_t bytes = 0;
    std::size_t region_offset = 0;  ///< first byte of the buffer's pages
    std::size_t data_offset = 0;
    std::size_t guard_offset = 0;   ///< first byte of its guard page
  };
  void release();

  std::vector<Slot> slots_;
  unsigned char* base_ = nullptr;
  std::size_t size_ = 0;
  std::size_t page_ = 0;
  bool protected_ = false;
  int fd_ = -1;  ///< ≥ 0: a memfd mapped at a block of the arena space
};

}  // namespace headroom::attach_detail
