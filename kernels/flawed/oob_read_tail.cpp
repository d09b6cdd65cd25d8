// headroom flawed specimen — oob_read_tail: loads a whole K tile even when the tail tile is partial.
//
// Method: float32 tiled online softmax with 16×16 tiles, as f32_tiled_16
// (Milakov & Gimelshein 2018; Dao et al. 2022), all masks, zeros on fully
// masked rows. Each key tile of K is first copied into a local tile buffer
// (the "shared memory" of a GPU kernel), then scored.
// DEFECT: the copy of K always takes 16 rows, even for the partial tail tile
// of Tk mod 16 keys: it reads K rows Tk .. 16·⌈Tk/16⌉ − 1, which do not exist.
// For the last (b, kv head) of a contiguous K that is past the END of the K
// buffer whenever Tk is not a multiple of 16 (for other heads it is the next
// head's rows). The extra rows are never scored, so the output is right; only
// the read is wrong. Expected fault: oob_read (a guard page after K).
#include <cmath>
#include <vector>

#include "../common.h"
#include "../kernel_list.h"

namespace hr_kernels {
namespace {

constexpr std::int64_t kTile = 16;

std::int32_t run(const hr_core_problem* p) {
  const MaskView mask(p->mask, p->q_len, p->kv_len);
  if (!formats_are(*p, HR_FORMAT_FLOAT32, HR_FORMAT_FLOAT32) || !mask.known()) return HR_UNSUPPORTED;
  const std::int64_t dk = p->key_dim, dv = p->value_dim;
  std::vector<float> q(kTile * dk), k(kTile * dk), v(kTile * dv), s(kTile * kTile);
  std::vector<float> m(kTile), l(kTile), acc(kTile * dv);
  for (std::int64_t b = 0; b < p->batch; ++b) {
    for (std::int64_t h = 0; h < p->q_heads; ++h) {
      const std::int64_t g = kv_head(h, p->q_heads, p->kv_heads);
      for (std::int64_t i0 = 0; i0 < p->q_len; i0 += kTile) {
        const std::int64_t rows = std::min(kTile, p->q_len - i0);
        for (std::int64_t r = 0; r < rows; ++r) load_row(p->q, b, h, i0 + r, dk, &q[r * dk]);
        std::fill(m.begin(), m.end(), kNegInf);
        std::fill(l.begin(), l.end(), 0.0f);
        std::fill(acc.begin(), acc.end(), 0.0f);
        for (std::int64_t j0 = 0; j0 < p->kv_len; j0 += kTile) {
          const std::int64_t cols = std::min(kTile, p->kv_len - j0);
          for (std::int64_t c = 0; c < kTile; ++c)
            load_row(p->k, b, g, j0 + c, dk, &k[c * dk]);  // the defect: c < cols
          for (std::int64_t c = 0; c < cols; ++c) load_row(p->v, b, g, j0 + c, dv, &v[c * dv]);
          for (std::int64_t r = 0; r < rows; ++r) {
            const std::int64_t i = i0 + r;
            float tile_max = kNegInf;
            for (std::int64_t c = 0; c < cols; ++c) {
              const std::int64_t j = j0 + c;
              float& z = s[r * kTile + c];
              z = mask.visible(b, h, i, j) ? p->scale * dot(&q[r * dk], &k[c * dk], dk) + mask.bias(b, h, i, j)
                                           : kNegInf;
              tile_max = std::max(tile_max, z);
            }
            const float m_new = std::max(m[r], tile_max);
            if (!(m_new > kNegInf)) continue;
            const float alpha = std::exp(m[r] - m_new);
            float* a = &acc[r * dv];
            l[r] *= alpha;
            for (std::int64_t d = 0; d < dv; ++d) a[d] *= alpha;
            for (std::int64_t c = 0; c < cols; ++c) {
              const float e = std::exp(s[r * kTile + c] - m_new);
              if (e == 0.0f) continue;
              l[r] += e;
              for (std::int64_t d = 0; d < dv; ++d) a[d] += e * v[c * dv + d];
            }
            m[r] = m_new;
          }
        }
        for (std::int64_t r = 0; r < rows; ++r) {
          if (!(m[r] > kNegInf)) {
            write_masked_row(*p, b, h, i0 + r);
          } else {
            write_row(*p, b, h, i0 + r, &acc[r * dv], m[r], l[r]);
          }
        }
      }
    }
  }
  return HR_OK;
}

}  // namespace

const hr_kernel oob_read_tail = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "oob_read_tail",
    .description = "float32 tiled online softmax, 16x16 tiles, copying 16 K rows even for a partial tail tile",
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
