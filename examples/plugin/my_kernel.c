/* my_kernel.c — a complete headroom kernel plug-in: textbook float32 attention.
 *
 * For each query row: scores z_j = scale * (q . k_j) + bias_j over the visible
 * keys, m = max_j z_j, p_j = exp(z_j - m), o = (sum_j p_j v_j) / (sum_j p_j),
 * lse = m + log(sum_j p_j) (Vaswani et al. 2017, eq. 1, with the usual max
 * shift so exp cannot overflow). Everything in float32, in key order, the
 * sums taken 64 keys at a time: a single running sum stagnates on long rows
 * dominated by one key (once it is ~1, weights below half its ulp round away)
 * and headroom fails that from Tk ~ 4096 (docs/reports.md, "Error growth").
 * Strides are honoured, so both layouts are accepted. A row with no visible
 * key gets zeros and lse = -inf, as declared.
 *
 * Build (see README.md):
 *   cc -shared -fPIC -O2 -I<headroom>/harness/include my_kernel.c -o libmy_kernel.so -lm
 */
#include <math.h>
#include <stdlib.h>

#include "headroom/kernel_abi.h"

#define AT(t, i0, i1, i2, i3) \
  ((t).strides[0] * (i0) + (t).strides[1] * (i1) + (t).strides[2] * (i2) + (t).strides[3] * (i3))

static int visible(const hr_core_problem* p, int64_t b, int64_t h, int64_t i, int64_t j) {
  const hr_mask* m = &p->mask;
  switch (m->kind) {
    case HR_MASK_CAUSAL_TOP_LEFT: return j <= i;
    case HR_MASK_CAUSAL_BOTTOM_RIGHT: return j <= i + (p->kv_len - p->q_len);
    case HR_MASK_KEY_PADDING: return j < m->key_lengths[b];
    case HR_MASK_DENSE: return m->allowed[AT(*m, b, h, i, j)] != 0;
    case HR_MASK_BIAS: return m->bias[AT(*m, b, h, i, j)] != -INFINITY;
    default: return 1;
  }
}

static int32_t run_core(const hr_core_problem* p) {
  const float* q = (const float*)p->q.data;
  const float* k = (const float*)p->k.data;
  const float* v = (const float*)p->v.data;
  float* o = (float*)p->o.data;
  float* z = (float*)malloc((size_t)p->kv_len * sizeof(float));
  if (z == NULL) return HR_UNSUPPORTED; /* too long for this machine: decline */
  const int64_t group = p->q_heads / p->kv_heads;
  for (int64_t b = 0; b < p->batch; ++b) {
    for (int64_t h = 0; h < p->q_heads; ++h) {
      const int64_t g = h / group;
      for (int64_t i = 0; i < p->q_len; ++i) {
        float m = -INFINITY;
        for (int64_t j = 0; j < p->kv_len; ++j) {
          if (!visible(p, b, h, i, j)) {
            z[j] = -INFINITY;
            continue;
          }
          float dot = 0.0f;
          for (int64_t d = 0; d < p->key_dim; ++d) dot += q[AT(p->q, b, h, i, d)] * k[AT(p->k, b, g, j, d)];
          z[j] = p->scale * dot;
          if (p->mask.kind == HR_MASK_BIAS) z[j] += p->mask.bias[AT(p->mask, b, h, i, j)];
          if (z[j] > m) m = z[j];
        }
        /* Sums in blocks of 64 keys, each added to the total: one running sum
         * over a long row dominated by one key stagnates (see the top). */
        float sum = 0.0f, part = 0.0f;
        for (int64_t j = 0; j < p->kv_len; ++j) {
          z[j] = z[j] == -INFINITY ? 0.0f : expf(z[j] - m);
          part += z[j];
          if (j % 64 == 63) sum += part, part = 0.0f;
        }
        sum += part;
        for (int64_t d = 0; d < p->value_dim; ++d) {
          float acc = 0.0f, acc_part = 0.0f;
          for (int64_t j = 0; j < p->kv_len; ++j) {
            acc_part += z[j] * v[AT(p->v, b, g, j, d)];
            if (j % 64 == 63) acc += acc_part, acc_part = 0.0f;
          }
          acc += acc_part;
          o[AT(p->o, b, h, i, d)] = sum > 0.0f ? acc / sum : 0.0f;
        }
        if (p->lse != NULL) p->lse[(b * p->q_heads + h) * p->q_len + i] = sum > 0.0f ? m + logf(sum) : -INFINITY;
      }
    }
  }
  free(z);
  return HR_OK;
}

/* Designated initializers: every field not named is zero, which for each
 * version-2 field means "no constraint, no feature" (kernel_abi.h). */
static const hr_kernel kMyKernel = {
    .abi_version = HEADROOM_ABI_VERSION,
    .name = "my_kernel",
    .description = "textbook float32 attention: max-shifted softmax, key order in blocks of 64, one pass per row",
    .level = HR_LEVEL_CORE,
    .input_format = HR_FORMAT_FLOAT32,
    .output_format = HR_FORMAT_FLOAT32,
    .mask_kinds = HR_MASK_NONE | HR_MASK_CAUSAL_TOP_LEFT | HR_MASK_CAUSAL_BOTTOM_RIGHT | HR_MASK_KEY_PADDING |
                  HR_MASK_DENSE | HR_MASK_BIAS,
    .masked_row = HR_MASKED_ROW_ZEROS,
    .returns_lse = 1,
    .layouts = HR_LAYOUT_BHTD | HR_LAYOUT_BTHD, /* strides are honoured */
    .max_kv_len = 0,                            /* no limit on the key length */
    .run_core = run_core,
    /* Version 2: a kernel with head-dim-specialised code paths would say so,
     * e.g. .key_dims = kDims with static const int32_t kDims[] = {64, 128, 0};
     * cases at other head dims are then skipped and counted, never run. */
};

const hr_kernel* headroom_kernel_entry(void) { return &kMyKernel; }
