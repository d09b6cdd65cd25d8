// headroom — the table of bundled kernels (bundled.h). One row per kernel file.
#include "bundled.h"

#include "kernel_list.h"

namespace {

using namespace hr_kernels;

const hr_bundled_kernel kTable[] = {
    // Sound kernels: no expected fault.
    {&f32_textbook, 0, nullptr, nullptr},
    {&f32_tiled_16, 0, nullptr, nullptr},
    {&f32_tiled_64, 0, nullptr, nullptr},
    {&f16_f32acc, 0, nullptr, nullptr},
    {&f16_f16acc, 0, nullptr, nullptr},
    {&bf16_f32acc, 0, nullptr, nullptr},
    {&i8_tokenwise, 0, nullptr, nullptr},
    {&gqa_f32, 0, nullptr, nullptr},
    {&e4m3_tensorwise, 0, nullptr, nullptr},
    {&e4m3_blockwise, 0, nullptr, nullptr},
    {&e4m3_blockwise_rotated, 0, nullptr, nullptr},
    {&f32_varlen, 0, nullptr, nullptr},
    {&f32_paged_split, 0, nullptr, nullptr},
    {&block_f32, 0, nullptr, nullptr},
    {&f32_backward_tiled, 0, nullptr, nullptr},
    {&f16_backward_f32acc, 0, nullptr, nullptr},
    // Flawed specimens (kernels/flawed/): one deliberate defect each.
    {&no_max_shift, 1, "non_finite", "exp of the raw scores, no max shift: overflows past logit 88.7"},
    {&mask_tail_off_by_one, 1, "mask_leak",
     "tail key tile tests j <= end for causal/key padding: one masked key attended"},
    {&nan_masked_rows, 1, "convention", "no guard for fully masked rows: writes 0/0 = NaN while declaring zeros"},
    {&causal_flipped, 1, "convention", "declares bottom-right causal only, applies top-left (j <= i)"},
    {&oob_read_tail, 1, "oob_read", "copies 16 K rows for a partial tail tile: reads past the end of K unless 16 | Tk"},
    {&oob_write_row, 1, "oob_write", "per-head clearing loop runs to i <= Tq: one row of zeros past the end of O"},
    {&racy_reduction, 1, "nondeterministic",
     "PV chunk sums added by 4 threads with atomic float adds: order, hence bits, follow thread timing"},
    {&block_heads_swapped, 1, "error", "block concatenates head h into the columns of head Hq-1-h"},
    {&hang_on_shape, 1, "timeout", "tuned key-tile table gives tile 0 for Tk == 33: the key loop never advances"},
    {&crash_one_token, 1, "crash", "score buffer is null when Tk == 1: SIGSEGV on the first row"},
    {&f16_late_scale, 1, "non_finite",
     "binary16 QK^T formed before the scale: raw dot overflows 65504 while the logit is in range"},
    {&window_off_by_one, 1, "mask_leak",
     "sliding window tested as j >= i' - left - 1: one key left of the window attended"},
    {&e4m3_overflow_nan, 1, "non_finite",
     "E4M3 conversion of P*480 gives NaN instead of saturating to 448 when one key holds > 96.7% of a row"},
    {&e4m3_block_scale_shifted, 1, "error",
     "K scale looked up for token j+1: the last key of each 64-token block uses the next block's scale"},
    {&e4m3_p_unscaled, 1, "error", "P rounded to E4M3 without its x448 scale: weights below 2^-10 flush to zero"},
    // Flawed backward specimens (kernels/f32_backward_tiled.cpp, docs/backward.md): the forward is sound.
    {&backward_d_dropped, 1, "error", "backward dS = P*dP: the D_i term left out"},
    {&backward_no_scale, 1, "error", "backward dQ = dS K without the scale s"},
    {&backward_p_from_row_max, 1, "error", "backward recomputes P = exp(z - max z), not exp(z - lse)"},
    {&backward_group_not_summed, 1, "wrong_group_sum",
     "grouped-query dK, dV keep only the last query head's share, not the group's sum"},
    {&backward_racy_dk, 1, "nondeterministic", "backward dK added by 4 threads with atomic float adds"},
    {&backward_masked_keys, 1, "masked_key_gradient", "backward dK, dV loop forgets the mask"},
    {&softcap_after_mask, 1, "mask_leak",
     "soft cap applied after the mask: tanh(-inf) = -1 gives masked keys the score -c, so they are attended"},
    {&sink_dropped, 1, "error", "sink logit left out of the softmax normaliser: rows too large by (S + e^sink) / S"},
    {&lse_bf16_buffer, 1, "error", "log-sum-exp kept in a bfloat16 buffer: off by up to 2^-9 |L|, outputs right"},
    {&varlen_offset_off_by_one, 1, "mask_leak",
     "packed key range read to cu_kv_lens[n+1] + 1: each sequence but the last attends the next one's first key"},
    {&paged_last_page_whole, 1, "mask_leak",
     "a sequence's last paged page read whole: keys past its length (stale cache rows) attended"},
    {&split_merge_unnormalised, 1, "split_merge",
     "split-KV merge sums e^(lse_s - max) o_s without dividing by the weights' sum: partials right, merge wrong"},
    {nullptr, 0, nullptr, nullptr},  // sentinel, not counted
};

}  // namespace

extern "C" const hr_bundled_kernel* headroom_bundled_kernels(size_t* count) {
  *count = sizeof(kTable) / sizeof(kTable[0]) - 1;
  return kTable;
}
