// headroom tests — bodies of kernels_support.h (included from it).
#pragma once

#include <algorithm>
#include <array>
#include <cmath>
#include <cstring>
#include <limits>
#include <random>

#include "headroom/binary16.h"
#include "kernels_support.h"

namespace kt {

namespace detail {

constexpr double kInf = std::numeric_limits<double>::infinity();

// Strides (in elements) and element count of a [B, H, T, D] tensor in `layout`.
struct Placement {
  std::array<std::int64_t, 4> strides;
  std::int64_t count;
};
inline Placement place(Layout layout, std::int64_t B, std::int64_t H, std::int64_t T, std::int64_t D) {
  switch (layout) {
    case Layout::bthd:
      return {{T * H * D, D, H * D, 1}, B * T * H * D};
    case Layout::bhtd_padded:
      return {{H * T * (D + 3), T * (D + 3), D + 3, 1}, B * H * T * (D + 3)};
    default:
      return {{H * T * D, T * D, D, 1}, B * H * T * D};
  }
}

inline std::size_t element_size(std::int32_t format) {
  switch (format) {
    case HR_FORMAT_FLOAT64:
      return 8;
    case HR_FORMAT_FLOAT32:
      return 4;
    case HR_FORMAT_INT8:
      return 1;
    default:
      return 2;
  }
}

// Bytes with 8-byte alignment, every byte 0xFF at first (NaN in every float format).
struct Buffer {
  std::vector<std::uint64_t> words;
  explicit Buffer(std::size_t bytes) : words(bytes / 8 + 1, ~std::uint64_t{0}) {}
  unsigned char* bytes() { return reinterpret_cast<unsigned char*>(words.data()); }
};

inline double round_to(std::int32_t format, double x) {
  const auto f = static_cast<float>(x);
  switch (format) {
    case HR_FORMAT_BINARY16:
      return headroom::binary16_to_float(headroom::float_to_binary16(f));
    case HR_FORMAT_BFLOAT16:
      return headroom::bfloat16_to_float(headroom::float_to_bfloat16(f));
    default:
      return f;
  }
}

// Symmetric per-token int8 of one [B, H, T, D] tensor: s = max|x| / 127 per
// (b, h, t), codes = round(x / s) in [−127, 127]; x becomes the exact (c·s).
inline void quantise_per_token(std::vector<double>& x, std::int64_t rows, std::int64_t dim,
                               std::vector<std::int8_t>& codes, std::vector<float>& scales) {
  codes.assign(x.size(), 0);
  scales.assign(rows, 1.0f);
  for (std::int64_t r = 0; r < rows; ++r) {
    double amax = 0.0;
    for (std::int64_t d = 0; d < dim; ++d) amax = std::max(amax, std::fabs(x[r * dim + d]));
    const float s = amax > 0.0 ? static_cast<float>(amax / 127.0) : 1.0f;
    scales[r] = s;
    for (std::int64_t d = 0; d < dim; ++d) {
      const double c = std::clamp(std::nearbyint(x[r * dim + d] / s), -127.0, 127.0);
      codes[r * dim + d] = static_cast<std::int8_t>(c);
      x[r * dim + d] = c * static_cast<double>(s);
    }
  }
}

// Lays one [B, H, T, D] tensor of p's received values out for the kernel.
inline hr_tensor lay_out(const Problem& p, const std::vector<double>& x, const std::vector<std::int8_t>& codes,
                         const std::vector<float>& scales, std::int64_t H, std::int64_t T, std::int64_t D,
                         Layout layout, std::vector<Buffer>& keep) {
  const Placement pl = place(layout, p.s.batch, H, T, D);
  keep.emplace_back(pl.count * element_size(p.format));
  unsigned char* base = keep.back().bytes();
  hr_tensor t{};
  t.data = base;
  t.format = p.format;
  const std::int64_t extents[4] = {p.s.batch, H, T, D};
  for (int a = 0; a < 4; ++a) {
    t.extents[a] = extents[a];
    t.strides[a] = pl.strides[a];
  }
  for (std::int64_t b = 0; b < p.s.batch; ++b)
    for (std::int64_t h = 0; h < H; ++h)
      for (std::int64_t i = 0; i < T; ++i)
        for (std::int64_t d = 0; d < D; ++d) {
          const std::int64_t src = ((b * H + h) * T + i) * D + d;
          const std::int64_t dst = b * pl.strides[0] + h * pl.strides[1] + i * pl.strides[2] + d;
          const auto f = static_cast<float>(x[src]);
          switch (p.format) {
            case HR_FORMAT_FLOAT32:
              std::memcpy(base + dst * 4, &f, 4);
              break;
            case HR_FORMAT_BINARY16: {
              const std::uint16_t bits = headroom::float_to_binary16(f);
              std::memcpy(base + dst * 2, &bits, 2);
              break;
            }
            case HR_FORMAT_BFLOAT16: {
              const std::uint16_t bits = headroom::float_to_bfloat16(f);
              std::memcpy(base + dst * 2, &bits, 2);
              break;
            }
            default:
              base[dst] = static_cast<unsigned char>(codes[src]);
              break;
          }
        }
  if (p.format == HR_FORMAT_INT8) t.scales = scales.data();
  return t;
}

inline hr_mask mask_of(const Problem& p) {
  hr_mask m{};
  m.kind = p.mask_kind;
  m.key_lengths = p.key_lengths.empty() ? nullptr : p.key_lengths.data();
  m.allowed = p.allowed.empty() ? nullptr : p.allowed.data();
  m.bias = p.bias.empty() ? nullptr : p.bias.data();
  const std::int64_t e[4] = {p.s.batch, p.mask_heads, p.s.q_len, p.s.kv_len};
  const std::int64_t st[4] = {e[1] * e[2] * e[3], e[2] * e[3], e[3], 1};
  for (int a = 0; a < 4; ++a) {
    m.extents[a] = e[a];
    m.strides[a] = st[a];
  }
  return m;
}

inline double decode(std::int32_t format, const unsigned char* p) {
  switch (format) {
    case HR_FORMAT_FLOAT32: {
      float f;
      std::memcpy(&f, p, 4);
      return f;
    }
    case HR_FORMAT_BINARY16:
    case HR_FORMAT_BFLOAT16: {
      std::uint16_t bits;
      std::memcpy(&bits, p, 2);
      return format == HR_FORMAT_BINARY16 ? headroom::binary16_to_float(bits) : headroom::bfloat16_to_float(bits);
    }
    default: {
      double d;
      std::memcpy(&d, p, 8);
      return d;
    }
  }
}

}  // namespace detail

inline const hr_kernel* find_kernel(const std::string& name) {
  std::size_t n = 0;
  const hr_bundled_kernel* table = headroom_bundled_kernels(&n);
  for (std::size_t i = 0; i < n; ++i) {
    if (table[i].kernel->name == name) return table[i].kernel;
  }
  return nullptr;
}

inline bool Problem::visible(std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t j) const {
  const std::int64_t hm = mask_heads == 1 ? 0 : h;
  const std::int64_t m = ((b * mask_heads + hm) * s.q_len + i) * s.kv_len + j;
  switch (mask_kind) {
    case HR_MASK_CAUSAL_TOP_LEFT:
      return j <= i;
    case HR_MASK_CAUSAL_BOTTOM_RIGHT:
      return j <= i + (s.kv_len - s.q_len);
    case HR_MASK_KEY_PADDING:
      return j < key_lengths[b];
    case HR_MASK_DENSE:
      return allowed[m] != 0;
    case HR_MASK_BIAS:
      return bias[m] != -std::numeric_limits<float>::infinity();
    default:
      return true;
  }
}

inline double Problem::bias_at(std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t j) const {
  if (mask_kind != HR_MASK_BIAS) return 0.0;
  const std::int64_t hm = mask_heads == 1 ? 0 : h;
  return bias[((b * mask_heads + hm) * s.q_len + i) * s.kv_len + j];
}

inline void requantise(Problem& p) {
  const Shape& s = p.s;
  if (p.format == HR_FORMAT_INT8) {
    detail::quantise_per_token(p.q, s.batch * s.q_heads * s.q_len, s.key_dim, p.q8, p.q_scales);
    detail::quantise_per_token(p.k, s.batch * s.kv_heads * s.kv_len, s.key_dim, p.k8, p.k_scales);
    detail::quantise_per_token(p.v, s.batch * s.kv_heads * s.kv_len, s.value_dim, p.v8, p.v_scales);
    return;
  }
  for (auto* x : {&p.q, &p.k, &p.v}) {
    for (double& e : *x) e = detail::round_to(p.format, e);
  }
}

inline Problem make_problem(const Shape& s, std::int32_t format, std::uint64_t seed, double sigma) {
  Problem p;
  p.s = s;
  p.format = format;
  p.scale = static_cast<float>(1.0 / std::sqrt(static_cast<double>(s.key_dim)));
  std::mt19937_64 rng(seed);
  std::normal_distribution<double> normal(0.0, sigma);
  p.q.resize(s.batch * s.q_heads * s.q_len * s.key_dim);
  p.k.resize(s.batch * s.kv_heads * s.kv_len * s.key_dim);
  p.v.resize(s.batch * s.kv_heads * s.kv_len * s.value_dim);
  for (auto* x : {&p.q, &p.k, &p.v}) {
    for (double& e : *x) e = normal(rng);
  }
  requantise(p);
  return p;
}

inline void set_mask(Problem& p, std::uint32_t kind, std::uint64_t seed) {
  const Shape& s = p.s;
  p.mask_kind = kind;
  p.key_lengths.clear();
  p.allowed.clear();
  p.bias.clear();
  p.mask_heads = 1;
  std::mt19937_64 rng(seed);
  if (kind == HR_MASK_KEY_PADDING) {
    for (std::int64_t b = 0; b < s.batch; ++b) p.key_lengths.push_back(b % 2 == 0 ? s.kv_len - 2 : 0);
  } else if (kind == HR_MASK_DENSE) {
    p.mask_heads = s.q_heads;
    std::bernoulli_distribution seen(0.7);
    p.allowed.resize(s.batch * p.mask_heads * s.q_len * s.kv_len);
    for (auto& a : p.allowed) a = seen(rng) ? 1 : 0;
    auto row = [&](std::int64_t b, std::int64_t h, std::int64_t i) {
      return &p.allowed[((b * p.mask_heads + h) * s.q_len + i) * s.kv_len];
    };
    for (std::int64_t j = 0; j < s.kv_len; ++j) row(0, 0, 0)[j] = 0;  // fully masked row
    const std::int64_t last = s.q_len - 1, h_last = p.mask_heads - 1;
    for (std::int64_t j = 0; j < s.kv_len; ++j) row(0, h_last, last)[j] = j == s.kv_len - 1;  // only the last key
    if (s.kv_len > 3) {
      for (std::int64_t b = 0; b < s.batch; ++b)
        for (std::int64_t h = 0; h < p.mask_heads; ++h)
          for (std::int64_t i = 0; i < s.q_len; ++i) row(b, h, i)[2] = 0;  // key 2 hidden from all
    }
  } else if (kind == HR_MASK_BIAS) {
    // A linear position bias, as ALiBi (Press et al. 2022) uses, slope 0.1.
    p.bias.resize(s.batch * s.q_len * s.kv_len);
    for (std::int64_t b = 0; b < s.batch; ++b)
      for (std::int64_t i = 0; i < s.q_len; ++i)
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          const bool hidden = (i + j) % 7 == 3 || (b == 0 && i == 0);
          p.bias[(b * s.q_len + i) * s.kv_len + j] =
              hidden ? -std::numeric_limits<float>::infinity() : -0.1f * static_cast<float>(std::llabs(i - j));
        }
  }
}

