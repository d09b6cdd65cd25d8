// headroom — the problems being judged: core attention and the multi-head block.
//
// Core: for batch b and query head h, with key/value head g = h / (Hq / Hkv),
//   O[b,h,i,:] = Σ_j p_ij V[b,g,j,:],  p_ij = exp(z_ij) / (Σ_k exp(z_ik) + exp(σ_h)),
//   z_ij = cap(s · (Q[b,h,i,:] · K[b,g,j,:])) + bias_ij   over visible j only,
// with s the float32 scale exactly as passed (Vaswani et al. 2017, eq. 1),
// cap(x) = c·tanh(x/c) with a soft cap c > 0 and cap(x) = x without one, and
// the sink term exp(σ_h) only when the problem has sink logits σ.
// Block: Q = X_q W_q + b_q, K = X_kv W_k + b_k, V = X_kv W_v + b_v, head h owning
// columns [h·Dk, (h+1)·Dk) of Q (likewise K, V); Y = concat_h(O_h) W_o + b_o.
// Grouped-query attention is Hkv < Hq with Hq a multiple of Hkv.
#pragma once

#include <cstdint>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "headroom/paged_kv.h"
#include "headroom/tensor.h"

namespace headroom {

enum class MaskKind : unsigned char {
  none,
  causal_top_left,      ///< key j visible to query i when j ≤ i
  causal_bottom_right,  ///< j ≤ i + (Tk − Tq): the last query sees every key
  key_padding,          ///< j < key_lengths[b]
  dense,                ///< allowed[b, h|0, i, j] != 0
  bias,                 ///< additive bias[b, h|0, i, j] added to z; −inf masks
};

/// Returns: "none", "causal_top_left", "causal_bottom_right", "key_padding", "dense", "bias".
std::string_view mask_kind_name(MaskKind k);
std::optional<MaskKind> parse_mask_kind(std::string_view name);

struct CoreShape {
  std::int64_t batch = 1, q_heads = 1, kv_heads = 1, q_len = 1, kv_len = 1, key_dim = 1, value_dim = 1;
  bool operator==(const CoreShape&) const = default;
};

struct Mask {
  MaskKind kind = MaskKind::none;
  std::vector<std::int64_t> key_lengths;  ///< key_padding: [B], each in [0, Tk]
  Tensor allowed;  ///< dense: [B, 1 or Hq, Tq, Tk], nonzero = visible
  Tensor bias;     ///< bias: [B, 1 or Hq, Tq, Tk], finite or −inf
  /// A sliding (local) window on top of any kind: key j is also hidden from
  /// query i when j < i' − window_left or j > i' + window_right, where i' = i
  /// under causal_top_left and i + Tk − Tq otherwise (aligned as a decoder's
  /// cache: the last query sits on the last key). −1 leaves that side open.
  std::int64_t window_left = -1, window_right = -1;
  /// A packed variable-length batch (kernel_abi.h version 2, HR_FEATURE_VARLEN):
  /// [N + 1] offsets, from 0 and nondecreasing, of each of N sequences' rows
  /// along the query axis (cu_q_lens, ending at Tq) and the key axis
  /// (cu_kv_lens, ending at Tk) of a problem of batch 1. Query i of sequence n
  /// sees only keys of sequence n, each sequence its own attention problem:
  /// causal alignment and windows use its own lengths and local positions.
  /// Empty: a dense batch. docs/varlen.md.
  std::vector<std::int64_t> cu_q_lens, cu_kv_lens;

  /// Keys present per sequence (a paged cache's sequence lengths, [B], each
  /// in [1, Tk]); empty: every sequence has Tk. Key j of sequence b is hidden
  /// when j ≥ kv_lens[b], and causal_bottom_right and windows align the last
  /// query to that sequence's last key (i + kv_lens[b] − Tq), as a decoder
  /// appending to its own cache does.
  std::vector<std::int64_t> kv_lens{};

