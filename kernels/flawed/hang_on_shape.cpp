// headroom flawed specimen — hang_on_shape: loops forever when Tk == 33.
//
// Method: float32 single-pass online softmax over key tiles (Milakov &
// Gimelshein 2018, alg. 3, a tile at a time), all masks, zeros on fully masked
// rows. The key tile is 16, except for a few lengths just past a tile edge,
// where a hand-tuned table picks a tile that divides Tk (17 → 17, 65 → 13).
// DEFECT: the table's entry for Tk = 33 is 0 (meant 11), so the key loop
// `j0 += tile` never advances and the kernel never returns for any problem
// with Tk = 33 — and only for those. Expected fault: timeout.
#include <cmath>
#include <vector>

#include "../common.h"
#include "../kernel_list.h"

namespace hr_kernels {
namespace {

struct TunedTile {
  std::int64_t kv_len, tile;
};
constexpr TunedTile kTuned[] = {{17, 17}, {33, 0}, {65, 13}};  // the defect: {33, 11}

std::int64_t key_tile(std::int64_t kv_len) {
  for (const TunedTile& t : kTuned) {
    if (t.kv_len == kv_len) return t.tile;
  }
  return 16;
}

std::int32_t run(const hr_core_problem* p) {
  const MaskView mask(p->mask, p->q_len, p->kv_len);
  if (!formats_are(*p, HR_FORMAT_FLOAT32, HR_FORMAT_FLOAT32) || !mask.known()) return HR_UNSUPPORTED;
  const std::int64_t tile = key_tile(p->kv_len);
  std::vector<float> q(p->key_dim), k(p->key_dim), v(p->value_dim), acc(p->value_dim);
  // volatile: a side effect in every trip of the tile loop, so the C++ forward
  // progress rule ([intro.progress]) does not let the compiler assume the
  // endless loop terminates and delete it — the hang must be real.
  volatile std::int64_t tiles_done = 0;
  for (std::int64_t b = 0; b < p->batch; ++b) {
    for (std::int64_t h = 0; h < p->q_heads; ++h) {
      const std::int64_t g = kv_head(h, p->q_heads, p->kv_heads);
      for (std::int64_t i = 0; i < p->q_len; ++i) {
        load_row(p->q, b, h, i, p->key_dim, q.data());
        float m = kNegInf, l = 0.0f;
        std::fill(acc.begin(), acc.end(), 0.0f);
        for (std::int64_t j0 = 0; j0 < p->kv_len; j0 += tile) {
          tiles_done = tiles_done + 1;
          for (std::int64_t j = j0; j < std::min(j0 + tile, p->kv_len); ++j) {
            if (!mask.visible(b, h, i, j)) continue;
            load_row(p->k, b, g, j, p->key_dim, k.data());
            const float z = p->scale * dot(q.data(), k.data(), p->key_dim) + mask.bias(b, h, i, j);
            load_row(p->v, b, g, j, p->value_dim, v.data());
            if (z > m) {
              const float alpha = std::exp(m - z);
              l = l * alpha + 1.0f;
              for (std::int64_t d = 0; d < p->value_dim; ++d) acc[d] = acc[d] * alpha + v[d];
              m = z;
            } else {
              const float e = std::exp(z - m);
              l += e;
              for (std::int64_t d = 0; d < p->value_dim; ++d) acc[d] += e * v[d];
            }
          }
        }
        if (!(m > kNegInf)) {
          write_masked_row(*p, b, h, i);
        } else {
          write_row(*p, b, h, i, acc.data(), m, l);
        }
      }
    }
  }
  return HR_OK;
}

}  // namespace

const hr_kernel hang_on_shape = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "hang_on_shape",
    .description = "float32 online softmax over key tiles from a tuned table whose entry for Tk = 33 is 0",
    .level = HR_LEVEL_CORE,
    .input_format = HR_FORMAT_FLOAT32,
    .output_format = HR_FORMAT_FLOAT32,
    .q_quant = {},
    .k_quant = {},
    .v_quant = {},
    .mask_kinds = kAllMasks,
    .masked_row = HR_MASKED_ROW_ZEROS,
    .returns_lse = 1,
    .layouts = kStridedLayouts,
    .max_kv_len = 0,
    .run_core = run,
    .run_block = nullptr,
};

}  // namespace hr_kernels