inline Problem poisoned(const Problem& p) {
  Problem x = p;
  const Shape& s = p.s;
  const double nan = std::numeric_limits<double>::quiet_NaN();
  const std::int64_t group = s.q_heads / s.kv_heads;
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t g = 0; g < s.kv_heads; ++g)
      for (std::int64_t j = 0; j < s.kv_len; ++j) {
        bool seen = false;
        for (std::int64_t h = g * group; h < (g + 1) * group && !seen; ++h)
          for (std::int64_t i = 0; i < s.q_len && !seen; ++i) seen = p.visible(b, h, i, j);
        if (seen) continue;
        const std::int64_t token = (b * s.kv_heads + g) * s.kv_len + j;
        for (std::int64_t d = 0; d < s.key_dim; ++d) x.k[token * s.key_dim + d] = nan;
        for (std::int64_t d = 0; d < s.value_dim; ++d) x.v[token * s.value_dim + d] = nan;
        if (p.format == HR_FORMAT_INT8) {
          for (std::int64_t d = 0; d < s.key_dim; ++d) x.k8[token * s.key_dim + d] = -128;
          for (std::int64_t d = 0; d < s.value_dim; ++d) x.v8[token * s.value_dim + d] = -128;
          x.k_scales[token] = x.v_scales[token] = std::numeric_limits<float>::quiet_NaN();
        }
      }
  return x;
}

