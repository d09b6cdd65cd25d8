// headroom kernels — the score features of a problem (kernel_abi.h version 2):
// logit soft-capping and sink logits, applied the same way by every bundled
// kernel that declares HR_FEATURE_SOFTCAP and HR_FEATURE_SINKS.
//
// Soft cap c > 0: each scaled score x = s·(q·k) becomes c·tanh(x/c) before the
// bias is added and before the mask applies, so a masked key stays masked.
// Sink logit σ_h: exp(σ_h − m) joins the row's normaliser and nothing joins
// the numerator (no value row); it also joins the running maximum m so exp
// cannot overflow. A row with no visible key stays a fully masked row.
#pragma once

#include <algorithm>
#include <cmath>
#include <cstdint>

#include "headroom/kernel_abi.h"

namespace hr_kernels {

class ScoreFeatures {
 public:
  /// The features of `p` that its `features` bits switch on.
  explicit ScoreFeatures(const hr_core_problem& p)
      : cap_((p.features & HR_FEATURE_SOFTCAP) != 0 ? p.softcap : 0.0f),
        sinks_((p.features & HR_FEATURE_SINKS) != 0 ? p.sinks : nullptr) {}

  /// Returns: c·tanh(x/c) in float32 under a soft cap, x itself without one.
  float cap(float x) const { return cap_ > 0.0f ? cap_ * std::tanh(x / cap_) : x; }

  /// Returns: the row maximum m widened by head h's sink logit (m without sinks).
  float with_sink(std::int64_t h, float m) const { return sinks_ == nullptr ? m : std::max(m, sinks_[h]); }
  /// Returns: exp(σ_h − m), the sink's term of the normaliser (0 without sinks).
  /// Precondition: m = with_sink(h, ·).
  float sink_weight(std::int64_t h, float m) const { return sinks_ == nullptr ? 0.0f : std::exp(sinks_[h] - m); }

  /// Folds head h's sink into an online softmax's finished row: raises m to
  /// the sink when it is larger and adds its term to l.
  /// Returns: the factor the row's accumulated numerator must be scaled by (1
  /// without sinks). Precondition: m finite (the row saw a key).
  float fold_sink(std::int64_t h, float& m, float& l) const {
    if (sinks_ == nullptr) return 1.0f;
    const float top = std::max(m, sinks_[h]);
    const float alpha = std::exp(m - top);
    l = l * alpha + std::exp(sinks_[h] - top);
    m = top;
    return alpha;
  }

 private:
  float cap_;
  const float* sinks_;
};

}  // namespace hr_kernels
