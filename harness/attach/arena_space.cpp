// headroom — the reserved range for kernel-call buffers (arena_space.h).
#include "attach/arena_space.h"

#include <sys/mman.h>
#include <unistd.h>

#include <cstdint>
#include <iterator>
#include <map>
#include <mutex>

namespace headroom::attach_detail {
namespace {

struct Space {
  unsigned char* base = nullptr;
  std::size_t size = 0;
  std::size_t page = 4096;
  std::map<std::size_t, std::size_t> free;  ///< offset → length of each free extent, coalesced
  std::mutex lock;
};

Space& space() {
  static Space* s = [] {
    auto* sp = new Space;  // never destroyed: blocks may be returned during static destruction
    sp->page = static_cast<std::size_t>(sysconf(_SC_PAGESIZE));
    for (std::size_t gib : {256, 64, 16, 4}) {
      const std::size_t bytes = gib << 30;
      void* p = mmap(nullptr, bytes, PROT_NONE, MAP_PRIVATE | MAP_ANONYMOUS | MAP_NORESERVE, -1, 0);
      if (p == MAP_FAILED) continue;
      sp->base = static_cast<unsigned char*>(p);
      sp->size = bytes;
      sp->free[0] = bytes;
      break;
    }
    return sp;
  }();
  return *s;
}

}  // namespace

bool arena_space_ready() { return space().base != nullptr; }

std::optional<SpaceBlock> take_space(std::size_t size) {
  Space& s = space();
  if (s.base == nullptr || size == 0) return std::nullopt;
  size = (size + s.page - 1) / s.page * s.page;
  std::lock_guard<std::mutex> hold(s.lock);
  for (auto it = s.free.begin(); it != s.free.end(); ++it) {
    if (it->second < size) continue;
    const std::size_t offset = it->first, left = it->second - size;
    s.free.erase(it);
    if (left > 0) s.free[offset + size] = left;
    return SpaceBlock{s.base + offset, size};
  }
  return std::nullopt;
}

void return_space(SpaceBlock b) {
  Space& s = space();
  if (b.base == nullptr) return;
  std::lock_guard<std::mutex> hold(s.lock);
  std::size_t offset = static_cast<std::size_t>(b.base - s.base), size = b.size;
  auto next = s.free.lower_bound(offset);
  if (next != s.free.end() && next->first == offset + size) {
    size += next->second;
    next = s.free.erase(next);
  }
  if (next != s.free.begin()) {
    auto prev = std::prev(next);
    if (prev->first + prev->second == offset) {
      prev->second += size;
      return;
    }
  }
  s.free[offset] = size;
}

}  // namespace headroom::attach_detail