inline Reference reference(const Problem& p) {
  const Shape& s = p.s;
  Reference r;
  r.o.assign(s.batch * s.q_heads * s.q_len * s.value_dim, 0.0);
  r.weight = r.o;
  r.lse.assign(s.batch * s.q_heads * s.q_len, -detail::kInf);
  r.masked.assign(r.lse.size(), 0);
  std::vector<double> z(s.kv_len);
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < s.q_heads; ++h) {
      const std::int64_t g = p.kv_head(h);
      for (std::int64_t i = 0; i < s.q_len; ++i) {
        const std::int64_t row = (b * s.q_heads + h) * s.q_len + i;
        double m = -detail::kInf;
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          z[j] = -detail::kInf;
          if (!p.visible(b, h, i, j)) continue;
          double dot = 0.0;
          for (std::int64_t d = 0; d < s.key_dim; ++d) {
            dot += p.q[row * s.key_dim + d] * p.k[((b * s.kv_heads + g) * s.kv_len + j) * s.key_dim + d];
          }
          z[j] = static_cast<double>(p.scale) * dot + p.bias_at(b, h, i, j);
          m = std::max(m, z[j]);
        }
        if (m == -detail::kInf) {
          r.masked[row] = 1;
          continue;
        }
        double l = 0.0;
        for (std::int64_t j = 0; j < s.kv_len; ++j) l += z[j] == -detail::kInf ? 0.0 : std::exp(z[j] - m);
        r.lse[row] = m + std::log(l);
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          if (z[j] == -detail::kInf) continue;
          const double pj = std::exp(z[j] - m) / l;
          for (std::int64_t d = 0; d < s.value_dim; ++d) {
            const double vj = p.v[((b * s.kv_heads + g) * s.kv_len + j) * s.value_dim + d];
            r.o[row * s.value_dim + d] += pj * vj;
            r.weight[row * s.value_dim + d] += pj * std::fabs(vj);
          }
        }
      }
    }
  return r;
}

