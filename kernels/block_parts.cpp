// headroom kernels — the pieces of the float32 block kernels (block_parts.h).
#include "block_parts.h"

#include "common.h"
#include "kernel_list.h"

namespace hr_kernels {
namespace {

hr_tensor contiguous(const std::vector<float>& data, std::int64_t b, std::int64_t h, std::int64_t t, std::int64_t d) {
  hr_tensor x{};
  x.data = data.data();
  x.format = HR_FORMAT_FLOAT32;
  const std::int64_t e[4] = {b, h, t, d};
  const std::int64_t s[4] = {h * t * d, t * d, d, 1};
  for (int a = 0; a < 4; ++a) {
    x.extents[a] = e[a];
    x.strides[a] = s[a];
  }
  return x;
}

bool float32_or_absent(const hr_tensor& t) { return t.data == nullptr || t.format == HR_FORMAT_FLOAT32; }

}  // namespace

bool block_inputs_float32(const hr_block_problem& p) {
  const hr_tensor* all[] = {&p.x_q, &p.x_kv, &p.w_q, &p.w_k, &p.w_v, &p.w_o, &p.b_q, &p.b_k, &p.b_v, &p.b_o};
  for (const hr_tensor* t : all) {
    if (!float32_or_absent(*t)) return false;
  }
  return p.y.format == HR_FORMAT_FLOAT32 && MaskView(p.mask, p.q_len, p.kv_len).known();
}

std::vector<float> project_heads(const hr_tensor& x, const hr_tensor& w, const hr_tensor& bias, std::int64_t batch,
                                 std::int64_t len, std::int64_t model_dim, std::int64_t heads, std::int64_t head_dim) {
  std::vector<float> out(batch * heads * len * head_dim);
  for (std::int64_t b = 0; b < batch; ++b) {
    for (std::int64_t t = 0; t < len; ++t) {
      for (std::int64_t h = 0; h < heads; ++h) {
        for (std::int64_t e = 0; e < head_dim; ++e) {
          const std::int64_t col = h * head_dim + e;
          float s = 0.0f;
          for (std::int64_t m = 0; m < model_dim; ++m) s += load(x, 0, b, t, m) * load(w, 0, 0, m, col);
          if (bias.data != nullptr) s += load(bias, 0, 0, 0, col);
          out[((b * heads + h) * len + t) * head_dim + e] = s;
        }
      }
    }
  }
  return out;
}

std::vector<float> attend_heads(const hr_block_problem& p, const std::vector<float>& q, const std::vector<float>& k,
                                const std::vector<float>& v) {
  std::vector<float> o(p.batch * p.q_heads * p.q_len * p.value_dim);
  hr_core_problem c{};
  c.batch = p.batch;
  c.q_heads = p.q_heads;
  c.kv_heads = p.kv_heads;
  c.q_len = p.q_len;
  c.kv_len = p.kv_len;
  c.key_dim = p.key_dim;
  c.value_dim = p.value_dim;
  c.scale = p.scale;
  c.mask = p.mask;
  c.q = contiguous(q, p.batch, p.q_heads, p.q_len, p.key_dim);
  c.k = contiguous(k, p.batch, p.kv_heads, p.kv_len, p.key_dim);
  c.v = contiguous(v, p.batch, p.kv_heads, p.kv_len, p.value_dim);
  const hr_tensor shape = contiguous(o, p.batch, p.q_heads, p.q_len, p.value_dim);
  c.o.data = o.data();
  c.o.format = HR_FORMAT_FLOAT32;
  for (int a = 0; a < 4; ++a) {
    c.o.extents[a] = shape.extents[a];
    c.o.strides[a] = shape.strides[a];
  }
  c.lse = nullptr;
  f32_textbook.run_core(&c);  // formats and mask kind already checked: HR_OK
  return o;
}

void output_projection(const hr_block_problem& p, const std::vector<float>& concat) {
  const std::int64_t width = p.q_heads * p.value_dim;
  for (std::int64_t b = 0; b < p.batch; ++b) {
    for (std::int64_t t = 0; t < p.q_len; ++t) {
      const float* row = &concat[(b * p.q_len + t) * width];
      for (std::int64_t n = 0; n < p.model_dim; ++n) {
        float s = 0.0f;
        for (std::int64_t c = 0; c < width; ++c) s += row[c] * load(p.w_o, 0, 0, c, n);
        if (p.b_o.data != nullptr) s += load(p.b_o, 0, 0, 0, n);
        store(p.y, 0, b, t, n, s);
      }
    }
  }
}

}  // namespace hr_kernels
