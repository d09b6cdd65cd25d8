// headroom kernels — a packed variable-length prefill in float32 (kernel_abi.h
// version 2, HR_FEATURE_VARLEN), shared by the sound f32_varlen and its flawed
// specimen varlen_offset_off_by_one.
//
// Method: each sequence n of a packed batch is its own problem: query rows
// [cu_q_lens[n], cu_q_lens[n+1]) of q and o, keys [cu_kv_lens[n],
// cu_kv_lens[n+1]) of k and v (extents [1, H, total, D]), the mask kind and
// window applied to local positions with the sequence's own Tq_n and Tk_n.
// Per row, the keys are taken 64 at a time with the online normaliser of
// Milakov & Gimelshein 2018 (alg. 3): a running maximum m, normaliser l and
// accumulator acc, rescaled by exp(m − m') when a tile raises the maximum, a
// tile's weights and P·V summed before they join l and acc (Dao et al. 2022,
// alg. 1); everything in float32. Soft cap and sinks through ScoreFeatures. A row with
// no visible key (a sequence with no keys, say) gets zeros and lse −inf.
// Without HR_FEATURE_VARLEN (cu_q_lens NULL) batch b is sequence b of a
// dense batch, with every mask kind.
#pragma once

#include <cstdint>

#include "headroom/kernel_abi.h"

namespace hr_kernels {

/// Returns: HR_OK after writing o (and lse), HR_UNSUPPORTED for formats other
/// than float32. `key_overrun` is the flawed specimen's defect: each
/// sequence's key count taken as cu_kv_lens[n+1] + key_overrun − cu_kv_lens[n]
/// (clamped to the packed total); 0 for the sound kernel.
std::int32_t varlen_prefill(const hr_core_problem* p, std::int64_t key_overrun);

}  // namespace hr_kernels