inline Output run(const hr_kernel& k, const Problem& p, Layout layout) {
  const Shape& s = p.s;
  std::vector<detail::Buffer> keep;
  hr_core_problem c{};
  c.batch = s.batch;
  c.q_heads = s.q_heads;
  c.kv_heads = s.kv_heads;
  c.q_len = s.q_len;
  c.kv_len = s.kv_len;
  c.key_dim = s.key_dim;
  c.value_dim = s.value_dim;
  c.scale = p.scale;
  c.mask = detail::mask_of(p);
  keep.reserve(4);
  c.q = detail::lay_out(p, p.q, p.q8, p.q_scales, s.q_heads, s.q_len, s.key_dim, layout, keep);
  c.k = detail::lay_out(p, p.k, p.k8, p.k_scales, s.kv_heads, s.kv_len, s.key_dim, layout, keep);
  c.v = detail::lay_out(p, p.v, p.v8, p.v_scales, s.kv_heads, s.kv_len, s.value_dim, layout, keep);

  // O with a guard row after it; every byte starts 0xFF and must stay so
  // wherever O has no element.
  const detail::Placement pl = detail::place(layout, s.batch, s.q_heads, s.q_len, s.value_dim);
  const std::size_t es = detail::element_size(k.output_format);
  const std::size_t o_bytes = (pl.count + s.value_dim) * es;
  keep.emplace_back(o_bytes);
  unsigned char* o = keep.back().bytes();
  c.o.data = o;
  c.o.format = k.output_format;
  const std::int64_t extents[4] = {s.batch, s.q_heads, s.q_len, s.value_dim};
  for (int a = 0; a < 4; ++a) {
    c.o.extents[a] = extents[a];
    c.o.strides[a] = pl.strides[a];
  }
  const std::int64_t rows = s.batch * s.q_heads * s.q_len;
  std::vector<float> lse(rows + 4, std::numeric_limits<float>::quiet_NaN());
  c.lse = k.returns_lse ? lse.data() : nullptr;

  Output out;
  out.rc = k.run_core(&c);
  std::vector<char> used(o_bytes, 0);
  out.o.resize(rows * s.value_dim);
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i)
        for (std::int64_t d = 0; d < s.value_dim; ++d) {
          const std::int64_t e = b * pl.strides[0] + h * pl.strides[1] + i * pl.strides[2] + d;
          out.o[((b * s.q_heads + h) * s.q_len + i) * s.value_dim + d] = detail::decode(k.output_format, o + e * es);
          out.raw.insert(out.raw.end(), o + e * es, o + (e + 1) * es);
          std::fill(used.begin() + e * es, used.begin() + (e + 1) * es, 1);
        }
  for (std::size_t i = 0; i < o_bytes; ++i) out.intact = out.intact && (used[i] || o[i] == 0xFF);
  if (k.returns_lse) {
    out.lse.assign(lse.begin(), lse.begin() + rows);
    for (std::int64_t i = rows; i < rows + 4; ++i) out.intact = out.intact && std::isnan(lse[i]);
  }
  return out;
}

