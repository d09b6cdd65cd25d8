// headroom — the sliding_window family: local attention windows on top of causal and padding masks.
// Its documentation is its FamilyInfo entry (families.h).
#include <algorithm>
#include <array>
#include <cmath>

#include "recipe.h"

namespace headroom::generate_internal {
namespace {

// Left window sizes, simplest first: 0 (the query's own key only), then sizes
// around the tile widths 8, 16, 32, 64, 128 where a window's first key falls
// on, just before or just after a tile boundary.
constexpr std::array<std::int64_t, 16> kLeft{0, 1, 3, 7, 8, 9, 15, 16, 17, 31, 32, 33, 63, 64, 65, 127};
// Right sides: open (causal masks close it anyway), the query's own key, one
// key ahead, a few keys ahead (bidirectional local attention).
constexpr std::array<std::int64_t, 4> kRight{-1, 0, 1, 4};

MaskKind window_mask(Draw& d) {
  return d.pick({MaskKind::causal_bottom_right, MaskKind::causal_bottom_right, MaskKind::causal_top_left,
                 MaskKind::key_padding, MaskKind::none});
}

void window_sample(Draw& d, int size, Recipe& r) {
  r.shape = sample_core_shape(d, size);
  // Windows matter only when rows are longer than them: keys up to ~3 windows.
  r.shape.kv_len = d.uniform(1, std::max<std::int64_t>(2, size_cap(size, 200)));
  r.shape.q_len = d.pick<std::int64_t>({1, 1, std::min<std::int64_t>(r.shape.kv_len, 17), r.shape.kv_len});
  r.knobs[0] = d.uniform_int(0, static_cast<int>(kLeft.size()) - 1);
  r.knobs[1] = d.uniform_int(0, static_cast<int>(kRight.size()) - 1);
}

void window_realize(const Recipe& r, Case& c) {
  c.core.scale = softmax_scale(r.shape.key_dim);
  c.core_inputs = gaussian_inputs(r, 1.0);
  c.core.mask.window_left = kLeft[static_cast<std::size_t>(std::clamp(r.knobs[0], 0, int{kLeft.size()} - 1))];
  c.core.mask.window_right = kRight[static_cast<std::size_t>(std::clamp(r.knobs[1], 0, int{kRight.size()} - 1))];
}

}  // namespace

std::vector<FamilyImpl> window_families() {
  return {{.name = "sliding_window", .choose_mask = window_mask, .sample = window_sample, .realize = window_realize}};
}

}  // namespace headroom::generate_internal
