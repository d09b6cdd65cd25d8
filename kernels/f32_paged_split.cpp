// headroom kernels — f32_paged_split: float32 decode attention over a paged
// K/V cache, split along the keys, with each split's partial result written.
//
// Method (the split-KV "flash decoding" scheme: each split reduced on its own,
// then merged by log-sum-exp): per query row and split s, materialise the
// scores of the split's visible keys, take their maximum m_s, l_s = Σ e^{z−m_s}
// and acc_s = Σ e^{z−m_s} v in key order, all in float32; the row's output is
// Σ_s e^{m_s−M} acc_s / Σ_s e^{m_s−M} l_s with M = max_s m_s, its log-sum-exp
// M + log Σ_s e^{m_s−M} l_s. Keys past a sequence's length (paged.seq_lens)
// are never read, nor pages outside its block table.
#include <algorithm>
#include <cmath>
#include <vector>

#include "common.h"
#include "kernel_list.h"
#include "paged_split.h"

namespace hr_kernels {
namespace {

// One K or V row of (b, g, j): from the dense tensor, or through the block table.
class KvRows {
 public:
  explicit KvRows(const hr_core_problem& p) : p_(p), paged_((p.features & HR_FEATURE_PAGED_KV) != 0) {}

  void key(std::int64_t b, std::int64_t g, std::int64_t j, float* out) const {
    row(p_.k, p_.paged.k_pages, b, g, j, p_.key_dim, out);
  }
  void value(std::int64_t b, std::int64_t g, std::int64_t j, float* out) const {
    row(p_.v, p_.paged.v_pages, b, g, j, p_.value_dim, out);
  }
  bool formats_ok() const {
    return !paged_ || (p_.paged.k_pages.format == HR_FORMAT_FLOAT32 && p_.paged.v_pages.format == HR_FORMAT_FLOAT32);
  }

 private:
  void row(const hr_tensor& dense, const hr_tensor& pages, std::int64_t b, std::int64_t g, std::int64_t j,
           std::int64_t n, float* out) const {
    if (!paged_) {
      load_row(dense, b, g, j, n, out);
      return;
    }
    const hr_paged_kv& pk = p_.paged;
    const std::int32_t page = pk.block_table[b * pk.max_pages_per_seq + j / pk.page_size];
    load_row(pages, page, j % pk.page_size, g, n, out);
  }

