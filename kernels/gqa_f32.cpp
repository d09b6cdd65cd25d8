// headroom kernels — gqa_f32: grouped-query attention that shares each K/V head explicitly.
//
// Method: with Hq = G·Hkv (Ainslie et al. 2023, "GQA"), the G query heads of a
// group all read K/V head g. The kernel walks a group, not a head: for query
// row i it loads each key and value row of head g once and feeds it to all G
// query heads, each keeping its own single-pass online softmax state
// (Milakov & Gimelshein 2018, alg. 3: running maximum m, normaliser l,
// accumulator acc, rescaled by exp(m − z) when a larger score z arrives).
// float32 throughout. Masks may differ per head (dense or bias with Hm = Hq),
// so visibility is tested per head; a K/V row no head of the group sees is not
// read at all. A fully masked row gets zeros and log-sum-exp −inf.
//
// Blocked summation (Higham 2002, §4.2; Blanchard, Higham & Mary 2020): each
// run of kBlock visible keys is summed on its own, then added to l and acc, as
// tiled kernels do with a tile's row sum. Adding every weight straight to l
// stagnates where one key dominates a long row: once l ≈ 1, weights below half
// its ulp (2^-24) round away, all in the same direction (measured: `headroom
// qualify --family attention_sink --shape 1,4,1,4,4096,64,64` failed on
// relative RMSE, 4.1e-5 against 3.0e-5, 4.2× over at Tk 16384).
#include <cmath>
#include <vector>

#include "common.h"
#include "score_features.h"
#include "kernel_list.h"

namespace hr_kernels {
namespace {

constexpr std::int64_t kBlock = 64;  // keys per block of the blocked sums

std::int32_t run(const hr_core_problem* p) {
  const MaskView mask(*p);
  const ScoreFeatures score(*p);
  if (!formats_are(*p, HR_FORMAT_FLOAT32, HR_FORMAT_FLOAT32) || !mask.known()) return HR_UNSUPPORTED;
  const std::int64_t group = p->q_heads / p->kv_heads, dk = p->key_dim, dv = p->value_dim;
  std::vector<float> q(group * dk), k(dk), v(dv), m(group), l(group), acc(group * dv);
  std::vector<float> part_l(group), part_acc(group * dv);  // the current block's sums, at the running max
  std::vector<std::int64_t> in_block(group);
  std::vector<unsigned char> sees(group);
  const auto fold_block = [&](std::int64_t r) {
    l[r] += part_l[r];
    for (std::int64_t d = 0; d < dv; ++d) acc[r * dv + d] += part_acc[r * dv + d], part_acc[r * dv + d] = 0.0f;
    part_l[r] = 0.0f;
    in_block[r] = 0;
  };
  for (std::int64_t b = 0; b < p->batch; ++b) {
    for (std::int64_t g = 0; g < p->kv_heads; ++g) {
      const std::int64_t h0 = g * group;  // the group's first query head
      for (std::int64_t i = 0; i < p->q_len; ++i) {
        for (std::int64_t r = 0; r < group; ++r) load_row(p->q, b, h0 + r, i, dk, &q[r * dk]);
        std::fill(m.begin(), m.end(), kNegInf);
        std::fill(l.begin(), l.end(), 0.0f);
        std::fill(acc.begin(), acc.end(), 0.0f);
        std::fill(part_l.begin(), part_l.end(), 0.0f);
        std::fill(part_acc.begin(), part_acc.end(), 0.0f);
        std::fill(in_block.begin(), in_block.end(), 0);
        for (std::int64_t j = 0; j < p->kv_len; ++j) {
          bool any = false;
          for (std::int64_t r = 0; r < group; ++r) any |= (sees[r] = mask.visible(b, h0 + r, i, j)) != 0;
          if (!any) continue;
          load_row(p->k, b, g, j, dk, k.data());  // once for the whole group
          load_row(p->v, b, g, j, dv, v.data());
          for (std::int64_t r = 0; r < group; ++r) {
            if (!sees[r]) continue;
            const float z = score.cap(p->scale * dot(&q[r * dk], k.data(), dk)) + mask.bias(b, h0 + r, i, j);
            float* a = &acc[r * dv];
            float* ap = &part_acc[r * dv];
            if (z > m[r]) {  // a new leader: fold the block in, rescale, the leader joins the totals
              const float alpha = std::exp(m[r] - z);  // 0 for the first visible key
              l[r] = (l[r] + part_l[r]) * alpha + 1.0f;
              for (std::int64_t d = 0; d < dv; ++d) a[d] = (a[d] + ap[d]) * alpha + v[d], ap[d] = 0.0f;
              part_l[r] = 0.0f;
              m[r] = z;
            } else {
              const float e = std::exp(z - m[r]);
              if (e == 0.0f) continue;
              part_l[r] += e;
              for (std::int64_t d = 0; d < dv; ++d) ap[d] += e * v[d];
            }
            if (++in_block[r] == kBlock) fold_block(r);
          }
        }
        for (std::int64_t r = 0; r < group; ++r) {
          fold_block(r);
          if (!(m[r] > kNegInf)) {
            write_masked_row(*p, b, h0 + r, i);
          } else {
            const float alpha = score.fold_sink(h0 + r, m[r], l[r]);
            for (std::int64_t d = 0; d < dv; ++d) acc[r * dv + d] *= alpha;
            write_row(*p, b, h0 + r, i, &acc[r * dv], m[r], l[r]);
          }
        }
      }
    }
  }
  return HR_OK;
}

}  // namespace

const hr_kernel gqa_f32 = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "gqa_f32",
    .description = "float32 grouped-query attention: each K/V row loaded once per query-head group, online softmax",
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
    // MaskView(*p) applies the sliding window, ScoreFeatures the soft cap and sinks
    .features = HR_FEATURE_WINDOW | HR_FEATURE_SOFTCAP | HR_FEATURE_SINKS,
};

}  // namespace hr_kernels
