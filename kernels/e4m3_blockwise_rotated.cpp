// headroom kernels — e4m3_blockwise_rotated: float32 Q, K, V quantised inside
// the kernel to E4M3 with one scale per block of 64 tokens, Q and K rotated
// first (incoherent processing); normalised P to E4M3 as e4m3_blockwise.
//
// FlashAttention-3's FP8 path with block quantisation and incoherent
// processing (Shah et al. 2024, §3.3; Table 3's most accurate FP8 row),
// emulated on the CPU, our own code:
//   1. Q and K rows are rotated by the same fixed orthogonal R = H·S/√n
//      (hadamard_rotation.h; zero padding to a power of two n ≥ Dk), so
//      (Rq)·(Rk) = q·k and one outlier channel is spread over all n.
//   2. Rotated Q, rotated K and V are quantised to E4M3, round to nearest,
//      with one amax scale per block of 64 tokens (the smallest float32 s
//      with 448·s ≥ max|x|, the rule headroom's own quantiser uses, so no
//      code overflows). Q's blocks are 64 query rows. A K or V block's scale
//      is taken over the keys the query row SEES in that block: a masked key
//      never reaches the output, not even through a neighbour's scale (a
//      kernel quantising K once per block lets a masked key's magnitude set
//      its visible neighbours' steps, which the mask-leak probe would rightly
//      report). Without a mask this is plain per-block quantisation.
//   3. Scores, softmax, P rounding (normalised p_j × 480 to E4M3, saturating)
//      and P·V as in fp8_attention.h's normalised path.
// What is judged: the kernel receives float32 (its declared input format) and
// rotates and quantises internally, so the reference is the exact attention
// of those float32 inputs, unrotated and unquantised, and every error the
// 8-bit path makes — Q, K and V rounding included — counts as the kernel's
// own (budgets/bundled.toml derives its limit; docs/budget-format.md).
#include <algorithm>
#include <cmath>
#include <limits>
#include <vector>

#include "common.h"
#include "fp8_attention.h"
#include "hadamard_rotation.h"
#include "headroom/fp8.h"
#include "kernel_list.h"

namespace hr_kernels {
namespace {

using headroom::Fp8Kind;

constexpr std::int64_t kBlock = 64;
constexpr float kPScale = 480.0f;  // as e4m3_blockwise: one top-binade step above 448

// The smallest float32 s with 448·s ≥ amax (1 for an all-zero group), as the
// harness's quantiser (harness/formats/fp8_quant.cpp) picks it.
float amax_scale(double amax) {
  if (!(amax > 0.0)) return 1.0f;
  float s = static_cast<float>(amax / headroom::kE4m3Max);
  if (s == 0.0f) s = std::numeric_limits<float>::denorm_min();
  while (static_cast<double>(s) * headroom::kE4m3Max < amax) s = std::nextafter(s, std::numeric_limits<float>::infinity());
  return s;
}

// The E4M3 value (without its scale) nearest to x / s: exact in float32.
float code_value(double x, float s) {
  return headroom::fp8_to_float(headroom::double_to_fp8(x / static_cast<double>(s), Fp8Kind::e4m3, true), Fp8Kind::e4m3);
}

// P rounding as e4m3_blockwise: normalised weights ×480 to E4M3, saturating (fp8_attention.h).
const Fp8Config kPRounding{true, kPScale, true};

// The rows of one key/value head, rotated (K) or not (V), with each row's
// largest magnitude and, per block, the codes under the scale last used.
struct QuantisedRows {
  std::int64_t len = 0, width = 0;
  std::vector<double> x;      // [len × width] the values to quantise
  std::vector<double> amax;   // [len] max |x| of each row
  std::vector<float> code;    // [len × width] E4M3 values under scale[block]
  std::vector<float> scale;   // [blocks]; 0 = not quantised yet

