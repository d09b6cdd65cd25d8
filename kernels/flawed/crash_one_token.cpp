// headroom flawed specimen — crash_one_token: null dereference when Tk == 1.
//
// Method: f32_textbook (max shift, exp, normalise, PV, float32), all masks,
// zeros on fully masked rows, the scores of a row kept in a scratch buffer.
// DEFECT: the scratch buffer is only allocated when there is more than one
// key ("one key needs no softmax"), but the single-key path was never written:
// with Tk == 1 the kernel stores the score through a null pointer and dies with
// SIGSEGV on the first row. Any Tk ≥ 2 runs correctly. Expected fault: crash.
#include <cmath>
#include <vector>

#include "../common.h"
#include "../kernel_list.h"

namespace hr_kernels {
namespace {

std::int32_t run(const hr_core_problem* p) {
  const MaskView mask(p->mask, p->q_len, p->kv_len);
  if (!formats_are(*p, HR_FORMAT_FLOAT32, HR_FORMAT_FLOAT32) || !mask.known()) return HR_UNSUPPORTED;
  std::vector<float> q(p->key_dim), k(p->key_dim), v(p->value_dim), acc(p->value_dim);
  std::vector<float> scratch(p->kv_len > 1 ? p->kv_len : 0);
  // volatile: the compiler may not reason "z is dereferenced, so it is not
  // null, so kv_len > 1" and quietly repair the defect; the crash must be real.
  float* volatile z = p->kv_len > 1 ? scratch.data() : nullptr;  // the defect: Tk == 1 gets no buffer
  for (std::int64_t b = 0; b < p->batch; ++b) {
    for (std::int64_t h = 0; h < p->q_heads; ++h) {
      const std::int64_t g = kv_head(h, p->q_heads, p->kv_heads);
      for (std::int64_t i = 0; i < p->q_len; ++i) {
        load_row(p->q, b, h, i, p->key_dim, q.data());
        float m = kNegInf;
        for (std::int64_t j = 0; j < p->kv_len; ++j) {
          z[j] = kNegInf;
          if (!mask.visible(b, h, i, j)) continue;
          load_row(p->k, b, g, j, p->key_dim, k.data());
          z[j] = p->scale * dot(q.data(), k.data(), p->key_dim) + mask.bias(b, h, i, j);
          m = std::max(m, z[j]);
        }
        if (!(m > kNegInf)) {
          write_masked_row(*p, b, h, i);
          continue;
        }
        float l = 0.0f;
        std::fill(acc.begin(), acc.end(), 0.0f);
        for (std::int64_t j = 0; j < p->kv_len; ++j) {
          const float e = std::exp(z[j] - m);
          if (e == 0.0f) continue;
          l += e;
          load_row(p->v, b, g, j, p->value_dim, v.data());
          for (std::int64_t d = 0; d < p->value_dim; ++d) acc[d] += e * v[d];
        }
        write_row(*p, b, h, i, acc.data(), m, l);
      }
    }
  }
  return HR_OK;
}

}  // namespace

const hr_kernel crash_one_token = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "crash_one_token",
    .description = "float32 textbook attention whose score buffer is null when Tk == 1",
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
