/* shape_defect_plugin.c — test-only float32 kernels, each sound except on one
 * production-only code path (tests/cli_shapes_test.cpp), chosen at build time:
 *
 *   SHAPE_DEFECT 1  "dk256":  the Dk = 256 specialisation leaves the last feature
 *                   channel out of every dot product;
 *   SHAPE_DEFECT 2  "long":   past Tk = 4096 keys a second split starts, and the
 *                   merge adds its weighted values but forgets its share of
 *                   the softmax denominator (a split-KV merge bug);
 *   SHAPE_DEFECT 3  "group8": at 8 query heads per kv head the head mapping
 *                   is h mod Hkv instead of h / 8 (the wrong kv head);
 *   SHAPE_DEFECT 0  "no80":   sound, declaring every production head dim but 80.
 *
 * The rest is textbook attention (max-shifted softmax in key order with one
 * running sum, which stagnates on long rows dominated by one key:
 * tests/cli_growth_test.cpp relies on that; float32,
 * masks none / causal / key padding, fully masked rows as zeros).
 */
#include <math.h>
#include <stdlib.h>

#include "headroom/kernel_abi.h"

#ifndef SHAPE_DEFECT
#error "define SHAPE_DEFECT"
#endif

#define AT(t, i0, i1, i2, i3) \
  ((t).strides[0] * (i0) + (t).strides[1] * (i1) + (t).strides[2] * (i2) + (t).strides[3] * (i3))

static int seen(const hr_core_problem* p, int64_t b, int64_t i, int64_t j) {
  switch (p->mask.kind) {
    case HR_MASK_CAUSAL_TOP_LEFT: return j <= i;
    case HR_MASK_CAUSAL_BOTTOM_RIGHT: return j <= i + (p->kv_len - p->q_len);
    case HR_MASK_KEY_PADDING: return j < p->mask.key_lengths[b];
    default: return 1;
  }
}

static int32_t run(const hr_core_problem* p) {
  const float* q = (const float*)p->q.data;
  const float* k = (const float*)p->k.data;
  const float* v = (const float*)p->v.data;
  float* o = (float*)p->o.data;
  float* w = (float*)malloc((size_t)p->kv_len * sizeof(float));
  if (w == NULL) return HR_UNSUPPORTED;
  const int64_t group = p->q_heads / p->kv_heads;
  int64_t dims = p->key_dim;
  if (SHAPE_DEFECT == 1 && p->key_dim == 256) dims = 255;
  const int64_t split = SHAPE_DEFECT == 2 && p->kv_len > 4096 ? 4096 : p->kv_len;
  for (int64_t b = 0; b < p->batch; ++b)
    for (int64_t h = 0; h < p->q_heads; ++h) {
      const int64_t g = SHAPE_DEFECT == 3 && group == 8 ? h % p->kv_heads : h / group;
      for (int64_t i = 0; i < p->q_len; ++i) {
        float m = -INFINITY, sum = 0.0f;
        for (int64_t j = 0; j < p->kv_len; ++j) {
          w[j] = -INFINITY;
          if (!seen(p, b, i, j)) continue;
          float dot = 0.0f;
          for (int64_t d = 0; d < dims; ++d) dot += q[AT(p->q, b, h, i, d)] * k[AT(p->k, b, g, j, d)];
          w[j] = p->scale * dot;
          m = w[j] > m ? w[j] : m;
        }
        for (int64_t j = 0; j < p->kv_len; ++j) {
          w[j] = w[j] == -INFINITY ? 0.0f : expf(w[j] - m);
          if (j < split) sum += w[j];
        }
        for (int64_t d = 0; d < p->value_dim; ++d) {
          float acc = 0.0f;
          for (int64_t j = 0; j < p->kv_len; ++j) acc += w[j] * v[AT(p->v, b, g, j, d)];
          o[AT(p->o, b, h, i, d)] = sum > 0.0f ? acc / sum : 0.0f;
        }
      }
    }
  free(w);
  return HR_OK;
}

static const int32_t kAllButEighty[] = {64, 96, 128, 192, 256, 0};

static const hr_kernel kKernel = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "shape_defect",
    .description = "test-only: textbook float32 attention with one defect on a production-only path",
    .level = HR_LEVEL_CORE,
    .input_format = HR_FORMAT_FLOAT32,
    .output_format = HR_FORMAT_FLOAT32,
    .mask_kinds = HR_MASK_NONE | HR_MASK_CAUSAL_TOP_LEFT | HR_MASK_CAUSAL_BOTTOM_RIGHT | HR_MASK_KEY_PADDING,
    .masked_row = HR_MASKED_ROW_ZEROS,
    .returns_lse = 0,
    .layouts = HR_LAYOUT_BHTD | HR_LAYOUT_BTHD,
    .run_core = run,
    .key_dims = SHAPE_DEFECT == 0 ? kAllButEighty : NULL,
    .value_dims = SHAPE_DEFECT == 0 ? kAllButEighty : NULL,
};

const hr_kernel* headroom_kernel_entry(void) { return &kKernel; }
