// headroom kernels — f32_backward_tiled and f16_backward_f32acc: the attention
// backward pass, tiled over keys, recomputing P from the log-sum-exp.
//
// Method: Dao et al. 2022 (FlashAttention, Alg. 4) and Dao 2023
// (FlashAttention-2, Alg. 2): for each (batch, kv head), key tiles of 64; for
// every query row of every head of the group that sees a key of the tile,
// P_ij = exp(s·q_i·k_j + bias_ij − lse_i) recomputed from the given lse,
// dV_j += P_ij dO_i, dP_ij = dO_i·V_j, dS_ij = P_ij (dP_ij − D_i) with
// D_i = Σ_d dO_id O_id from the given O, dQ_i += s·dS_ij K_j and
// dK_j += s·dS_ij Q_i. All arithmetic in float32; grouped-query dK and dV sum
// over the group's heads. Keys no query sees keep dK = dV = 0; fully masked
// rows (lse −inf) give dQ = 0. f32_backward_tiled declares
// HR_BACKWARD_BIAS_GRAD: under a bias mask d(bias) = dS, the heads' dS added
// in float32 when they share one bias. The forward entry is f32_tiled_64's.
// f16_backward_f32acc takes binary16 Q, K, V, O, dO and writes binary16
// gradients, accumulating in float32 (one rounding per output element).
//
// The flawed backward specimens (kernel_list.h) are this code with one defect
// each, chosen by the Defect parameter; docs/backward.md lists which fault
// class catches which.
#include <atomic>
#include <cmath>
#include <latch>
#include <thread>
#include <vector>

#include "common.h"
#include "kernel_list.h"

