// headroom — upstream gradients dO for judging backward kernels.
//
// A backward kernel is given dO [B, Hq, Tq, Dv] beside Q, K, V. A case may
// carry one (d_o.npy, case_folder.h); one that does not is given
// upstream_gradient_for(case): a pure function of the case's name and shape,
// so every run and every kernel sees the same dO. The kinds stress different
// parts of the backward:
//   gaussian      dO ~ N(0, 1): the baseline.
//   heavy_tailed  Student's t with 3 degrees of freedom (N / sqrt(χ²₃/3)): a
//                 few entries dozens of times the typical one dominate dP = dO Vᵀ.
//   one_hot       each row of dO is ±1 in one channel and 0 elsewhere (a
//                 single-token loss): D_i = O_id exactly one output element,
//                 and dP_ij − D_i cancels whenever P is near one-hot.
//   large         N(0, 1)·2^12: products dO·V near the binary16 range (max
//                 65504), overflow in low-precision accumulators.
// Paired with the large_logits and dominant_key families (near-one-hot P,
// where D_i cancels against dP), long_sequence (long rows), GQA shapes and the
// masks family, these are the backward's adversarial cases. Values float32.
#pragma once

#include <cstdint>
#include <optional>
#include <string_view>

#include "headroom/case.h"
#include "headroom/tensor.h"

namespace headroom {

enum class UpstreamKind : unsigned char { gaussian, heavy_tailed, one_hot, large };
inline constexpr UpstreamKind kUpstreamKinds[] = {UpstreamKind::gaussian, UpstreamKind::heavy_tailed,
                                                  UpstreamKind::one_hot, UpstreamKind::large};

/// Returns: "gaussian", "heavy_tailed", "one_hot", "large".
std::string_view upstream_kind_name(UpstreamKind k);
std::optional<UpstreamKind> parse_upstream_kind(std::string_view name);

/// Returns: dO of shape [B, Hq, Tq, Dv], float32-valued, a pure function of
/// (shape, kind, seed) element by element (a smaller shape gives a sub-tensor).
Tensor upstream_gradient(const CoreShape& s, UpstreamKind kind, std::uint64_t seed);

/// Returns: the case's own dO when it has one, else upstream_gradient of its
/// shape with seed = a hash of the case name and kind = kUpstreamKinds[seed % 4].
/// Preconditions: c.level is core.
Tensor upstream_gradient_for(const Case& c);
/// Returns: the kind upstream_gradient_for gives case `c` when it carries no dO.
UpstreamKind upstream_kind_for(const Case& c);

}  // namespace headroom
