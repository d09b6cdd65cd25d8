// headroom — the block level on the fast path: double-double projections, wide core attention, certified output.
#pragma once

#include <cstdint>
#include <vector>

#include "headroom/reference.h"

namespace headroom::detail {

/// Computes every batch of the block on the fast path into `ref` (out, bound,
/// magnitude, fully_masked, stats), to the contract of reference.h.
/// Returns: per batch, 1 where its outputs met the target, 0 where they did
/// not even after the per-element escalation: the caller redoes those batches
/// on the multiprecision path (their values in `ref` are then overwritten).
/// Preconditions: p and in valid (require_valid), opt.backend == mpfr.
std::vector<std::uint8_t> fast_block(const BlockProblem& p, const BlockInputs& in, const ReferenceOptions& opt,
                                     BlockReference& ref);

}  // namespace headroom::detail
