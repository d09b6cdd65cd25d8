// headroom kernels — the float32 paged split-KV decode kernel, shared by the
// sound kernel (f32_paged_split.cpp) and its two flawed specimens.
//
// K and V are read either from the dense tensors or, with HR_FEATURE_PAGED_KV,
// through the block table: logical key t of sequence b is row t % page_size of
// page block_table[b · max_pages_per_seq + t / page_size] (kernel_abi.h).
#pragma once

#include <cstdint>

#include "headroom/kernel_abi.h"

namespace hr_kernels {

/// Keys per split of the bundled split-KV kernel: small, so the suites'
/// short sequences already span several splits.
inline constexpr std::int64_t kSplitKvLen = 32;

/// The one deliberate defect a variant carries (none for the sound kernel).
enum class PagedSplitDefect : unsigned char {
  none,
  merge_unnormalised,  ///< merged O = Σ_s e^{lse_s − M} o_s, not divided by Σ_s e^{lse_s − M}
};

/// Runs problem `p` (float32 in and out, every mask kind; a sequence of a paged
/// problem has paged.seq_lens[b] keys): per query row, each split s over keys [s·L, (s+1)·L) of the
/// sequence (L = kSplitKvLen) is an exact-order float32 softmax with its own
/// maximum m_s, sum l_s and numerator acc_s; the row is their merge
/// Σ_s e^{m_s − M} acc_s / Σ_s e^{m_s − M} l_s (M = max_s m_s), and, when the
/// problem carries o_partials, each split's acc_s / l_s and m_s + log l_s are
/// written there (a split with no visible key: zeros and −inf).
/// Returns: HR_OK, or HR_UNSUPPORTED for formats or masks it does not take.
std::int32_t run_paged_split(const hr_core_problem* p, PagedSplitDefect defect);

}  // namespace hr_kernels