inline Score score(const Problem& p, const Reference& r, const Output& out) {
  Score sc;
  const std::int64_t dv = p.s.value_dim;
  for (std::size_t row = 0; row < r.masked.size(); ++row) {
    if (r.masked[row]) {
      bool zeros = true;
      for (std::int64_t d = 0; d < dv; ++d) zeros = zeros && out.o[row * dv + d] == 0.0;
      if (!out.lse.empty()) zeros = zeros && out.lse[row] == -std::numeric_limits<float>::infinity();
      sc.bad_masked_rows += zeros ? 0 : 1;
      continue;
    }
    for (std::int64_t d = 0; d < dv; ++d) {
      const double err = std::fabs(out.o[row * dv + d] - r.o[row * dv + d]), w = r.weight[row * dv + d];
      double e = w > 0.0 ? err / w : (err == 0.0 ? 0.0 : detail::kInf);
      if (std::isnan(e)) e = detail::kInf;
      if (e > sc.worst || (e == detail::kInf && sc.where.empty())) {
        sc.worst = e;
        sc.where = "row " + std::to_string(row) + " d " + std::to_string(d) + ": got " +
                   std::to_string(out.o[row * dv + d]) + " want " + std::to_string(r.o[row * dv + d]);
      }
    }
    if (!out.lse.empty()) {
      double e = std::fabs(out.lse[row] - r.lse[row]) / std::max(1.0, std::fabs(r.lse[row]));
      if (std::isnan(e)) e = detail::kInf;
      sc.worst_lse = std::max(sc.worst_lse, e);
    }
  }
  return sc;
}

