// headroom — the adversarial generator families: what each stresses, its knobs, its source.
//
// A family turns (seed, size) into a case (generate.h). Every family chooses a
// shape from `size` unless the request fixes one, and its own mask kind unless
// the request forces one; at the default size 100 tokens stay ≤ 64 (except
// tile_edges, long_sequence, sliding_window and fp8_scales, whose block kinds need Tk > 64) so the
// exact reference stays quick. Source
// values are float32. Magnitudes named "typical" are the N(0, 1) base noise.
// Values from a paper are cited with the section; "(from memory)" marks a
// figure recalled rather than re-read.
#pragma once

#include <string_view>
#include <vector>

#include "headroom/case.h"

namespace headroom {

struct FamilyInfo {
  std::string_view name;
  std::string_view summary;  ///< one line, for `headroom case families`
  std::string_view doc;      ///< what it stresses, its parameters, why it is hard
  std::string_view source;   ///< the published source, or empty for our own construction
  Level level;
  /// The kernel_abi.h version-2 feature every case of the family uses
  /// ("window", "softcap", "sinks", as a program's describe names them), or
  /// empty; only kernels declaring it get the family's cases.
  std::string_view feature = {};
};

inline constexpr FamilyInfo kFamilies[] = {
    {"gaussian", "baseline: Q, K, V ~ N(0,1) with a softmax-scale sweep",
     "Q, K, V independent N(0,1). The softmax scale is c/sqrt(Dk) with c = 2^k, k in [-3, 3] drawn per "
     "seed (shrinking towards c = 1), so logits range from nearly uniform attention to sharply peaked "
     "rows. Mask: none half the time, else causal (either alignment) or key padding. The yardstick every "
     "other family is read against.",
     "Vaswani et al. 2017, Attention Is All You Need, §3.2.1 (the 1/sqrt(d_k) scale)", Level::core},
    {"large_logits", "scaled scores past exp overflow (float32 > 88.7, binary16 > 11.1)",
     "Q and K scaled so the scaled scores s·q·k have spread L/2 with L in [100, 1600]; in each (batch, "
     "kv head) key 0 is aligned with the last query of the group's first head to score L itself. exp(z) overflows "
     "float32 past ln(2^128) ≈ 88.72 and binary16 past ln(65504) ≈ 11.09, so a kernel that skips the "
     "running-maximum shift returns inf/NaN; large negative scores underflow to 0 as they should.",
     "", Level::core},
    {"near_ties", "scores of a row within one float32 ulp of each other",
     "All keys are copies of one base key, some with one component moved by one float32 ulp (the "
     "component of smallest magnitude, so a score moves by at most 2^-24 of its size); query rows are "
     "± powers of two times the base key. Every row's scores then lie within one ulp of its largest: "
     "exact and near ties stress running-max updates, exp(m_old − m_new) ≈ 1 rescaling and argmax "
     "tie-breaking. Values V ~ N(0,1).",
     "", Level::core},
    {"dominant_key", "one key dwarfs many negligible ones whose values are large",
     "Key j* (drawn per batch and kv head) leads every query's score by a margin of 12 to 20 (through a "
     "channel no other key uses), so every other key gets weight ≈ e^-16 ≈ 1e-7, about a float32 unit "
     "roundoff, while those keys carry values up to 2^12 times larger. The many negligible terms sum "
     "to a visible share of the output that a kernel adding them to a large running sum, or flushing "
     "them, loses.",
     "", Level::core},
    {"outlier_channels", "a few fixed K and V channels of magnitude 6 to 100 (int8 killers)",
     "1 to 4 fixed feature channels of K and of V hold values of magnitude ≥ 6, at a per-channel level "
     "between 6 and 100 times the typical N(0,1) entry, with a fixed sign per channel; Q stays "
     "Gaussian. Per-tensor and per-token int8 scales are set by the outliers, crushing the other "
     "channels to a few codes; per-channel scales survive.",
     "Dettmers et al. 2022, LLM.int8(), §4 (magnitude ≥ 6 in a handful of dimensions); Xiao et al. "
     "2023, SmoothQuant, §3 (≈100× outliers in fixed channels)",
     Level::core},
    {"sparse_outliers", "each entry N(0,1) + N(0,100)·Bernoulli(0.001)",
     "Every entry of Q, K and V is N(0,1) plus, with probability 0.001, an outlier N(0,100), reading "
     "100 as the variance (standard deviation 10; the notation read from memory as N(mean, variance)). "
     "Where a tensor draws no outlier at all (small cases) one entry is forced to carry one, so every "
     "case has at least one per tensor. This is the distribution of the published FP16/FP8 RMSE table.",
     "Shah et al. 2024, FlashAttention-3, §4.3", Level::core},
    {"massive_activations", "first token 10^4–10^5× typical in 1–2 channels (attention sink)",
     "Token 0 of Q, K and V carries, in one or two fixed channels, values 10^4 to 10^5 times the "
     "typical entry (typical entries 0.5·N(0,1), so the largest, 10^5·0.5 = 5·10^4 < 65504, stays "
     "finite in binary16). "
     "Scores against key 0 reach ±10^8: the row either drowns in the sink or ignores it, and "
     "products overflow low-precision accumulators.",
     "Sun et al. 2024, Massive Activations in Large Language Models, §2–3", Level::core},
    {"common_offset", "a large offset shared by every key (softmax-invariant, bad for int8)",
     "Every key is a Gaussian vector plus one offset vector shared by all keys of a (batch, kv head), "
     "of magnitude 16 to 768 per channel. The offset adds the same s·q·c to a whole row of scores, so "
     "the exact softmax is unchanged, but per-tensor int8 quantisation of K spends its codes on the "
     "offset and unshifted exponentials overflow.",
     "", Level::core},
    {"cancelling_values", "mixed-sign V that cancel to near-zero outputs",
     "Keys and values come in pairs: key 2m+1 is key 2m plus a small perturbation and value 2m+1 is "
     "minus value 2m plus a residual 2^-10 smaller; values are scaled by 2^k, k in [0, 10]. Outputs "
     "are a small fraction of Σ p|v|, so relative error is meaningless and the scaled error (in units "
     "of the row's own magnitude) is the fair judge; cancellation exposes rounding in P·V.",
     "", Level::core},
    {"long_sequence", "long key sequences (Tk up to ~1000) with few queries",
     "Tk from 128 up to 128 + 9·size (1028 at the default size), 1 to 4 queries, one head, head dims "
     "16 to 64, Gaussian values with a mild scale sweep; mask none or causal bottom-right (decoding). "
     "Long sums accumulate rounding error like sqrt(Tk) or Tk, and split-K kernels must merge partial "
     "maxima correctly. Kept modest: the exact reference is slow.",
     "", Level::core},
    {"tile_edges", "lengths 1, t−1, t, t+1, 2t±1 (t = 16…128); head dims not multiples of 8",
     "Tk drawn from {1, t−1, t, t+1, 2t−1, 2t+1} for tile sizes t in 16, 32, 64, 128 (the largest t "
     "allowed grows with size: 16 below size 25, then 32, 64, 128 from size 75), Tq from the same "
     "lengths up to 65 or equal to Tk (up to 129), keeping the reference quick; head dims "
     "drawn from values that are not multiples of 8 (1, 3, 5, 7, 12, 15, 17, 20, 31, 33, 36, 63, "
     "65). Partial tiles and vector tails are where kernels read past the end or drop the last "
     "element. Shrinks stay on the listed lengths.",
     "", Level::core},
    {"ragged", "Tq ≠ Tk, with causal masks of both alignments",
     "Tq and Tk drawn independently and always different; mask none, causal top-left or causal "
     "bottom-right. The two causal alignments agree only when Tq = Tk, a classic source of silent "
     "error; with Tq > Tk bottom-right alignment leaves the first Tq − Tk rows fully masked.",
     "", Level::core},
    {"format_edges", "binary16 max 65504, subnormals, −0, int8 −128 and half-code ties",
     "Gaussian Q, K, V with one entry in eight replaced by an edge value: V entries at or just below "
     "the binary16 maximum 65504 (65504, 65472, 65519 which rounds to 65504); binary16 subnormals "
     "(k·2^-24, k < 1024) and float32 subnormals (2^-149, 2^-130) in Q, K and V; −0 and +0; and, in Q "
     "and K, entries on the int8 grid's half-code ties (k + 1/2)·A/127 next to ±A, the tensor's extreme, so symmetric "
     "codes hit ±127 and asymmetric ones −128. Every kind appears at least once in every tensor with "
     "≥ 8 entries. IEEE 754-2019 Table 3.5 for the binary16 limits.",
     "IEEE 754-2019, Table 3.5 (binary16: p = 11, emax = 15)", Level::core},
    {"masks", "every mask kind, with a fully masked row and a single visible last key",
     "Gaussian values under a mask of any kind. Dense and bias masks get a fully masked row and a row "
     "whose only visible key is the last; bias masks add a quarter of positions at −inf and a row "
     "whose biases all equal −60000 (finite: the exact answer is the plain softmax of the scores); key "
     "padding gets a batch with no key and a batch with one; causal bottom-right gets Tq > Tk "
     "(leading rows fully masked) and causal top-left Tq < Tk (trailing keys never visible, poisoned "
     "by the leak check).",
     "", Level::core},
    {"attention_sink", "key 0's score dwarfs all others; its value is small",
     "Key 0 leads every query's score by a margin of 16 to 20 (through a channel no other key uses), "
     "so it takes nearly all the weight, while its value vector is 10^-2 to 10^-3 of typical: the "
     "output is small and the remaining keys' share (e^-16 to e^-20 each) stays above float32 "
     "resolution relative to it. The pattern reported for first tokens of trained models.",
     "Xiao et al. 2024, Efficient Streaming Language Models with Attention Sinks (from memory); Sun et "
     "al. 2024, Massive Activations, §3",
     Level::core},
    {"repeated_maxima", "several identical keys share each row's maximum (bfloat16 hazard)",
     "2 to Tk/2 keys are exact copies of one key that, through its own channel, scores above every "
     "other key of every row by at least 2; the rest are bounded uniform noise. Each row's maximum is "
     "attained several times, so exp(z − m) = 1 exactly repeats and low-precision rounding of P and "
     "P·V is biased rather than averaging out; values carry a same-sign offset in half their channels "
     "so such a bias accumulates.",
     "Qiu & Yao 2025, on low-precision flash attention failing with repeated row maxima under "
     "bfloat16 (from memory)",
     Level::core},
    {"fp8_scales", "8-bit float scale hazards: values at 448/57344, delayed scales, outliers, block spikes, subnormal blocks, small P",
     "Six kinds (knob 0), Q, K, V otherwise N(0,1). saturation: a quarter of the V rows carry one entry "
     "among ±448, 464, 465, 480, 57344, 61440, 61441 (the E4M3 and E5M2 maxima, the ties above them and "
     "a step past), and V's delayed scale is 1, so they reach the conversion as they are and saturate. "
     "delayed_scale: K's and V's delayed scale 2^-5 (an earlier amax of 14), the first key of each kv head with "
     "K 1000 in a channel where every query holds 16 and one V entry ±1000: its codes saturate to ±448 "
     "(E4M3) and the clipped key still holds over 96.7% of each row (Tk ≤ 129). outlier_tensor: one K and one V entry per kv head 10^3 or 10^4 times typical, which "
     "sets a per-tensor scale and pushes the other entries towards E4M3's subnormals. block_spike: "
     "Tk 65-129, one token of a later 64-token block holds K 300 and V 1000 in one channel, so that "
     "block's scale is 100s of times its neighbours' (a kernel using the wrong block's scale is far off). "
     "subnormal_block: Tk 65-129, the first block (up to 64 keys) of K and V is 2^-13 or 2^-15 of typical, E4M3 "
     "subnormals under one per-tensor scale, normal under per-block scales. small_weights: Tk 100-129, "
     "key 0 leads every score by 7 to 7.5 with a value 10^-3 of typical, so the other keys' weights "
     "(≈ e^-7 each, below 2^-10 where E4M3 without a P scale flushes to zero) carry most of the output.",
     "OCP 8-bit Floating Point Specification (OFP8) rev 1.0, 2023 (the format limits); Shah et al. "
     "2024, FlashAttention-3, §3.3 (per-block scales against outliers)",
     Level::core},
    {"block_gaussian", "multi-head block: X ~ N(0,1), weights ~ N(0,1)/sqrt(fan-in), biases",
     "Block level: X_q, X_kv ~ N(0,1) (the same tensor, self-attention, half the time when Tq = Tk), "
     "W_q, W_k, W_v ~ N(0, 1/Dm), W_o ~ N(0, 1/(Hq·Dv)) (variance-preserving initialisation, common "
     "practice), biases N(0, 0.1^2) present or absent per seed. Tokens ≤ 32, head dims ≤ 16 and Dm ≤ 64 "
     "at the default size, with "
     "Dm = Hq·Dk as in the base model of the paper (512 = 8·64) half the time. Tests projections, "
     "head split and concatenation around the attention.",
     "Vaswani et al. 2017, §3.2.2 (multi-head attention)", Level::block},
    {"sliding_window", "local attention windows on causal, padded and open masks, edges at tile widths",
     "Gaussian Q, K, V under a sliding window (kernel_abi.h version 2, HR_FEATURE_WINDOW): key j is hidden "
     "from query i when j < i' − L or j > i' + R, i' = i + Tk − Tq (i under causal top-left). L from "
     "{0, 1, 3, 7, 8, 9, 15, 16, 17, 31, 32, 33, 63, 64, 65, 127}, so a window's first key lands on, just "
     "before and just after tile boundaries; R open, 0, 1 or 4; on causal (mostly bottom-right, with "
     "Tq = 1 decoding rows), key-padding and open masks, Tk up to 200 at the default size. A window "
     "counted one key too wide or too narrow at a tile edge is the typical defect; key padding shorter "
     "than a window start leaves rows fully masked. Only kernels declaring the feature get these cases.",
     "Beltagy et al. 2020, Longformer, §3.1 (sliding window attention; from memory)", Level::core, "window"},
    {"capped_logits", "logit soft-capping c·tanh(z/c) on large logits, from barely capped to saturated",
     "Gaussian Q, K scaled so the scaled scores spread 0.5, 1, 2, 4 or 16 times the cap, under a soft cap "
     "(kernel_abi.h version 2, HR_FEATURE_SOFTCAP) c in {50, 30, 20, 10, 5}: each score x becomes "
     "c·tanh(x/c) before the bias and the mask. Deep in saturation many keys tie at about c and differ "
     "only in tanh's last bits; the masks (causal, key padding, bias with fully masked rows) hide keys, so "
     "a cap applied after the mask, which turns a masked −inf into −c and revives the key, shows as a "
     "leak. Only kernels declaring the feature get these cases.",
     "Gemma 2 (Gemma Team 2024, §2: attention logits capped at 50; from memory)", Level::core, "softcap"},
    {"dominant_sinks", "one sink logit per head in the normaliser, up to e^8 times a key's weight",
     "Gaussian Q, K, V and one sink logit σ_h per query head (kernel_abi.h version 2, HR_FEATURE_SINKS) "
     "that adds exp(σ_h) to every row's normaliser with no value row. σ_h = level + 0.5·N(0,1), level "
     "0, 1, 2, 4, 6 or 8 above the typical score: from an equal share to sinks that take over 97% of the "
     "weight, leaving outputs ~e^-8 of typical (still normal in binary16); odd heads' sinks far below in a "
     "third of the "
     "cases, scores widened 4× in another third. A sink left out of the normaliser, or out of the max "
     "shift, is the typical defect. Only kernels declaring the feature get these cases.",
     "Xiao et al. 2024, Efficient Streaming Language Models with Attention Sinks, §3 (a learnable sink "
     "logit in the softmax denominator; from memory)",
     Level::core, "sinks"},
    {"varlen_edges", "packed variable-length batches: lengths 0 and 1, one long among short, offsets on tile edges",
     "Gaussian Q, K, V packed as N ≥ 2 sequences (kernel_abi.h version 2, HR_FEATURE_VARLEN: tensors "
     "[1, H, total, D], cu_q_lens and cu_kv_lens the offsets); the shape's batch is N and its Tq, Tk the "
     "largest lengths. Five patterns: every sequence full; edges (a sequence of 1 query and 1 key, one "
     "with no query, one with no key whose rows are fully masked, 1 query over all keys, all queries "
     "over 1 key); one long sequence among sequences of 1 to 3 tokens; lengths from {15, 16, 17, 31, 32, "
     "33, 63, 64, 65, 127, 128, 129} so offsets land on and beside tile edges; Tq ≠ Tk per sequence. "
     "Masks none or causal (mostly bottom-right, aligned per sequence on its own lengths); a request for "
     "key padding, dense or bias gets none (the lengths replace padding). An offset off by one between "
     "sequences lets a row see its neighbour's first key (mask_leak). Only kernels declaring the "
     "feature get these cases.",
     "", Level::core, "varlen"},
    {"paged_decode", "decode queries (Tq 1 to 8) over a paged K/V cache: shuffled pages, shared prefixes, partial last pages",
     "Gaussian Q, K, V with K and V in a page pool (kernel_abi.h version 2, HR_FEATURE_PAGED_KV): page size "
     "16, 8, 4, 32 or 5 (a requested Tk it does not divide takes its largest divisor below); Tk, the "
     "table's capacity, one or two pages or up to 64 keys at the default size; up to 4 sequences ending "
     "(knob + b) mod page size keys before Tk, so across sequences and seeds the last page ends on each "
     "of its rows, with one sequence of a single key or of exactly one page. Pages in order, shuffled in "
     "the pool, shuffled with the sequences sharing their first full pages (a common prompt prefix), or "
     "that with two pages no table names. Tq 1 (decode) or 2, 4, 8 (speculated tokens; no sequence "
     "shorter) under bottom-right causal alignment to each sequence's own end, or no mask. The rows of a "
     "last page past its sequence's end hold stale keys: a kernel reading the page whole attends them (a "
     "leak); one reading a page outside the table reads another sequence's keys or a freed page. Only "
     "kernels declaring the feature get these cases.",
     "Kwon et al. 2023, Efficient Memory Management for Large Language Model Serving with PagedAttention, "
     "§4 (block tables over a page pool, shared prefix blocks; from memory)",
     Level::core, "paged_kv"},
    {"gradient_cancellation", "near-one-hot rows where the backward's D_i cancels against dP; groups of 8 heads; every mask",
     "For judging backward kernels (docs/backward.md); the case carries its own upstream gradient dO. One key "
     "j* per (batch, kv head) leads every query's score by 8 to 16 plus ln Tk (through a channel no other key "
     "uses; under a bias mask also by the bias's largest gap), so P is near one-hot on every row that sees it "
     "(j* is key 0 under causal and key-padding masks, which show it to every row that sees a key; its value entries are ±[1, 2)). Then "
     "D_i = Σ_j P_ij dP_ij ≈ dP_ij* and dS_ij* = P_ij*(dP_ij* − D_i) is a difference of two nearly equal "
     "numbers: a backward forming D_i from a wrong or early-rounded O gets it wrong in its leading digits. "
     "dO (knob 0) is ±V_j* + 2^-4·N(0,1), so D_i ≈ ±|V_j*|² cancels at full size, or one of the generated "
     "kinds (Gaussian, Student-t heavy tails, one-hot rows, 2^12-scaled; upstream_gradient.h). Half the cases "
     "from size 30 have 8 query heads per kv head (dK, dV summed over 8); masks of every kind, plain (the masks "
     "family carries the adversarial rows); long rows keep their cancellation since the margin grows with ln Tk.",
     "", Level::core},
};

/// Returns: every family, in the order above.
std::vector<FamilyInfo> families();

/// Returns: the family named `name`, or nullptr.
const FamilyInfo* find_family(std::string_view name);

}  // namespace headroom
