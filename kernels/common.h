// headroom kernels — helpers every bundled kernel needs the same way: element
// addressing by strides, the mask test, format loads and stores, the fully
// masked row convention.
//
// Kernels see only kernel_abi.h and headroom/binary16.h (DESIGN.md, layout);
// these helpers stay on that side of the line. Kept in one place so that a fix
// to, say, the bottom-right causal bound reaches every kernel at once.
#pragma once

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <limits>

#include "headroom/binary16.h"
#include "headroom/kernel_abi.h"

namespace hr_kernels {

inline constexpr float kNegInf = -std::numeric_limits<float>::infinity();

/// Every mask kind, and every layout a stride-generic kernel accepts.
inline constexpr std::uint32_t kAllMasks = HR_MASK_NONE | HR_MASK_CAUSAL_TOP_LEFT | HR_MASK_CAUSAL_BOTTOM_RIGHT |
                                           HR_MASK_KEY_PADDING | HR_MASK_DENSE | HR_MASK_BIAS;
inline constexpr std::uint32_t kStridedLayouts = HR_LAYOUT_BHTD | HR_LAYOUT_BTHD;

/// Returns: the element offset of (i0, i1, i2, i3): Σ i_k·strides[k] (kernel_abi.h).
inline std::int64_t offset(const std::int64_t* strides, std::int64_t i0, std::int64_t i1, std::int64_t i2,
                           std::int64_t i3) {
  return i0 * strides[0] + i1 * strides[1] + i2 * strides[2] + i3 * strides[3];
}

/// Returns: element (i0, i1, i2, i3) of `t` as float32, exactly (binary16 and
/// bfloat16 widen without rounding). Precondition: t.format is float32,
/// binary16 or bfloat16.
inline float load(const hr_tensor& t, std::int64_t i0, std::int64_t i1, std::int64_t i2, std::int64_t i3) {
  const std::int64_t at = offset(t.strides, i0, i1, i2, i3);
  switch (t.format) {
    case HR_FORMAT_BINARY16:
      return headroom::binary16_to_float(static_cast<const std::uint16_t*>(t.data)[at]);
    case HR_FORMAT_BFLOAT16:
      return headroom::bfloat16_to_float(static_cast<const std::uint16_t*>(t.data)[at]);
    default:
      return static_cast<const float*>(t.data)[at];
  }
}

/// Loads the n elements (i0, i1, i2, 0..n-1) of `t` into out[0..n-1], as load().
inline void load_row(const hr_tensor& t, std::int64_t i0, std::int64_t i1, std::int64_t i2, std::int64_t n,
                     float* out) {
  for (std::int64_t d = 0; d < n; ++d) out[d] = load(t, i0, i1, i2, d);
}

/// Stores `x` at (i0, i1, i2, i3) of `o`, rounded once to o.format (float32 as
/// is; binary16 and bfloat16 to nearest, ties to even).
inline void store(const hr_out_tensor& o, std::int64_t i0, std::int64_t i1, std::int64_t i2, std::int64_t i3, float x) {
  const std::int64_t at = offset(o.strides, i0, i1, i2, i3);
  switch (o.format) {
    case HR_FORMAT_BINARY16:
      static_cast<std::uint16_t*>(o.data)[at] = headroom::float_to_binary16(x);
      break;
    case HR_FORMAT_BFLOAT16:
      static_cast<std::uint16_t*>(o.data)[at] = headroom::float_to_bfloat16(x);
      break;
    default:
      static_cast<float*>(o.data)[at] = x;
      break;
  }
}

/// Returns: x rounded to binary16 (resp. bfloat16), as a float32 value. One
/// float32 operation rounded this way is correctly rounded (Figueroa 1995).
inline float round_binary16(float x) { return headroom::binary16_to_float(headroom::float_to_binary16(x)); }
inline float round_bfloat16(float x) { return headroom::bfloat16_to_float(headroom::float_to_bfloat16(x)); }

/// Returns: the float32 dot product Σ_d a[d]·b[d], accumulated in index order.
inline float dot(const float* a, const float* b, std::int64_t n) {
  float s = 0.0f;
  for (std::int64_t d = 0; d < n; ++d) s += a[d] * b[d];
  return s;
}

/// Returns: the key/value head serving query head h (kernel_abi.h: g = h / (Hq / Hkv)).
inline std::int64_t kv_head(std::int64_t h, std::int64_t q_heads, std::int64_t kv_heads) {
  return h / (q_heads / kv_heads);
}

/// Returns: whether a problem's formats are the ones the kernel declared; a
/// kernel answers HR_UNSUPPORTED otherwise rather than misreading memory.
inline bool formats_are(const hr_core_problem& p, std::int32_t in, std::int32_t out) {
  return p.q.format == in && p.k.format == in && p.v.format == in && p.o.format == out;
}

/// The mask of one problem, with the lengths it applies to, and (for a kernel
/// declaring HR_FEATURE_WINDOW) its sliding window.
class MaskView {
 public:
  MaskView(const hr_mask& m, std::int64_t q_len, std::int64_t kv_len) : m_(m), q_len_(q_len), kv_len_(kv_len) {}
  /// The mask and window of `p` (kernel_abi.h version 2: window_left/right, −1 open).
  /// With HR_FEATURE_PAGED_KV, sequence b has paged.seq_lens[b] keys, and the
  /// bottom-right alignment and the window follow that length.
  explicit MaskView(const hr_core_problem& p) : m_(p.mask), q_len_(p.q_len), kv_len_(p.kv_len) {
    if (p.features & HR_FEATURE_WINDOW) window_left_ = p.window_left, window_right_ = p.window_right;
    if (p.features & HR_FEATURE_PAGED_KV) seq_lens_ = p.paged.seq_lens;
  }