inline BlockProblem make_block(std::int64_t batch, std::int64_t q_len, std::int64_t kv_len, std::int64_t model_dim,
                               std::int64_t q_heads, std::int64_t kv_heads, std::int64_t head_dim, std::uint64_t seed) {
  BlockProblem p;
  p.batch = batch;
  p.q_len = q_len;
  p.kv_len = kv_len;
  p.model_dim = model_dim;
  p.q_heads = q_heads;
  p.kv_heads = kv_heads;
  p.key_dim = p.value_dim = head_dim;
  p.scale = static_cast<float>(1.0 / std::sqrt(static_cast<double>(head_dim)));
  std::mt19937_64 rng(seed);
  std::normal_distribution<float> unit(0.0f, 1.0f), weight(0.0f, static_cast<float>(1.0 / std::sqrt(model_dim))),
      small(0.0f, 0.1f);
  auto fill = [&](std::vector<float>& x, std::int64_t n, std::normal_distribution<float>& dist) {
    x.resize(n);
    for (float& e : x) e = dist(rng);
  };
  fill(p.x_q, batch * q_len * model_dim, unit);
  fill(p.x_kv, batch * kv_len * model_dim, unit);
  fill(p.w_q, model_dim * q_heads * head_dim, weight);
  fill(p.w_k, model_dim * kv_heads * head_dim, weight);
  fill(p.w_v, model_dim * kv_heads * head_dim, weight);
  fill(p.w_o, q_heads * head_dim * model_dim, weight);
  fill(p.b_q, q_heads * head_dim, small);
  fill(p.b_k, kv_heads * head_dim, small);
  fill(p.b_v, kv_heads * head_dim, small);
  fill(p.b_o, model_dim, small);
  p.attention.s = {batch, q_heads, kv_heads, q_len, kv_len, head_dim, head_dim};
  p.attention.scale = p.scale;
  return p;
}

inline BlockReference block_reference(const BlockProblem& p) {
  const std::int64_t dm = p.model_dim, dk = p.key_dim, dv = p.value_dim;
  // Projections in double: proj[b, t, c] = Σ_m x[b, t, m]·w[m, c] + bias[c].
  auto project = [&](const std::vector<float>& x, std::int64_t len, const std::vector<float>& w,
                     const std::vector<float>& bias, std::int64_t n) {
    std::vector<double> y(p.batch * len * n);
    for (std::int64_t r = 0; r < p.batch * len; ++r)
      for (std::int64_t c = 0; c < n; ++c) {
        double s = bias[c];
        for (std::int64_t m = 0; m < dm; ++m) s += static_cast<double>(x[r * dm + m]) * w[m * n + c];
        y[r * n + c] = s;
      }
    return y;
  };
  const auto q = project(p.x_q, p.q_len, p.w_q, p.b_q, p.q_heads * dk);
  const auto k = project(p.x_kv, p.kv_len, p.w_k, p.b_k, p.kv_heads * dk);
  const auto v = project(p.x_kv, p.kv_len, p.w_v, p.b_v, p.kv_heads * dv);
  const std::int64_t width = p.q_heads * dv;
  std::vector<double> concat(p.batch * p.q_len * width, 0.0), weight(concat.size(), 0.0), z(p.kv_len);
  const Problem& a = p.attention;
  for (std::int64_t b = 0; b < p.batch; ++b)
    for (std::int64_t h = 0; h < p.q_heads; ++h) {
      const std::int64_t g = a.kv_head(h);
      for (std::int64_t i = 0; i < p.q_len; ++i) {
        double m = -detail::kInf;
        for (std::int64_t j = 0; j < p.kv_len; ++j) {
          z[j] = -detail::kInf;
          if (!a.visible(b, h, i, j)) continue;
          double dot = 0.0;
          for (std::int64_t e = 0; e < dk; ++e) {
            dot += q[(b * p.q_len + i) * p.q_heads * dk + h * dk + e] *
                   k[(b * p.kv_len + j) * p.kv_heads * dk + g * dk + e];
          }
          z[j] = static_cast<double>(p.scale) * dot + a.bias_at(b, h, i, j);
          m = std::max(m, z[j]);
        }
        if (m == -detail::kInf) continue;  // heads of a fully masked row are zeros
        double l = 0.0;
        for (std::int64_t j = 0; j < p.kv_len; ++j) l += z[j] == -detail::kInf ? 0.0 : std::exp(z[j] - m);
        for (std::int64_t j = 0; j < p.kv_len; ++j) {
          if (z[j] == -detail::kInf) continue;
          const double pj = std::exp(z[j] - m) / l;
          for (std::int64_t e = 0; e < dv; ++e) {
            const double vj = v[(b * p.kv_len + j) * p.kv_heads * dv + g * dv + e];
            concat[(b * p.q_len + i) * width + h * dv + e] += pj * vj;
            weight[(b * p.q_len + i) * width + h * dv + e] += pj * std::fabs(vj);
          }
        }
      }
    }
  BlockReference r;
  r.y.assign(p.batch * p.q_len * dm, 0.0);
  r.magnitude = r.y;
  for (std::int64_t row = 0; row < p.batch * p.q_len; ++row)
    for (std::int64_t n = 0; n < dm; ++n) {
      double y = p.b_o[n], mag = std::fabs(p.b_o[n]);
      for (std::int64_t c = 0; c < width; ++c) {
        y += concat[row * width + c] * p.w_o[c * dm + n];
        mag += weight[row * width + c] * std::fabs(p.w_o[c * dm + n]);
      }
      r.y[row * dm + n] = y;
      r.magnitude[row * dm + n] = mag;
    }
  return r;
}

