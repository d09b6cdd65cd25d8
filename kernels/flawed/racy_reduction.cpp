// headroom flawed specimen — racy_reduction: PV partial sums combined in thread completion order.
//
// Method: float32, all masks, zeros on fully masked rows. 4 std::threads,
// released together by a latch, walk all query rows in the same order. For
// each row every thread computes the row's scores, maximum m and normaliser l
// itself, in key order (so these agree bit for bit across threads), then takes
// its share of PV: key chunks t, t + 4, t + 8, ... of 8 keys. It forms each
// chunk's partial Σ_j (exp(z_j − m) / l)·v_j locally and adds it into the
// row's shared float32 accumulators with an atomic add. Thread 0 writes lse.
// DEFECT: the atomic adds land in whatever order the threads reach them, and
// float32 addition is not associative, so with three or more chunks per row
// (Tk > 16) the last bits of the output depend on thread timing. Each run is
// as accurate as the textbook kernel; only repeatability is lost. How often
// two runs differ depends on how much the threads overlap: measured on a
// loaded 2-core machine, nearly always for 8 heads × 64 × 64 × 64, less often
// for a single small head. Expected fault: nondeterministic.
#include <atomic>
#include <cmath>
#include <latch>
#include <thread>
#include <vector>

#include "../common.h"
#include "../kernel_list.h"

namespace hr_kernels {
namespace {

constexpr std::int64_t kThreads = 4;
constexpr std::int64_t kChunk = 8;

std::int32_t run(const hr_core_problem* p) {
  const MaskView mask(p->mask, p->q_len, p->kv_len);
  if (!formats_are(*p, HR_FORMAT_FLOAT32, HR_FORMAT_FLOAT32) || !mask.known()) return HR_UNSUPPORTED;
  const std::int64_t tk = p->kv_len, dk = p->key_dim, dv = p->value_dim;
  std::vector<float> acc(p->batch * p->q_heads * p->q_len * dv, 0.0f);  // shared, row-major [B, Hq, Tq, Dv]
  std::latch start(kThreads);
  auto worker = [&](std::int64_t t) {
    std::vector<float> q(dk), k(dk), v(dv), z(tk), part(dv);
    start.arrive_and_wait();
    for (std::int64_t b = 0; b < p->batch; ++b) {
      for (std::int64_t h = 0; h < p->q_heads; ++h) {
        const std::int64_t g = kv_head(h, p->q_heads, p->kv_heads);
        for (std::int64_t i = 0; i < p->q_len; ++i) {
          load_row(p->q, b, h, i, dk, q.data());
          float m = kNegInf;
          for (std::int64_t j = 0; j < tk; ++j) {
            z[j] = kNegInf;
            if (!mask.visible(b, h, i, j)) continue;
            load_row(p->k, b, g, j, dk, k.data());
            z[j] = p->scale * dot(q.data(), k.data(), dk) + mask.bias(b, h, i, j);
            m = std::max(m, z[j]);
          }
          if (!(m > kNegInf)) continue;  // fully masked: written below
          float l = 0.0f;
          for (std::int64_t j = 0; j < tk; ++j) l += std::exp(z[j] - m);
          if (t == 0) {
            if (float* out = lse_at(*p, b, h, i)) *out = m + std::log(l);
          }
          float* row = &acc[((b * p->q_heads + h) * p->q_len + i) * dv];
          for (std::int64_t j0 = t * kChunk; j0 < tk; j0 += kThreads * kChunk) {
            std::fill(part.begin(), part.end(), 0.0f);
            bool used = false;
            for (std::int64_t j = j0; j < std::min(j0 + kChunk, tk); ++j) {
              const float w = std::exp(z[j] - m) / l;
              if (w == 0.0f) continue;  // masked (or underflowed): V row not read
              load_row(p->v, b, g, j, dv, v.data());
              for (std::int64_t d = 0; d < dv; ++d) part[d] += w * v[d];
              used = true;
            }
            if (!used) continue;
            for (std::int64_t d = 0; d < dv; ++d) {
              std::atomic_ref<float>(row[d]).fetch_add(part[d]);  // the defect: order = timing
            }
          }
        }
      }
    }
  };
  {
    std::vector<std::jthread> pool;
    for (std::int64_t t = 0; t < kThreads; ++t) pool.emplace_back(worker, t);
  }  // joined here
  for (std::int64_t b = 0; b < p->batch; ++b) {
    for (std::int64_t h = 0; h < p->q_heads; ++h) {
      for (std::int64_t i = 0; i < p->q_len; ++i) {
        bool any = false;
        for (std::int64_t j = 0; j < p->kv_len && !any; ++j) any = mask.visible(b, h, i, j);
        if (!any) {
          write_masked_row(*p, b, h, i);
          continue;
        }
        const float* row = &acc[((b * p->q_heads + h) * p->q_len + i) * dv];
        for (std::int64_t d = 0; d < dv; ++d) store(p->o, b, h, i, d, row[d]);
      }
    }
  }
  return HR_OK;
}

}  // namespace

const hr_kernel racy_reduction = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "racy_reduction",
    .description = "float32 attention whose PV chunk sums are combined by 4 threads with atomic adds",
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