  /// Returns: whether a window restricts visibility.
  bool has_window() const { return window_left >= 0 || window_right >= 0; }
  /// Returns: whether the problem is a packed variable-length batch.
  bool is_varlen() const { return !cu_q_lens.empty(); }
  /// Returns: the keys sequence b has: kv_lens[b], or Tk without lengths.
  std::int64_t kv_end(const CoreShape& s, std::int64_t b) const {
    return kv_lens.empty() ? s.kv_len : kv_lens[static_cast<std::size_t>(b)];
  }
  /// Returns: whether key j is visible to query i of head h in batch b.
  bool visible(const CoreShape& s, std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t j) const;
  /// Returns: the additive bias of (b, h, i, j) (0 unless kind is bias).
  double bias_at(std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t j) const;
};

struct CoreProblem {
  CoreShape shape;
  float scale = 1.0f;  ///< used exactly as this float32 value
  Mask mask;
  /// Logit soft-capping (kernel_abi.h version 2, HR_FEATURE_SOFTCAP): c > 0
  /// replaces each scaled score x = s·(q·k) by c·tanh(x/c) before the bias
  /// and the mask; 0 = none. Used exactly as this float32 value.
  float softcap = 0.0f;
  /// Sink logits (HR_FEATURE_SINKS): [Hq] float32 values σ_h, each adding
  /// exp(σ_h) to every row's normaliser of head h with no value row; empty =
  /// none. In the units of the capped, biased scores z.
  std::vector<float> sinks{};
  /// Paged K/V (HR_FEATURE_PAGED_KV, paged_kv.h): the logical K/V of the
  /// inputs live in these pages for the kernel; mask.kv_lens holds the
  /// sequence lengths. Inactive (page_size 0) otherwise.
  PagedKv paged{};
  /// Delayed 8-bit float scales (quant.h, quantize_fp8): one float32 scale
  /// each for Q, K and V fixed by an earlier step's amax, as training stacks
  /// with delayed scaling use, in place of the amax of these values; 0 = the
  /// fresh amax scale. A value beyond M·s (M = 448 E4M3, 57344 E5M2) reaches
  /// the conversion and saturates to ±M, so only kernels declaring saturating
  /// conversions are given such a case (why_unfit). Read by E4M3/E5M2 kernels only.
  struct DelayedScales {
    float q = 0.0f, k = 0.0f, v = 0.0f;
    bool any() const { return q != 0.0f || k != 0.0f || v != 0.0f; }
  } fp8_delayed{};

  /// Returns: whether the problem soft-caps its scores.
  bool has_softcap() const { return softcap != 0.0f; }
  /// Returns: whether the problem has sink logits.
  bool has_sinks() const { return !sinks.empty(); }
  /// Returns: whether K/V are paged.
  bool has_paged_kv() const { return paged.active(); }
};

/// Q [B, Hq, Tq, Dk], K [B, Hkv, Tk, Dk], V [B, Hkv, Tk, Dv].
struct CoreInputs {
  Tensor q, k, v;
};

struct BlockShape {
  std::int64_t batch = 1, q_len = 1, kv_len = 1, model_dim = 1, q_heads = 1, kv_heads = 1,
               key_dim = 1, value_dim = 1;
  bool operator==(const BlockShape&) const = default;
  /// Returns: the shape of the attention inside the block.
  CoreShape core() const { return {batch, q_heads, kv_heads, q_len, kv_len, key_dim, value_dim}; }
};

struct BlockProblem {
  BlockShape shape;
  float scale = 1.0f;
  Mask mask;  ///< over the attention inside the block, shapes as for CoreShape
};

/// X_q [B, Tq, Dm], X_kv [B, Tk, Dm]; W_q [Dm, Hq·Dk], W_k [Dm, Hkv·Dk],
/// W_v [Dm, Hkv·Dv], W_o [Hq·Dv, Dm]; biases b_q [Hq·Dk], b_k [Hkv·Dk],
/// b_v [Hkv·Dv], b_o [Dm], each empty (size 0 shape {}) when absent.
struct BlockInputs {
  Tensor x_q, x_kv, w_q, w_k, w_v, w_o, b_q, b_k, b_v, b_o;
};

/// One validation finding: which field, what was expected, what was found.
struct ProblemError {
  std::string field;
  std::string expected;
  std::string found;
  /// Returns: "<field>: expected <expected>, found <found>".
  std::string message() const;
};

/// Returns: every inconsistency of the shape, scale and mask (empty when valid):
/// extents ≥ 1, Hq a multiple of Hkv, finite nonzero scale, mask tensors shaped
/// as documented, key lengths in [0, Tk], window sides ≥ −1, a soft cap that is
/// 0 or finite and > 0, sinks empty or Hq finite values, a paged layout
/// consistent with the shape (paged_findings) and sequence lengths only with it.
std::vector<ProblemError> validate(const CoreProblem& p);
/// Returns: every inconsistency of layout `p` for `batch` sequences of
/// lengths `kv_lens` over a logical K/V of `kv_len` keys, (empty when valid): page_size ≥ 1, P ≥ 1, kv_len =
/// max_pages_per_seq · page_size, B · max_pages_per_seq table entries, lengths
/// given and in [1, kv_len], each sequence's first ceil(len/page_size) slots
/// naming distinct pages in [0, P) and the rest −1, and a page named by two
/// sequences wholly inside both their lengths (a shared prefix page is full).
std::vector<ProblemError> paged_findings(const PagedKv& p, std::int64_t batch, std::int64_t kv_len,
                                         const std::vector<std::int64_t>& kv_lens);

/// Returns: validate(p) plus the shapes of Q, K, V against p.shape, and for a
/// paged case every shared page holding one content (shared_page_conflict).
std::vector<ProblemError> validate(const CoreProblem& p, const CoreInputs& in);
std::vector<ProblemError> validate(const BlockProblem& p);
std::vector<ProblemError> validate(const BlockProblem& p, const BlockInputs& in);

/// Returns: the key/value head serving query head h.
inline std::int64_t kv_head_of(const CoreShape& s, std::int64_t h) { return h / (s.q_heads / s.kv_heads); }

}  // namespace headroom
