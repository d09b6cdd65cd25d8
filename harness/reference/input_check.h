// headroom — the reference's checked preconditions and the visible keys of a row.
#pragma once

#include <cstdint>
#include <vector>

#include "headroom/problem.h"

namespace headroom::detail {

/// Throws InputError naming the first finding of validate(p, in), or the
/// first non-finite input value.
void require_valid(const CoreProblem& p, const CoreInputs& in);
void require_valid(const BlockProblem& p, const BlockInputs& in);

/// Fills `keys` with the keys visible to query i of head h in batch b, in
/// increasing order, and (bias masks only; else left empty) `bias` with their
/// additive biases.
void visible_keys(const CoreShape& s, const Mask& mask, std::int64_t b, std::int64_t h, std::int64_t i,
                  std::vector<std::int64_t>& keys, std::vector<double>& bias);

}  // namespace headroom::detail
