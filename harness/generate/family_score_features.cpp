// headroom — the families of the score features of kernel_abi.h version 2:
// capped_logits (logit soft-capping) and dominant_sinks (sink logits).
// Their documentation is their FamilyInfo entries (families.h).
#include <algorithm>
#include <array>
#include <cmath>

#include "recipe.h"

namespace headroom::generate_internal {
namespace {

template <class T, std::size_t N>
T at_knob(const std::array<T, N>& menu, int knob) {
  return menu[static_cast<std::size_t>(std::clamp(knob, 0, static_cast<int>(N) - 1))];
}

// Masks that hide keys, so a cap applied after the mask (which turns −inf
// into −c) shows; the adversarial masks add fully masked rows.
MaskKind feature_mask(Draw& d) {
  return d.pick({MaskKind::causal_bottom_right, MaskKind::causal_top_left, MaskKind::key_padding, MaskKind::bias,
                 MaskKind::none});
}

// ---- capped_logits ----
// Caps, largest (mildest) first: 50 and 30 are the attention caps reported
// for released models (from memory: Gemma 2 uses 50, Grok-1 30), the smaller
// ones make the cap bite on ordinary scores.
constexpr std::array<double, 5> kCaps{50.0, 30.0, 20.0, 10.0, 5.0};
// Score spread as a multiple of the cap: from barely capped to deep in
// saturation, where many keys tie at ≈ c and only tanh's last bits differ.
constexpr std::array<double, 5> kSpread{0.5, 1.0, 2.0, 4.0, 16.0};

void capped_sample(Draw& d, int size, Recipe& r) {
  r.shape = sample_core_shape(d, size);
  r.knobs[0] = d.uniform_int(0, static_cast<int>(kCaps.size()) - 1);
  r.knobs[1] = d.uniform_int(0, static_cast<int>(kSpread.size()) - 1);
}

void capped_realize(const Recipe& r, Case& c) {
  const double cap = at_knob(kCaps, r.knobs[0]);
  const double spread = cap * at_knob(kSpread, r.knobs[1]);
  c.core.scale = softmax_scale(r.shape.key_dim);
  c.core.softcap = static_cast<float>(cap);
  // q, k ~ m·N(0,1) give s·q·k a standard deviation m² (as large_logits).
  c.core_inputs = gaussian_inputs(r, std::sqrt(spread));
  c.core_inputs.v = gaussian_inputs(r, 1.0).v;
}

// ---- dominant_sinks ----
// Sink levels above the typical row maximum (scores ~ N(0, 1)): an equal
// share, then sinks that take nearly all the weight, up to e^8 ≈ 3000 times a
// key's (over 97% of the row at Tk ≤ 64). Not higher: the output shrinks like
// e^-level, and past e^-9 ≈ 1.2·10^-4 it leaves binary16's normal range
// (2^-14 ≈ 6.1·10^-5), where no binary16 output can carry its relative error.
constexpr std::array<double, 6> kLevels{0.0, 1.0, 2.0, 4.0, 6.0, 8.0};

void sinks_sample(Draw& d, int size, Recipe& r) {
  r.shape = sample_core_shape(d, size);
  r.knobs[0] = d.uniform_int(0, static_cast<int>(kLevels.size()) - 1);
  r.knobs[1] = d.uniform_int(0, 2);
}

void sinks_realize(const Recipe& r, Case& c) {
  const Noise n = r.noise();
  const double level = at_knob(kLevels, r.knobs[0]);
  c.core.scale = softmax_scale(r.shape.key_dim);
  c.core_inputs = gaussian_inputs(r, 1.0);
  // knob 1: 0 every head's sink near the level; 1 odd heads' sinks far below
  // (negligible, as a head that learned not to use its sink); 2 as 0 and the
  // scores widened 4× so sink and keys compete.
  if (r.knobs[1] == 2) {
    for (double& x : c.core_inputs.q.values) x = to_float32(2.0 * x);
    for (double& x : c.core_inputs.k.values) x = to_float32(2.0 * x);
  }
  c.core.sinks.resize(static_cast<std::size_t>(r.shape.q_heads));
  for (std::int64_t h = 0; h < r.shape.q_heads; ++h) {
    const double sign = r.knobs[1] == 1 && h % 2 == 1 ? -1.0 : 1.0;
    c.core.sinks[static_cast<std::size_t>(h)] =
        static_cast<float>(sign * level + 0.5 * n.normal(Stream::plan, -2, h));
  }
}

}  // namespace

std::vector<FamilyImpl> score_feature_families() {
  return {{.name = "capped_logits",
           .choose_mask = feature_mask,
           .sample = capped_sample,
           .realize = capped_realize,
           .adversarial_mask = true},
          {.name = "dominant_sinks",
           .choose_mask = feature_mask,
           .sample = sinks_sample,
           .realize = sinks_realize,
           .adversarial_mask = true}};
}

}  // namespace headroom::generate_internal