namespace hr_kernels {
namespace {

constexpr std::int64_t kTile = 64;

enum class Defect {
  none,
  d_dropped,         ///< dS = P ∘ dP: the D_i term left out
  no_scale,          ///< dQ = dS K without the factor s
  group_not_summed,  ///< GQA: dK, dV of a kv head hold only its last query head's share
  p_from_row_max,    ///< P = exp(z − max_j z) instead of exp(z − lse): unnormalised
  racy_dk,           ///< dK added by 4 threads with atomic float adds: bits follow thread timing
  masked_keys,       ///< the dK, dV loop ignores the mask: keys no query sees get gradients
};

// Adds s·dS_ij·Q_i to dK_j with 4 threads taking the rows round robin, each
// with atomic float adds: the order of the additions, hence the rounded sums,
// follow the threads' timing (the racy_dk specimen), as in flawed/racy_reduction.cpp.
void racy_dk_pass(const hr_backward_problem* bp, std::int64_t b, std::int64_t g, const float* ds_all,
                  std::vector<float>& dk_acc) {
  const hr_core_problem& p = bp->forward;
  const std::int64_t dk = p.key_dim, group = p.q_heads / p.kv_heads;
  std::vector<std::atomic<float>> acc(dk_acc.size());
  for (auto& a : acc) a.store(0.0f);
  std::latch start(4);  // released together, so the threads overlap as much as they can
  auto work = [&](int t) {
    std::vector<float> q(dk);
    start.arrive_and_wait();
    for (std::int64_t r = t; r < group * p.q_len; r += 4) {
      const std::int64_t h = g * group + r / p.q_len, i = r % p.q_len;
      load_row(p.q, b, h, i, dk, q.data());
      for (std::int64_t j = 0; j < p.kv_len; ++j) {
        const float ds = ds_all[r * p.kv_len + j];
        if (ds == 0.0f) continue;
        for (std::int64_t d = 0; d < dk; ++d) acc[j * dk + d].fetch_add(p.scale * ds * q[d]);
      }
    }
  };
  std::vector<std::thread> pool;
  for (int t = 0; t < 4; ++t) pool.emplace_back(work, t);
  for (auto& th : pool) th.join();
  for (std::size_t e = 0; e < acc.size(); ++e) dk_acc[e] = acc[e].load();
}

template <std::int32_t kFormat, Defect kDefect = Defect::none>
std::int32_t run_backward(const hr_backward_problem* bp) {
  const hr_core_problem& p = bp->forward;
  const MaskView mask(p.mask, p.q_len, p.kv_len);
  if (p.q.format != kFormat || p.k.format != kFormat || p.v.format != kFormat || bp->o.format != kFormat ||
      bp->d_o.format != kFormat || bp->d_q.format != kFormat || !mask.known())
    return HR_UNSUPPORTED;
  const std::int64_t dk = p.key_dim, dv = p.value_dim, group = p.q_heads / p.kv_heads;
  std::vector<float> q(dk), d_o(dv), k(kTile * dk), v(kTile * dv), dk_acc(p.kv_len * dk), dv_acc(p.kv_len * dv);
  std::vector<float> dq_acc(p.q_len * dk), delta(p.q_len), o(dv);
  // d(bias) [B, Hm, Tq, Tk], contiguous, when asked for: zero where no key is seen.
  float* const d_bias = bp->d_bias;
  const std::int64_t bias_heads = d_bias != nullptr ? p.mask.extents[1] : 0;
  if (d_bias != nullptr) std::fill(d_bias, d_bias + p.batch * bias_heads * p.q_len * p.kv_len, 0.0f);
  for (std::int64_t b = 0; b < p.batch; ++b) {
    for (std::int64_t g = 0; g < p.kv_heads; ++g) {
      std::fill(dk_acc.begin(), dk_acc.end(), 0.0f);
      std::fill(dv_acc.begin(), dv_acc.end(), 0.0f);
      std::vector<float> ds_all(kDefect == Defect::racy_dk ? group * p.q_len * p.kv_len : 0, 0.0f);
      for (std::int64_t h = g * group; h < (g + 1) * group; ++h) {
        if (kDefect == Defect::group_not_summed) {
          std::fill(dk_acc.begin(), dk_acc.end(), 0.0f);
          std::fill(dv_acc.begin(), dv_acc.end(), 0.0f);
        }
        std::fill(dq_acc.begin(), dq_acc.end(), 0.0f);
        for (std::int64_t i = 0; i < p.q_len; ++i) {
          load_row(bp->o, b, h, i, dv, o.data());
          load_row(bp->d_o, b, h, i, dv, d_o.data());
          delta[i] = dot(d_o.data(), o.data(), dv);
        }
        for (std::int64_t j0 = 0; j0 < p.kv_len; j0 += kTile) {
          const std::int64_t cols = std::min(kTile, p.kv_len - j0);
          for (std::int64_t c = 0; c < cols; ++c) {
            load_row(p.k, b, g, j0 + c, dk, &k[c * dk]);
            load_row(p.v, b, g, j0 + c, dv, &v[c * dv]);
          }
          for (std::int64_t i = 0; i < p.q_len; ++i) {
            float lse = bp->lse[(b * p.q_heads + h) * p.q_len + i];
            if (!(lse > kNegInf)) continue;  // fully masked row: no gradient flows
            load_row(p.q, b, h, i, dk, q.data());
            load_row(bp->d_o, b, h, i, dv, d_o.data());
            if (kDefect == Defect::p_from_row_max) {
              lse = kNegInf;  // the row's largest score stands in for the log-sum-exp
              for (std::int64_t j = 0; j < p.kv_len; ++j) {
                if (!mask.visible(b, h, i, j)) continue;
                std::vector<float> kj(dk);
                load_row(p.k, b, g, j, dk, kj.data());
                lse = std::max(lse, p.scale * dot(q.data(), kj.data(), dk) + mask.bias(b, h, i, j));
              }
            }
            for (std::int64_t c = 0; c < cols; ++c) {
              const std::int64_t j = j0 + c;
              const bool seen = mask.visible(b, h, i, j);
              if (!seen && kDefect != Defect::masked_keys) continue;
              const float bias = seen ? mask.bias(b, h, i, j) : 0.0f;
              const float pr = std::exp(p.scale * dot(q.data(), &k[c * dk], dk) + bias - lse);
              const float dp = dot(d_o.data(), &v[c * dv], dv);
              const float ds = kDefect == Defect::d_dropped ? pr * dp : pr * (dp - delta[i]);
              for (std::int64_t d = 0; d < dv; ++d) dv_acc[j * dv + d] += pr * d_o[d];
              if (kDefect == Defect::racy_dk) ds_all[((h - g * group) * p.q_len + i) * p.kv_len + j] = ds;
              if (!seen) {  // masked_keys: the mask is forgotten for dK and dV only
                for (std::int64_t d = 0; d < dk; ++d) dk_acc[j * dk + d] += p.scale * ds * q[d];
                continue;
              }
              if (d_bias != nullptr) d_bias[((b * bias_heads + (bias_heads == 1 ? 0 : h)) * p.q_len + i) * p.kv_len + j] += ds;
              const float sq = kDefect == Defect::no_scale ? 1.0f : p.scale;
              for (std::int64_t d = 0; d < dk; ++d) {
                dq_acc[i * dk + d] += sq * ds * k[c * dk + d];
                if (kDefect != Defect::racy_dk) dk_acc[j * dk + d] += p.scale * ds * q[d];
              }
            }
          }
        }
        for (std::int64_t i = 0; i < p.q_len; ++i)
          for (std::int64_t d = 0; d < dk; ++d) store(bp->d_q, b, h, i, d, dq_acc[i * dk + d]);
      }
      if (kDefect == Defect::racy_dk) racy_dk_pass(bp, b, g, ds_all.data(), dk_acc);
      for (std::int64_t j = 0; j < p.kv_len; ++j) {
        for (std::int64_t d = 0; d < dk; ++d) store(bp->d_k, b, g, j, d, dk_acc[j * dk + d]);
        for (std::int64_t d = 0; d < dv; ++d) store(bp->d_v, b, g, j, d, dv_acc[j * dv + d]);
      }
    }
  }
  return HR_OK;
}

// The forward of both: f32_tiled_64's, and for binary16 f16_f32acc's.
std::int32_t forward_f32(const hr_core_problem* p) { return f32_tiled_64.run_core(p); }
std::int32_t forward_f16(const hr_core_problem* p) { return f16_f32acc.run_core(p); }

constexpr hr_kernel declare(const char* name, const char* description, std::int32_t format,
                            std::int32_t (*forward)(const hr_core_problem*),
                            std::int32_t (*backward)(const hr_backward_problem*), std::uint32_t flags = 0) {
  return {
      .abi_version = HEADROOM_ABI_VERSION,
      .name = name,
      .description = description,
      .level = HR_LEVEL_CORE,
      .input_format = format,
      .output_format = format,
      .q_quant = {},
      .k_quant = {},
      .v_quant = {},
      .mask_kinds = kAllMasks,
      .masked_row = HR_MASKED_ROW_ZEROS,
      .returns_lse = 1,
      .layouts = kStridedLayouts,
      .max_kv_len = 0,
      .run_core = forward,
      .run_block = nullptr,
      .key_dims = nullptr,
      .value_dims = nullptr,
      .head_dim_multiple = 0,
      .kv_len_multiple = 0,
      .max_q_len = 0,
      .max_batch = 0,
      .q_block = 0,
      .k_block = 0,
      .v_block = 0,
      .fp8_saturating = 0,
      .p_quant = 0,
      .p_scale = 0.0f,
      .features = 0,
      .split_kv_len = 0,
      .run_backward = backward,
      .backward_flags = flags,
  };
}

}  // namespace

const hr_kernel f32_backward_tiled =
    declare("f32_backward_tiled", "float32 backward, key tiles of 64, P recomputed from the log-sum-exp",
            HR_FORMAT_FLOAT32, forward_f32, run_backward<HR_FORMAT_FLOAT32>, HR_BACKWARD_BIAS_GRAD);
const hr_kernel f16_backward_f32acc =
    declare("f16_backward_f32acc", "binary16 storage backward with float32 accumulation, P from the log-sum-exp",
            HR_FORMAT_BINARY16, forward_f16, run_backward<HR_FORMAT_BINARY16>);

// Flawed backward specimens: one defect each (Defect above).
constexpr std::int32_t kF32 = HR_FORMAT_FLOAT32;
const hr_kernel backward_d_dropped = declare("backward_d_dropped", "float32 backward with the D_i term dropped", kF32,
                                             forward_f32, run_backward<kF32, Defect::d_dropped>);
const hr_kernel backward_no_scale = declare("backward_no_scale", "float32 backward whose dQ misses the scale s", kF32,
                                            forward_f32, run_backward<kF32, Defect::no_scale>);
const hr_kernel backward_group_not_summed =
    declare("backward_group_not_summed", "float32 backward keeping only the last query head's dK, dV share", kF32,
            forward_f32, run_backward<kF32, Defect::group_not_summed>);
const hr_kernel backward_p_from_row_max =
    declare("backward_p_from_row_max", "float32 backward recomputing P from the row maximum, not the lse", kF32,
            forward_f32, run_backward<kF32, Defect::p_from_row_max>);
const hr_kernel backward_racy_dk = declare("backward_racy_dk", "float32 backward adding dK with racing atomic adds",
                                           kF32, forward_f32, run_backward<kF32, Defect::racy_dk>);
const hr_kernel backward_masked_keys =
    declare("backward_masked_keys", "float32 backward whose dK, dV loop forgets the mask", kF32, forward_f32,
            run_backward<kF32, Defect::masked_keys>);

}  // namespace hr_kernels
