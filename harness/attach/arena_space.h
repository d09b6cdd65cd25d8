// headroom — one reserved range of address space where kernel-call buffers live.
//
// Internal to the attach stage. The range is reserved once, PROT_NONE and
// MAP_NORESERVE (it costs address space, not memory), before any isolation
// worker starts. Every worker forked afterwards inherits the same reservation,
// so a worker's child can map a call's buffers (a memfd, isolation_worker.h)
// at the very addresses the problem structure already points to: no pointer is
// rewritten, and nothing else can have taken those addresses in the worker.
//
// Blocks are handed out first-fit, page-granular, under a mutex. When the
// range could not be reserved (an RLIMIT_AS below it) or is full, take_space
// says no and the caller falls back to a plain mapping (and a call isolated by
// forking headroom itself).
#pragma once

#include <cstddef>
#include <optional>

namespace headroom::attach_detail {

struct SpaceBlock {
  unsigned char* base = nullptr;
  std::size_t size = 0;
};

/// Returns: whether the range is reserved; the first call reserves it (256 GiB,
/// else 64, 16 or 4 GiB, whichever the address-space limit allows).
bool arena_space_ready();

/// Returns: a block of `size` bytes (rounded up to whole pages) inside the
/// range, still PROT_NONE; nothing when the range is missing or full.
std::optional<SpaceBlock> take_space(std::size_t size);

/// Gives a block back. Its pages must have been made PROT_NONE again (a
/// MAP_FIXED anonymous PROT_NONE mapping over them) so the range stays whole.
void return_space(SpaceBlock b);

}  // namespace headroom::attach_detail
