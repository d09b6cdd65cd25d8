// headroom kernels — f32_tiled_<t>: tiled online softmax in float32, t×t tiles.
//
// Method: the online normaliser of Milakov & Gimelshein 2018 ("Online normalizer
// calculation for softmax", alg. 3) applied tile by tile as in Dao et al. 2022
// (FlashAttention, alg. 1). Queries are taken t rows at a time; for each tile
// of t keys the kernel forms the t×t score tile, and each row keeps a running
// maximum m, normaliser l and accumulator acc. A new tile with row maximum
// m' > m rescales l and acc by exp(m − m') before adding its own terms, so the
// scores are never all held at once. Key tiles past the last visible key of
// every row of the query tile (causal, key padding) are skipped, as
// FlashAttention does. Masked keys are never used; fully masked rows get zeros
// and log-sum-exp −inf. Registered with t = 16 and t = 64.
//
// Each tile's row sum and P̃·V are formed on their own and then added to the
// running l and acc, as the algorithm states. Adding every weight straight to
// l instead stagnates where one key dominates a long row: once l ≈ 1, weights
// below half its ulp (2^-24) round away, every one in the same direction.
// Measured with `headroom qualify --family attention_sink --shape
// 1,4,1,4,4096,64,64`: per-key sums gave relative RMSE 4.1e-5 (limit 3.0e-5,
// fail; 4.2× over at Tk 16384), tile sums pass.
#include <cmath>
#include <vector>

#include "common.h"
#include "kernel_list.h"

namespace hr_kernels {
namespace {

template <std::int64_t kTile>
std::int32_t run(const hr_core_problem* p) {
  const MaskView mask(*p);
  if (!formats_are(*p, HR_FORMAT_FLOAT32, HR_FORMAT_FLOAT32) || !mask.known()) return HR_UNSUPPORTED;
  const std::int64_t dk = p->key_dim, dv = p->value_dim;
  std::vector<float> q(kTile * dk), k(kTile * dk), v(kTile * dv), s(kTile * kTile);
  std::vector<float> m(kTile), l(kTile), acc(kTile * dv), tile_acc(dv);
  for (std::int64_t b = 0; b < p->batch; ++b) {
    for (std::int64_t h = 0; h < p->q_heads; ++h) {
      const std::int64_t g = kv_head(h, p->q_heads, p->kv_heads);
      for (std::int64_t i0 = 0; i0 < p->q_len; i0 += kTile) {
        const std::int64_t rows = std::min(kTile, p->q_len - i0);
        std::int64_t key_end = 0;  // no row of this query tile sees a key at or past it
        for (std::int64_t r = 0; r < rows; ++r) {
          load_row(p->q, b, h, i0 + r, dk, &q[r * dk]);
          key_end = std::max(key_end, mask.key_end(b, i0 + r));
        }
        std::fill(m.begin(), m.end(), kNegInf);
        std::fill(l.begin(), l.end(), 0.0f);
        std::fill(acc.begin(), acc.end(), 0.0f);
        for (std::int64_t j0 = 0; j0 < key_end; j0 += kTile) {
          const std::int64_t cols = std::min(kTile, p->kv_len - j0);
          for (std::int64_t c = 0; c < cols; ++c) {
            load_row(p->k, b, g, j0 + c, dk, &k[c * dk]);
            load_row(p->v, b, g, j0 + c, dv, &v[c * dv]);
          }
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
            if (!(m_new > kNegInf)) continue;            // nothing visible to this row yet
            const float alpha = std::exp(m[r] - m_new);  // 0 on the first visible tile
            // The tile's own row sum and P̃·V first, then folded in (Dao et al. 2022,
            // alg. 1, lines 10-12): the running l never takes the tile's small terms one
            // by one, so a row dominated by one key keeps them (see the file comment).
            float tile_l = 0.0f;
            std::fill(tile_acc.begin(), tile_acc.end(), 0.0f);
            for (std::int64_t c = 0; c < cols; ++c) {
              const float e = std::exp(s[r * kTile + c] - m_new);
              if (e == 0.0f) continue;  // masked: its V row, possibly garbage, is not used
              tile_l += e;
              for (std::int64_t d = 0; d < dv; ++d) tile_acc[d] += e * v[c * dv + d];
            }
            float* a = &acc[r * dv];
            l[r] = l[r] * alpha + tile_l;
            for (std::int64_t d = 0; d < dv; ++d) a[d] = a[d] * alpha + tile_acc[d];
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

constexpr hr_kernel declare(const char* name, const char* description, std::int32_t (*fn)(const hr_core_problem*)) {
  return {
      .abi_version = HEADROOM_ABI_VERSION,
      .name = name,
      .description = description,
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
      .run_core = fn,
      .run_block = nullptr,
      .features = HR_FEATURE_WINDOW,  // MaskView(*p): key_end includes the window's right side
  };
}

}  // namespace

const hr_kernel f32_tiled_16 =
    declare("f32_tiled_16", "float32 tiled online softmax (FlashAttention-style), 16x16 tiles", run<16>);
const hr_kernel f32_tiled_64 =
    declare("f32_tiled_64", "float32 tiled online softmax (FlashAttention-style), 64x64 tiles", run<64>);

}  // namespace hr_kernels