inline std::vector<double> run_block(const hr_kernel& k, const BlockProblem& p, std::int32_t* rc) {
  auto tensor = [](const std::vector<float>& x, std::int64_t e0, std::int64_t e1, std::int64_t e2, std::int64_t e3) {
    hr_tensor t{};
    t.data = x.data();
    t.format = HR_FORMAT_FLOAT32;
    const std::int64_t e[4] = {e0, e1, e2, e3};
    const std::int64_t s[4] = {e1 * e2 * e3, e2 * e3, e3, 1};
    for (int a = 0; a < 4; ++a) {
      t.extents[a] = e[a];
      t.strides[a] = s[a];
    }
    return t;
  };
  hr_block_problem c{};
  c.batch = p.batch;
  c.q_len = p.q_len;
  c.kv_len = p.kv_len;
  c.model_dim = p.model_dim;
  c.q_heads = p.q_heads;
  c.kv_heads = p.kv_heads;
  c.key_dim = p.key_dim;
  c.value_dim = p.value_dim;
  c.scale = p.scale;
  c.mask = detail::mask_of(p.attention);
  const std::int64_t dm = p.model_dim;
  c.x_q = tensor(p.x_q, 1, p.batch, p.q_len, dm);
  c.x_kv = tensor(p.x_kv, 1, p.batch, p.kv_len, dm);
  c.w_q = tensor(p.w_q, 1, 1, dm, p.q_heads * p.key_dim);
  c.w_k = tensor(p.w_k, 1, 1, dm, p.kv_heads * p.key_dim);
  c.w_v = tensor(p.w_v, 1, 1, dm, p.kv_heads * p.value_dim);
  c.w_o = tensor(p.w_o, 1, 1, p.q_heads * p.value_dim, dm);
  c.b_q = tensor(p.b_q, 1, 1, 1, p.q_heads * p.key_dim);
  c.b_k = tensor(p.b_k, 1, 1, 1, p.kv_heads * p.key_dim);
  c.b_v = tensor(p.b_v, 1, 1, 1, p.kv_heads * p.value_dim);
  c.b_o = tensor(p.b_o, 1, 1, 1, dm);
  std::vector<float> y(p.batch * p.q_len * dm, std::numeric_limits<float>::quiet_NaN());
  c.y.data = y.data();
  c.y.format = HR_FORMAT_FLOAT32;
  const std::int64_t e[4] = {1, p.batch, p.q_len, dm};
  const std::int64_t s[4] = {p.batch * p.q_len * dm, p.q_len * dm, dm, 1};
  for (int a = 0; a < 4; ++a) {
    c.y.extents[a] = e[a];
    c.y.strides[a] = s[a];
  }
  *rc = k.run_block(&c);
  return {y.begin(), y.end()};
}

}  // namespace kt