  /// Returns: the keys sequence b has (its paged length, else Tk).
  std::int64_t seq_len(std::int64_t b) const { return seq_lens_ != nullptr ? seq_lens_[b] : kv_len_; }

  /// Returns: whether the kind is one of the six of kernel_abi.h.
  bool known() const { return (m_.kind & kAllMasks) != 0 && (m_.kind & (m_.kind - 1)) == 0; }

  /// Returns: whether the visible keys of a row are a prefix [0, key_end) (none,
  /// both causal alignments, key padding), not an arbitrary set (dense, bias).
  bool is_prefix() const { return m_.kind != HR_MASK_DENSE && m_.kind != HR_MASK_BIAS; }

  /// Returns: for a prefix mask, the first invisible key of query row i in batch
  /// b, in [0, Tk]; Tk for dense and bias. Causal bounds from kernel_abi.h:
  /// top-left j ≤ i, bottom-right j ≤ i + (Tk − Tq).
  std::int64_t key_end(std::int64_t b, std::int64_t i) const {
    const std::int64_t len = seq_len(b);
    std::int64_t end = len;
    switch (m_.kind) {
      case HR_MASK_CAUSAL_TOP_LEFT: end = i + 1; break;
      case HR_MASK_CAUSAL_BOTTOM_RIGHT: end = i + 1 + len - q_len_; break;
      case HR_MASK_KEY_PADDING: end = m_.key_lengths[b]; break;
      default: break;
    }
    if (window_right_ >= 0) end = std::min(end, window_at(b, i) + window_right_ + 1);
    return std::clamp<std::int64_t>(end, 0, len);
  }

  /// Returns: the first key the window lets query i see (0 without a left side).
  std::int64_t key_begin(std::int64_t b, std::int64_t i) const {
    return window_left_ < 0 ? 0 : std::clamp<std::int64_t>(window_at(b, i) - window_left_, 0, kv_len_);
  }

  /// Returns: whether key j is visible to query i of head h in batch b. A bias
  /// of −inf masks (kernel_abi.h, HR_MASK_BIAS).
  bool visible(std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t j) const {
    if (j < key_begin(b, i)) return false;
    switch (m_.kind) {
      case HR_MASK_DENSE:
        return j < key_end(b, i) && m_.allowed[mask_offset(b, h, i, j)] != 0;
      case HR_MASK_BIAS:
        return j < key_end(b, i) && m_.bias[mask_offset(b, h, i, j)] != kNegInf;
      default:
        return j < key_end(b, i);
    }
  }

  /// Returns: the additive bias of (b, h, i, j); 0 unless the kind is bias.
  float bias(std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t j) const {
    return m_.kind == HR_MASK_BIAS ? m_.bias[mask_offset(b, h, i, j)] : 0.0f;
  }

 private:
  // The query's position on the key axis for the window (kernel_abi.h):
  // i under causal top-left, i + Tk − Tq otherwise (Tk: the sequence's length).
  std::int64_t window_at(std::int64_t b, std::int64_t i) const {
    return m_.kind == HR_MASK_CAUSAL_TOP_LEFT ? i : i + seq_len(b) - q_len_;
  }

  // The dense/bias tensor may have extent 1 on the head axis (one mask for all
  // heads), and any axis of extent 1 broadcasts whatever its stride says.
  std::int64_t mask_offset(std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t j) const {
    const std::int64_t* e = m_.extents;
    return offset(m_.strides, e[0] == 1 ? 0 : b, e[1] == 1 ? 0 : h, e[2] == 1 ? 0 : i, e[3] == 1 ? 0 : j);
  }

  const hr_mask& m_;
  std::int64_t q_len_, kv_len_;
  std::int64_t window_left_ = -1, window_right_ = -1;
  const std::int64_t* seq_lens_ = nullptr;
};

/// Returns: where the log-sum-exp of row (b, h, i) goes, or nullptr when the
/// problem asks for none ([B, Hq, Tq] contiguous, kernel_abi.h).
inline float* lse_at(const hr_core_problem& p, std::int64_t b, std::int64_t h, std::int64_t i) {
  return p.lse == nullptr ? nullptr : p.lse + (b * p.q_heads + h) * p.q_len + i;
}

/// Writes the declared convention for a row with no visible key: O row +0,
/// log-sum-exp −inf (HR_MASKED_ROW_ZEROS).
inline void write_masked_row(const hr_core_problem& p, std::int64_t b, std::int64_t h, std::int64_t i) {
  for (std::int64_t d = 0; d < p.value_dim; ++d) store(p.o, b, h, i, d, 0.0f);
  if (float* l = lse_at(p, b, h, i)) *l = kNegInf;
}

/// Writes row (b, h, i) of O as acc[d] / l and its log-sum-exp m + log l.
/// Precondition: l > 0.
inline void write_row(const hr_core_problem& p, std::int64_t b, std::int64_t h, std::int64_t i, const float* acc,
                      float m, float l) {
  for (std::int64_t d = 0; d < p.value_dim; ++d) store(p.o, b, h, i, d, acc[d] / l);
  if (float* out = lse_at(p, b, h, i)) *out = m + std::log(l);
}

}  // namespace hr_kernels
