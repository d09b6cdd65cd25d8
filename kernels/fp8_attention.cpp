// headroom kernels — the E4M3 attention loop (fp8_attention.h).
#include "fp8_attention.h"

#include <cmath>

namespace hr_kernels {
namespace {

using headroom::Fp8Kind;

constexpr std::int64_t kTile = 64;

// The 256 E4M3 values, decoded once (fp8_to_float is exact, so the table
// gives the same bits; it spares a scalbn per element of every dot product).
struct E4m3Table {
  float value[256];
  E4m3Table() {
    for (int c = 0; c < 256; ++c) value[c] = headroom::fp8_to_float(static_cast<std::uint8_t>(c), Fp8Kind::e4m3);
  }
};

float decode(const hr_tensor& t, std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t d) {
  static const E4m3Table table;
  return table.value[static_cast<const std::uint8_t*>(t.data)[offset(t.strides, b, h, i, d)]];
}

}  // namespace

float fp8_rounded_weight(float w, const Fp8Config& c) {
  if (c.p_scale_forgotten) return headroom::fp8_to_float(headroom::float_to_fp8(w, Fp8Kind::e4m3, c.saturating), Fp8Kind::e4m3);
  const std::uint8_t code = headroom::float_to_fp8(w * c.p_scale, Fp8Kind::e4m3, c.saturating);
  return headroom::fp8_to_float(code, Fp8Kind::e4m3) / c.p_scale;
}

std::int32_t run_fp8_attention(const hr_core_problem* p, const hr_kernel& k, const Fp8Config& c) {
  const MaskView mask(p->mask, p->q_len, p->kv_len);
  const bool per_channel = k.q_quant.granularity == HR_QUANT_PER_CHANNEL ||
                           k.k_quant.granularity == HR_QUANT_PER_CHANNEL || k.v_quant.granularity == HR_QUANT_PER_CHANNEL;
  if (!formats_are(*p, HR_FORMAT_E4M3, HR_FORMAT_FLOAT32) || !mask.known() || per_channel || p->q.scales == nullptr ||
      p->k.scales == nullptr || p->v.scales == nullptr) {
    return HR_UNSUPPORTED;
  }
  const std::int64_t dk = p->key_dim, dv = p->value_dim, tk = p->kv_len;
  std::vector<float> q(dk), z(tk), acc(dv);
  for (std::int64_t b = 0; b < p->batch; ++b) {
    for (std::int64_t h = 0; h < p->q_heads; ++h) {
      const std::int64_t g = kv_head(h, p->q_heads, p->kv_heads);
      for (std::int64_t i = 0; i < p->q_len; ++i) {
        const float sq = p->q.scales[fp8_scale_index(p->q, k.q_quant.granularity, k.q_block, b, h, i)];
        for (std::int64_t d = 0; d < dk; ++d) q[d] = decode(p->q, b, h, i, d);
        float m_all = kNegInf;
        for (std::int64_t j = 0; j < tk; ++j) {
          z[j] = kNegInf;
          if (!mask.visible(b, h, i, j)) continue;
          float dot = 0.0f;
          for (std::int64_t d = 0; d < dk; ++d) dot += q[d] * decode(p->k, b, g, j, d);
          const std::int64_t kj = c.k_scale_next_token ? std::min(j + 1, tk - 1) : j;
          const float sk = p->k.scales[fp8_scale_index(p->k, k.k_quant.granularity, k.k_block, b, g, kj)];
          z[j] = p->scale * sq * sk * dot + mask.bias(b, h, i, j);
          m_all = std::max(m_all, z[j]);
        }
        if (!(m_all > kNegInf)) {
          write_masked_row(*p, b, h, i);
          continue;
        }
        std::fill(acc.begin(), acc.end(), 0.0f);
        auto add_value = [&](std::int64_t j, float w) {
          if (w == 0.0f) return;  // masked and flushed keys: V is not read
          const float sv = p->v.scales[fp8_scale_index(p->v, k.v_quant.granularity, k.v_block, b, g, j)];
          for (std::int64_t d = 0; d < dv; ++d) acc[d] += w * (decode(p->v, b, g, j, d) * sv);
        };
        if (c.normalised) {
          float l = 0.0f;
          for (std::int64_t j = 0; j < tk; ++j) l += std::exp(z[j] - m_all);
          for (std::int64_t j = 0; j < tk; ++j) add_value(j, fp8_rounded_weight(std::exp(z[j] - m_all) / l, c));
          write_row(*p, b, h, i, acc.data(), m_all, 1.0f);
          if (float* out = lse_at(*p, b, h, i)) *out = m_all + std::log(l);
          continue;
        }
        float m = kNegInf, l = 0.0f;
        for (std::int64_t j0 = 0; j0 < tk; j0 += kTile) {
          const std::int64_t j1 = std::min(j0 + kTile, tk);
          float m_tile = m;
          for (std::int64_t j = j0; j < j1; ++j) m_tile = std::max(m_tile, z[j]);
          if (!(m_tile > kNegInf)) continue;  // a tile of masked keys before any visible one
          const float correction = std::exp(m - m_tile);  // 0 on the first visible tile
          l *= correction;
          for (float& a : acc) a *= correction;
          m = m_tile;
          for (std::int64_t j = j0; j < j1; ++j) {
            const float e = std::exp(z[j] - m);
            l += e;
            add_value(j, fp8_rounded_weight(e, c));
          }
        }
        write_row(*p, b, h, i, acc.data(), m, l);
      }
    }
  }
  return HR_OK;
}

}  // namespace hr_kernels
