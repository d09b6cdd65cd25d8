// headroom flawed specimen — mask_tail_off_by_one: the tail key tile lets one masked key through.
//
// Method: float32 tiled online softmax with 16×16 tiles, as f32_tiled_16
// (Milakov & Gimelshein 2018; Dao et al. 2022), all masks, zeros on fully
// masked rows. For the prefix masks (causal either way, key padding) each row
// has a bound `end`: keys j < end are visible. Full key tiles test j < end.
// DEFECT: the tail tile (the one holding key Tk − 1) was written with its own
// bound test, and it reads j <= end — so when a row's bound falls inside the
// tail tile (end < Tk), key `end`, which is masked, is attended. Examples: key
// padding length 35 of Tk = 40 attends key 35; causal rows 31..38 of a 40×40
// problem each attend one future key. Dense and bias masks are tested per
// element and are unaffected. Expected fault: mask_leak.
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
          const bool tail = j0 + kTile >= p->kv_len;
          for (std::int64_t c = 0; c < cols; ++c) {
            load_row(p->k, b, g, j0 + c, dk, &k[c * dk]);
            load_row(p->v, b, g, j0 + c, dv, &v[c * dv]);
          }
          for (std::int64_t r = 0; r < rows; ++r) {
            const std::int64_t i = i0 + r, end = mask.key_end(b, i);
            float tile_max = kNegInf;
            for (std::int64_t c = 0; c < cols; ++c) {
              const std::int64_t j = j0 + c;
              bool seen = false;
              if (!mask.is_prefix()) {
                seen = mask.visible(b, h, i, j);
              } else if (tail) {
                seen = j <= end;  // the defect: should be j < end
              } else {
                seen = j < end;
              }
              float& z = s[r * kTile + c];
              z = seen ? p->scale * dot(&q[r * dk], &k[c * dk], dk) + mask.bias(b, h, i, j) : kNegInf;
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

const hr_kernel mask_tail_off_by_one = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "mask_tail_off_by_one",
    .description = "float32 tiled online softmax, 16x16 tiles, whose tail key tile tests j <= end",
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
