// headroom kernels — the one E4M3 attention loop behind the bundled 8-bit
// float kernels and their flawed specimens, configured per kernel.
//
// Method (the FP8 forward of FlashAttention-3, Shah et al. 2024, §3.3, emulated
// on the CPU; our own code): Q, K, V arrive as E4M3 codes with float32 scales
// (per tensor, per head or per block of tokens; kernel_abi.h). A score is the
// float32 dot product of the decoded codes — each product of two E4M3 values
// is exact in float32 (4 + 4 significant bits) — times s·sq·sk, plus the bias.
// Softmax runs in float32. The probabilities are rounded to E4M3 before P·V,
// after multiplying by p_scale and divided by it after (kernel_abi.h p_quant,
// p_scale); V is decoded times its scale; P·V and the normaliser accumulate in
// float32 and the row is divided once at the end.
// Two ways to form the rounded weights:
//   online      key tiles of 64 with a running maximum m: the weights rounded
//               are P̃_j = exp(z_j − m) ≤ 1 (FlashAttention's unnormalised
//               probabilities), the normaliser sums the unrounded P̃_j.
//   normalised  a first pass finds m and ℓ = Σ exp(z_j − m); the weights
//               rounded are p_j = exp(z_j − m)/ℓ, Σ p_j = 1, and no division
//               remains at the end.
// Error: rounding each weight costs ≤ 2^-4 of it in E4M3's normal range and
// ≤ 2^-10/p_scale below it; summing the unrounded normaliser adds nothing
// more, so |o − o*| ≤ 2^-4·Σ_j p_j|v_j| plus Tk·2^-10/p_scale·max|v| for
// weights in the subnormal range (budgets/bundled.toml).
#pragma once

#include <cstdint>
#include <vector>

#include "common.h"
#include "headroom/fp8.h"

namespace hr_kernels {

struct Fp8Config {
  bool normalised = false;      ///< weights rounded after normalising (else online P̃ tiles)
  float p_scale = 448.0f;       ///< the declared p_scale
  bool saturating = true;       ///< the conversion of the weights saturates
  // Defects of the flawed specimens, one each; all false in a sound kernel.
  bool p_scale_forgotten = false;   ///< the weights are rounded without p_scale
  bool k_scale_next_token = false;  ///< K's scale looked up for token j + 1
};

/// Returns: the scale index of (b, h, t) on tensor `t` declared with
/// granularity g and block `blk` (kernel_abi.h, hr_granularity).
inline std::int64_t fp8_scale_index(const hr_tensor& t, std::int32_t g, std::int32_t blk, std::int64_t b,
                                    std::int64_t h, std::int64_t tok) {
  switch (g) {
    case HR_QUANT_PER_HEAD: return h;
    case HR_QUANT_PER_TOKEN: return (b * t.extents[1] + h) * t.extents[2] + tok;
    case HR_QUANT_PER_BLOCK: {
      const std::int64_t blocks = (t.extents[2] + blk - 1) / blk;
      return (b * t.extents[1] + h) * blocks + tok / blk;
    }
    default: return 0;
  }
}

/// Returns: weight w as the P·V product sees it under configuration c:
/// w·p_scale rounded to E4M3 (saturating as c says), divided back.
float fp8_rounded_weight(float w, const Fp8Config& c);

/// Returns: HR_OK after writing O (and log-sum-exp) of `p` for a kernel
/// declared `k` with configuration `c`; HR_UNSUPPORTED for formats or
/// granularities it does not handle (per-channel scales).
std::int32_t run_fp8_attention(const hr_core_problem* p, const hr_kernel& k, const Fp8Config& c);

}  // namespace hr_kernels
