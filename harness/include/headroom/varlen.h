// headroom — packed variable-length batches (kernel_abi.h version 2, HR_FEATURE_VARLEN).
//
// A varlen problem is held as the kernel receives it: batch 1, every
// sequence's query rows packed along the query axis (Tq = their total) and its
// keys along the key axis (Tk = their total), with Mask::cu_q_lens and
// Mask::cu_kv_lens the [N + 1] offsets. Each sequence is its own attention
// problem: query i of sequence n sees only the keys of sequence n, under the
// mask kind and window applied to its local positions and its own lengths
// (so bottom-right causal alignment is per sequence). Mask kinds none,
// causal_top_left and causal_bottom_right; key padding, dense and bias masks
// do not combine with varlen (the lengths already say which keys exist).
// Lengths may be 0: a sequence with no query rows has no output, one with no
// keys has fully masked rows. docs/varlen.md.
#pragma once

#include <cstdint>
#include <string>
#include <vector>

#include "headroom/problem.h"

namespace headroom {

/// One sequence of a packed batch: its rows [q_begin, q_begin + q_len) and
/// keys [kv_begin, kv_begin + kv_len) in the packed tensors.
struct SequenceSpan {
  std::int64_t n = 0, q_begin = 0, q_len = 0, kv_begin = 0, kv_len = 0;
};

/// Returns: the offsets {0, l0, l0 + l1, ...} of lengths `lengths`.
std::vector<std::int64_t> offsets_of(const std::vector<std::int64_t>& lengths);
/// Returns: the lengths between consecutive offsets. Precondition: cu nonempty.
std::vector<std::int64_t> lengths_of(const std::vector<std::int64_t>& cu);

/// Returns: the number of sequences of a varlen mask (0 for a dense batch).
std::int64_t sequence_count(const Mask& m);
/// Returns: sequence n's span. Precondition: 0 ≤ n < sequence_count(m).
SequenceSpan sequence(const Mask& m, std::int64_t n);
/// Returns: the span of the sequence holding packed query row i (the last
/// sequence with q_begin ≤ i < q_begin + q_len). Preconditions: m.is_varlen(),
/// 0 ≤ i < Tq, the offsets valid (validate_varlen).
SequenceSpan sequence_of_row(const Mask& m, std::int64_t i);

/// Returns: the shape a kernel is told (kernel_abi.h): for a varlen problem
/// batch N, q_len and kv_len the largest sequence lengths; `s` otherwise.
CoreShape declared_shape(const CoreShape& s, const Mask& m);

/// Returns: every inconsistency of a varlen mask against shape `s`: both
/// offset lists or neither, the same N + 1 ≥ 2 entries, starting at 0,
/// nondecreasing, ending at Tq (resp. Tk), batch 1, mask kind none or causal.
std::vector<ProblemError> validate_varlen(const Mask& m, const CoreShape& s);

/// Returns: "sequence n (query i' of Tq_n)" for packed row i, the words
/// faults use to name a place in a varlen problem.
std::string row_place(const Mask& m, std::int64_t i);
/// Returns: "key j' of sequence n" for packed key j.
std::string key_place(const Mask& m, std::int64_t j);

}  // namespace headroom
