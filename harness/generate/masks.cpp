// headroom — masks of every kind for generated cases, plain or adversarial.
//
// Plain masks leave every query at least one visible key. Adversarial masks
// (the masks family) add the rows kernels get wrong: a fully masked row (no
// mathematical value; the kernel's declared convention is checked), a row
// whose only visible key is the last one (off-by-one in a tile loop drops it),
// and, for bias masks, a row whose every bias is the same very negative finite
// value (a kernel that treats "very negative" as masked returns zeros where
// the exact answer is the softmax of the scores alone).
#include <cmath>
#include <limits>

#include "recipe.h"

namespace headroom::generate_internal {
namespace {

constexpr double kMinusInf = -std::numeric_limits<double>::infinity();
// Finite in binary16 (max 65504) and exactly representable there (a multiple
// of its spacing 32 at this magnitude), so every input format receives it unchanged.
constexpr double kVeryNegativeBias = -60000.0;

struct SpecialRows {
  std::int64_t fully_masked = -1;
  std::int64_t last_key_only = -1;
  std::int64_t very_negative = -1;
};

// Distinct rows while Tq allows; with a single query row, the seed picks
// whether it is fully masked or sees only the last key.
SpecialRows special_rows(const Noise& n, std::int64_t tq, bool with_very_negative) {
  SpecialRows r;
  const std::int64_t base = n.index(tq, Stream::mask, -1, 0, 0, 0);
  if (tq == 1) {
    if (n.bits(Stream::mask, -2) & 1)
      r.fully_masked = 0;
    else
      r.last_key_only = 0;
    return r;
  }
  r.fully_masked = base;
  r.last_key_only = (base + 1) % tq;
  if (with_very_negative && tq >= 3) r.very_negative = (base + 2) % tq;
  return r;
}

// Head extent of a dense or bias tensor: broadcast (1) or per query head.
std::int64_t mask_heads(const Noise& n, const CoreShape& s) {
  return (s.q_heads > 1 && (n.bits(Stream::mask, -3) & 1)) ? s.q_heads : 1;
}

// ALiBi-style linear position bias (Press et al. 2022, "Train Short, Test Long",
// §3: head slopes the geometric sequence 2^(-8/n), 2^(-16/n), ...; from memory),
// with positions aligned bottom-right so the last query sits at the last key.
double linear_bias(const CoreShape& s, std::int64_t h, std::int64_t heads, std::int64_t i, std::int64_t j) {
  const double slope = std::exp2(-8.0 * static_cast<double>(h + 1) / static_cast<double>(heads));
  const double distance = std::fabs(static_cast<double>(i + (s.kv_len - s.q_len) - j));
  return to_float32(-slope * distance);
}

Mask dense_mask(const CoreShape& s, const Noise& n, bool adversarial) {
  Mask m;
  m.kind = MaskKind::dense;
  const std::int64_t heads = mask_heads(n, s);
  const SpecialRows rows = adversarial ? special_rows(n, s.q_len, false) : SpecialRows{};
  m.allowed = Tensor({s.batch, heads, s.q_len, s.kv_len});
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < heads; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i)
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          bool on = n.unit(Stream::mask, b, h, i, j) < 0.7;
          // A plain mask keeps one key per row: the diagonal one, clipped to Tk.
          if (j == std::min(i, s.kv_len - 1)) on = true;
          if (i == rows.last_key_only) on = j == s.kv_len - 1;
          if (i == rows.fully_masked) on = false;
          m.allowed.at(b, h, i, j) = on ? 1.0 : 0.0;
        }
  return m;
}

Mask bias_mask(const CoreShape& s, const Noise& n, bool adversarial) {
  Mask m;
  m.kind = MaskKind::bias;
  const std::int64_t heads = mask_heads(n, s);
  const SpecialRows rows = adversarial ? special_rows(n, s.q_len, true) : SpecialRows{};
  m.bias = Tensor({s.batch, heads, s.q_len, s.kv_len});
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < heads; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i)
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          double v = linear_bias(s, h, heads, i, j);
          // Adversarial: a quarter of the positions masked outright, the diagonal kept.
          if (adversarial && j != std::min(i, s.kv_len - 1) && n.unit(Stream::mask, b, h, i, j) < 0.25) v = kMinusInf;
          if (i == rows.very_negative) v = kVeryNegativeBias;
          if (i == rows.last_key_only && j != s.kv_len - 1) v = kMinusInf;
          if (i == rows.fully_masked) v = kMinusInf;
          m.bias.at(b, h, i, j) = v;
        }
  return m;
}

Mask padding_mask(const CoreShape& s, const Noise& n, bool adversarial) {
  Mask m;
  m.kind = MaskKind::key_padding;
  for (std::int64_t b = 0; b < s.batch; ++b) {
    std::int64_t len = 1 + n.index(s.kv_len, Stream::mask, b, -4);
    if (adversarial) {
      // Batch 0: no key at all (every row fully masked); batch 1: one key.
      // A single batch gets one key, or none when there is only one to pad.
      if (s.batch == 1)
        len = s.kv_len >= 2 ? 1 : 0;
      else if (b == 0)
        len = 0;
      else if (b == 1)
        len = 1;
      else
        len = n.index(s.kv_len + 1, Stream::mask, b, -4);
    }
    m.key_lengths.push_back(len);
  }
  return m;
}

}  // namespace

Mask build_mask(const Recipe& r, bool adversarial) {
  // Mask draws come from the full-precision stream: simplifying values must
  // not move which keys are visible.
  const Noise n(r.value_seed, 53);
  switch (r.mask) {
    case MaskKind::dense:
      return dense_mask(r.shape, n, adversarial);
    case MaskKind::bias:
      return bias_mask(r.shape, n, adversarial);
    case MaskKind::key_padding:
      return padding_mask(r.shape, n, adversarial);
    case MaskKind::none:
    case MaskKind::causal_top_left:
    case MaskKind::causal_bottom_right:
      break;
  }
  Mask m;
  m.kind = r.mask;
  return m;
}

}  // namespace headroom::generate_internal