  void reset(std::int64_t l, std::int64_t w) {
    len = l, width = w;
    x.assign(static_cast<std::size_t>(l * w), 0.0);
    amax.assign(static_cast<std::size_t>(l), 0.0);
    code.assign(static_cast<std::size_t>(l * w), 0.0f);
    scale.assign(static_cast<std::size_t>((l + kBlock - 1) / kBlock), 0.0f);
  }
  void finish_row(std::int64_t j) {
    double a = 0.0;
    for (std::int64_t d = 0; d < width; ++d) a = std::max(a, std::abs(x[static_cast<std::size_t>(j * width + d)]));
    amax[static_cast<std::size_t>(j)] = a;
  }
  // Returns: the scale of block `blk` over the visible rows, its codes made current.
  float use(std::int64_t blk, const std::vector<char>& visible) {
    const std::int64_t j0 = blk * kBlock, j1 = std::min(j0 + kBlock, len);
    double a = 0.0;
    for (std::int64_t j = j0; j < j1; ++j)
      if (visible[static_cast<std::size_t>(j)]) a = std::max(a, amax[static_cast<std::size_t>(j)]);
    const float s = amax_scale(a);
    if (scale[static_cast<std::size_t>(blk)] != s) {
      for (std::int64_t e = j0 * width; e < j1 * width; ++e)
        code[static_cast<std::size_t>(e)] = code_value(x[static_cast<std::size_t>(e)], s);
      scale[static_cast<std::size_t>(blk)] = s;
    }
    return s;
  }
};

std::int32_t run(const hr_core_problem* p) {
  const MaskView mask(*p);
  if (!formats_are(*p, HR_FORMAT_FLOAT32, HR_FORMAT_FLOAT32) || !mask.known() || p->features != 0) return HR_UNSUPPORTED;
  const std::int64_t n = rotated_dim(p->key_dim), dv = p->value_dim, tq = p->q_len, tk = p->kv_len;
  const std::int64_t q_blocks = (tq + kBlock - 1) / kBlock, k_blocks = (tk + kBlock - 1) / kBlock;
  std::vector<float> row(static_cast<std::size_t>(std::max(p->key_dim, dv)));
  std::vector<double> rotated(static_cast<std::size_t>(n));
  std::vector<float> qc(static_cast<std::size_t>(tq * n)), sq(static_cast<std::size_t>(q_blocks));
  std::vector<float> z(static_cast<std::size_t>(tk)), sk(static_cast<std::size_t>(k_blocks)),
      sv(static_cast<std::size_t>(k_blocks)), acc(static_cast<std::size_t>(dv));
  std::vector<char> visible(static_cast<std::size_t>(tk));
  QuantisedRows keys, values, queries;
  for (std::int64_t b = 0; b < p->batch; ++b) {
    for (std::int64_t g = 0; g < p->kv_heads; ++g) {
      keys.reset(tk, n);
      values.reset(tk, dv);
      for (std::int64_t j = 0; j < tk; ++j) {
        load_row(p->k, b, g, j, p->key_dim, row.data());
        rotate_row(row.data(), p->key_dim, keys.x.data() + j * n);
        keys.finish_row(j);
        load_row(p->v, b, g, j, dv, row.data());
        for (std::int64_t d = 0; d < dv; ++d) values.x[static_cast<std::size_t>(j * dv + d)] = row[static_cast<std::size_t>(d)];
        values.finish_row(j);
      }
      for (std::int64_t h = 0; h < p->q_heads; ++h) {
        if (kv_head(h, p->q_heads, p->kv_heads) != g) continue;
        // Q: rotated, one scale per block of 64 query rows (Q is never masked).
        queries.reset(tq, n);
        for (std::int64_t i = 0; i < tq; ++i) {
          load_row(p->q, b, h, i, p->key_dim, row.data());
          rotate_row(row.data(), p->key_dim, queries.x.data() + i * n);
          queries.finish_row(i);
        }
        const std::vector<char> all_rows(static_cast<std::size_t>(tq), 1);
        for (std::int64_t blk = 0; blk < q_blocks; ++blk) sq[static_cast<std::size_t>(blk)] = queries.use(blk, all_rows);
        for (std::int64_t i = 0; i < tq; ++i) {
          bool any = false;
          for (std::int64_t j = 0; j < tk; ++j) any |= (visible[static_cast<std::size_t>(j)] = mask.visible(b, h, i, j) ? 1 : 0);
          if (!any) {
            write_masked_row(*p, b, h, i);
            continue;
          }
          for (std::int64_t blk = 0; blk < k_blocks; ++blk) {
            sk[static_cast<std::size_t>(blk)] = keys.use(blk, visible);
            sv[static_cast<std::size_t>(blk)] = values.use(blk, visible);
          }
          const float* q = queries.code.data() + i * n;
          const float q_scale = sq[static_cast<std::size_t>(i / kBlock)];
          float m = kNegInf;
          for (std::int64_t j = 0; j < tk; ++j) {
            z[static_cast<std::size_t>(j)] = kNegInf;
            if (!visible[static_cast<std::size_t>(j)]) continue;
            const float dot_qk = dot(q, keys.code.data() + j * n, n);  // each product exact (4 + 4 bits)
            const float zj = p->scale * q_scale * sk[static_cast<std::size_t>(j / kBlock)] * dot_qk + mask.bias(b, h, i, j);
            z[static_cast<std::size_t>(j)] = zj;
            m = std::max(m, zj);
          }
          float l = 0.0f;
          for (std::int64_t j = 0; j < tk; ++j) l += std::exp(z[static_cast<std::size_t>(j)] - m);
          std::fill(acc.begin(), acc.end(), 0.0f);
          for (std::int64_t j = 0; j < tk; ++j) {
            const float w = fp8_rounded_weight(std::exp(z[static_cast<std::size_t>(j)] - m) / l, kPRounding);
            if (w == 0.0f) continue;  // masked and flushed keys: V is not read
            const float s = sv[static_cast<std::size_t>(j / kBlock)];
            const float* v = values.code.data() + j * dv;
            for (std::int64_t d = 0; d < dv; ++d) acc[static_cast<std::size_t>(d)] += w * (v[d] * s);
          }
          write_row(*p, b, h, i, acc.data(), m, 1.0f);
          if (float* out = lse_at(*p, b, h, i)) *out = m + std::log(l);
        }
      }
    }
  }
  return HR_OK;
}

}  // namespace

const hr_kernel e4m3_blockwise_rotated = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "e4m3_blockwise_rotated",
    .description = "float32 in; Q, K rotated (Hadamard x random signs), Q/K/V to E4M3 per 64-token block inside the "
                   "kernel, float32 scores and softmax, normalised P to E4M3 (x480, saturating), float32 PV",
    .level = HR_LEVEL_CORE,
    .input_format = HR_FORMAT_FLOAT32,
    .output_format = HR_FORMAT_FLOAT32,
    .mask_kinds = kAllMasks,
    .masked_row = HR_MASKED_ROW_ZEROS,
    .returns_lse = 1,
    .layouts = kStridedLayouts,
    .max_kv_len = 0,
    .run_core = run,
    .run_block = nullptr,
    .fp8_saturating = 1,
    .p_quant = HR_PQUANT_E4M3,
    .p_scale = kPScale,
};

}  // namespace hr_kernels