  const hr_core_problem& p_;
  bool paged_;
};

// One split of one row: its maximum, sum and numerator.
struct Split {
  float m = kNegInf, l = 0.0f;
  std::vector<float> acc;
};

}  // namespace

std::int32_t run_paged_split(const hr_core_problem* p, PagedSplitDefect defect) {
  const MaskView mask(*p);
  const KvRows kv(*p);
  if (!formats_are(*p, HR_FORMAT_FLOAT32, HR_FORMAT_FLOAT32) || !kv.formats_ok() || !mask.known())
    return HR_UNSUPPORTED;
  const bool partials = (p->features & HR_FEATURE_SPLIT_PARTIALS) != 0 && p->o_partials.data != nullptr;
  const std::int64_t splits = (p->kv_len + kSplitKvLen - 1) / kSplitKvLen;
  std::vector<float> q(p->key_dim), k(p->key_dim), v(p->value_dim), z(kSplitKvLen), out(p->value_dim);
  std::vector<Split> part(static_cast<std::size_t>(splits));
  for (Split& s : part) s.acc.resize(static_cast<std::size_t>(p->value_dim));
  for (std::int64_t b = 0; b < p->batch; ++b) {
    for (std::int64_t h = 0; h < p->q_heads; ++h) {
      const std::int64_t g = kv_head(h, p->q_heads, p->kv_heads);
      for (std::int64_t i = 0; i < p->q_len; ++i) {
        load_row(p->q, b, h, i, p->key_dim, q.data());
        const std::int64_t end = mask.key_end(b, i);
        float top = kNegInf;
        for (std::int64_t s = 0; s < splits; ++s) {
          Split& sp = part[static_cast<std::size_t>(s)];
          sp.m = kNegInf;
          sp.l = 0.0f;
          std::fill(sp.acc.begin(), sp.acc.end(), 0.0f);
          const std::int64_t lo = s * kSplitKvLen, hi = std::min(end, lo + kSplitKvLen);
          for (std::int64_t j = lo; j < hi; ++j) {
            float& zj = z[static_cast<std::size_t>(j - lo)];
            zj = kNegInf;
            if (!mask.visible(b, h, i, j)) continue;  // dense and bias masks hide single keys
            kv.key(b, g, j, k.data());
            zj = p->scale * dot(q.data(), k.data(), p->key_dim) + mask.bias(b, h, i, j);
            sp.m = std::max(sp.m, zj);
          }
          for (std::int64_t j = lo; j < hi && sp.m > kNegInf; ++j) {
            if (!(z[static_cast<std::size_t>(j - lo)] > kNegInf)) continue;  // masked: V row not read
            const float e = std::exp(z[static_cast<std::size_t>(j - lo)] - sp.m);
            sp.l += e;
            kv.value(b, g, j, v.data());
            for (std::int64_t d = 0; d < p->value_dim; ++d) sp.acc[static_cast<std::size_t>(d)] += e * v[static_cast<std::size_t>(d)];
          }
          top = std::max(top, sp.m);
          if (!partials) continue;
          const std::int64_t row = (b * p->q_heads + h);
          for (std::int64_t d = 0; d < p->value_dim; ++d)
            store(p->o_partials, s, row, i, d, sp.l > 0.0f ? sp.acc[static_cast<std::size_t>(d)] / sp.l : 0.0f);
          p->lse_partials[((s * p->batch + b) * p->q_heads + h) * p->q_len + i] =
              sp.l > 0.0f ? sp.m + std::log(sp.l) : kNegInf;
        }
        if (!(top > kNegInf)) {
          write_masked_row(*p, b, h, i);
          continue;
        }
        float l = 0.0f;
        std::fill(out.begin(), out.end(), 0.0f);
        if (defect == PagedSplitDefect::merge_unnormalised) {
          // The defect: Σ_s e^{lse_s − max lse} o_s, the weights never divided
          // by their sum (right only when one split holds every visible key).
          float top_lse = kNegInf;
          for (const Split& sp : part)
            if (sp.l > 0.0f) top_lse = std::max(top_lse, sp.m + std::log(sp.l));
          for (const Split& sp : part) {
            if (!(sp.l > 0.0f)) continue;
            const float w = std::exp(sp.m + std::log(sp.l) - top_lse);
            l += w;
            for (std::size_t d = 0; d < out.size(); ++d) out[d] += w * (sp.acc[d] / sp.l);
          }
          for (std::int64_t d = 0; d < p->value_dim; ++d) store(p->o, b, h, i, d, out[static_cast<std::size_t>(d)]);
          if (float* lse = lse_at(*p, b, h, i)) *lse = top_lse + std::log(l);
          continue;
        }
        for (const Split& sp : part) {
          if (!(sp.l > 0.0f)) continue;
          const float w = std::exp(sp.m - top);
          l += w * sp.l;
          for (std::size_t d = 0; d < out.size(); ++d) out[d] += w * sp.acc[d];
        }
        write_row(*p, b, h, i, out.data(), top, l);
      }
    }
  }
  return HR_OK;
}

namespace {

std::int32_t run(const hr_core_problem* p) { return run_paged_split(p, PagedSplitDefect::none); }

}  // namespace

const hr_kernel f32_paged_split = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "f32_paged_split",
    .description = "float32 decode attention over paged K/V, 32-key splits merged by log-sum-exp, partials written",
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
    .features = HR_FEATURE_PAGED_KV | HR_FEATURE_SPLIT_PARTIALS,
    .split_kv_len = kSplitKvLen,
};

}  // namespace hr_kernels
