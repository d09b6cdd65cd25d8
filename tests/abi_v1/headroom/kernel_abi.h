/* FROZEN: kernel_abi.h as released at version 1 (never edit). tests/CMakeLists.txt builds
 * examples/plugin/my_kernel.c against it, so attach_abi_versions_test proves that a
 * plug-in built against version 1 still loads and runs (docs/kernel-abi-v2.md).
 *
 * headroom — the plain C99 interface an attention kernel plug-in compiles against.
 *
 * A plug-in is a shared library exporting one symbol:
 *
 *     const hr_kernel* headroom_kernel_entry(void);
 *
 * returning a static declaration whose `abi_version` equals HEADROOM_ABI_VERSION.
 * headroom checks the version on load and refuses a mismatch with a message
 * naming the file. The declaration says what the kernel is (formats, masks,
 * conventions, layouts); headroom only ever calls it with problems it declared
 * it supports, and judges it against what it declared.
 *
 * Tensors are given as a data pointer, four extents and four strides counted in
 * elements (not bytes). Index (i0, i1, i2, i3) lives at
 * data + i0*strides[0] + i1*strides[1] + i2*strides[2] + i3*strides[3].
 * Unused leading extents are 1. Inputs are read-only; a kernel must write every
 * element of every output, and nothing outside them.
 *
 * What headroom guarantees about the buffers (and checks): the byte after an
 * input's last element is the first of an inaccessible page, so an input's
 * start is aligned only to its element size — use unaligned loads; outputs
 * arrive filled with a quiet NaN, so an element left unwritten reads as NaN,
 * and are fenced by canary bytes on both sides.
 *
 * No C++ here, no harness internals: this header stands alone.
 */
#ifndef HEADROOM_KERNEL_ABI_H
#define HEADROOM_KERNEL_ABI_H

#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

/* Bumped on any change to the structures below. */
#define HEADROOM_ABI_VERSION 1

/* The symbol a plug-in exports. */
#define HEADROOM_KERNEL_ENTRY "headroom_kernel_entry"

/* Element formats. Storage: float64 `double`, float32 `float`, binary16 and
 * bfloat16 `uint16_t` bit patterns, int8 `int8_t` codes (see hr_quant). */
typedef enum hr_format {
  HR_FORMAT_FLOAT64 = 0,
  HR_FORMAT_FLOAT32 = 1,
  HR_FORMAT_BINARY16 = 2,
  HR_FORMAT_BFLOAT16 = 3,
  HR_FORMAT_INT8 = 4
} hr_format;

/* What the kernel computes: core attention, or the whole multi-head block. */
typedef enum hr_level { HR_LEVEL_CORE = 0, HR_LEVEL_BLOCK = 1 } hr_level;

/* Mask kinds, as bits of hr_kernel.mask_kinds (what the kernel supports) and
 * as the single value of a problem's mask_kind. */
#define HR_MASK_NONE (1u << 0)                /* every key visible */
#define HR_MASK_CAUSAL_TOP_LEFT (1u << 1)     /* key j visible to query i iff j <= i */
#define HR_MASK_CAUSAL_BOTTOM_RIGHT (1u << 2) /* iff j <= i + (Tk - Tq) */
#define HR_MASK_KEY_PADDING (1u << 3)         /* iff j < key_lengths[b] */
#define HR_MASK_DENSE (1u << 4)               /* iff mask[b, h|0, i, j] != 0 */
#define HR_MASK_BIAS (1u << 5)                /* bias[b, h|0, i, j] added to the scaled score; -inf masks */

/* What the kernel writes for a query row with no visible key. */
typedef enum hr_masked_row {
  HR_MASKED_ROW_ZEROS = 0,      /* the row of O is all +0 or -0; log-sum-exp is -inf */
  HR_MASKED_ROW_NAN = 1,        /* the row of O is all NaN; log-sum-exp is NaN or -inf */
  HR_MASKED_ROW_NEVER_CALLED = 2 /* the kernel must not be given such rows */
} hr_masked_row;

/* int8 quantisation granularity of one input (see headroom/quant.h). On a
 * [B, H, T, D] tensor: per tensor 1 scale, per head H, per token B*H*T
 * (index (b*H + h)*T + t), per channel H*D (index h*D + d). */
typedef enum hr_granularity {
  HR_QUANT_PER_TENSOR = 0,
  HR_QUANT_PER_HEAD = 1,
  HR_QUANT_PER_TOKEN = 2,
  HR_QUANT_PER_CHANNEL = 3
} hr_granularity;

typedef struct hr_quant {
  int32_t granularity; /* an hr_granularity */
  int32_t asymmetric;  /* 0: zero point 0, codes in [-127, 127]; 1: zero points given */
} hr_quant;

/* Layouts, as bits of hr_kernel.layouts. They name the order of the axes in
 * memory; strides then say exactly where each element is. */
#define HR_LAYOUT_BHTD (1u << 0) /* [batch, head, token, dim], dim fastest */
#define HR_LAYOUT_BTHD (1u << 1) /* [batch, token, head, dim], dim fastest */

typedef struct hr_tensor {
  const void* data;     /* NULL when the tensor is absent (e.g. an unused bias) */
  int32_t format;       /* an hr_format */
  int64_t extents[4];
  int64_t strides[4];   /* in elements */
  const float* scales;  /* int8 only: dequantised value = (code - zero_point) * scale */
  const int32_t* zero_points; /* int8 asymmetric only, one per scale */
} hr_tensor;

typedef struct hr_out_tensor {
  void* data;
  int32_t format;
  int64_t extents[4];
  int64_t strides[4];
} hr_out_tensor;

/* The mask of one problem. */
typedef struct hr_mask {
  uint32_t kind;              /* exactly one HR_MASK_* bit */
  const int64_t* key_lengths; /* HR_MASK_KEY_PADDING: [batch] */
  const uint8_t* allowed;     /* HR_MASK_DENSE: extents [B, Hm, Tq, Tk], Hm 1 or Hq */
  const float* bias;          /* HR_MASK_BIAS: extents [B, Hm, Tq, Tk] */
  int64_t extents[4];         /* of allowed or bias; extents[1] is Hm (1 or Hq) */
  int64_t strides[4];         /* of allowed or bias, in elements; stride 0 broadcasts:
                                 when Hm is 1, strides[1] is 0, so [b, h, i, j] reads
                                 the right entry for every query head h */
} hr_mask;

/* Core attention: O[b,h,i,:] = softmax_j(scale * Q[b,h,i,:].K[b,g,j,:] + bias) V[b,g,j,:]
 * with g = h / (q_heads / kv_heads). */
typedef struct hr_core_problem {
  int64_t batch, q_heads, kv_heads, q_len, kv_len, key_dim, value_dim;
  float scale;     /* use exactly this value */
  hr_mask mask;
  hr_tensor q;     /* extents [B, Hq, Tq, Dk] (strides give the layout) */
  hr_tensor k;     /* [B, Hkv, Tk, Dk] */
  hr_tensor v;     /* [B, Hkv, Tk, Dv] */
  hr_out_tensor o; /* [B, Hq, Tq, Dv], in hr_kernel.output_format */
  float* lse;      /* [B, Hq, Tq] contiguous natural-log log-sum-exp of the scaled
                      scores; non-NULL only when the kernel declares returns_lse */
} hr_core_problem;

/* The multi-head block: Q = X_q W_q + b_q (head h owns columns h*Dk .. h*Dk+Dk-1),
 * K = X_kv W_k + b_k, V = X_kv W_v + b_v, Y = concat_h(O_h) W_o + b_o. */
typedef struct hr_block_problem {
  int64_t batch, q_len, kv_len, model_dim, q_heads, kv_heads, key_dim, value_dim;
  float scale;
  hr_mask mask;
  hr_tensor x_q;  /* extents [1, B, Tq, Dm] */
  hr_tensor x_kv; /* [1, B, Tk, Dm] */
  hr_tensor w_q;  /* [1, 1, Dm, Hq*Dk] */
  hr_tensor w_k;  /* [1, 1, Dm, Hkv*Dk] */
  hr_tensor w_v;  /* [1, 1, Dm, Hkv*Dv] */
  hr_tensor w_o;  /* [1, 1, Hq*Dv, Dm] */
  hr_tensor b_q, b_k, b_v, b_o; /* [1, 1, 1, n]; data NULL when absent */
  hr_out_tensor y; /* [1, B, Tq, Dm] */
} hr_block_problem;

/* Return codes of a run. */
#define HR_OK 0
#define HR_UNSUPPORTED 1 /* the kernel declines this problem; not a fault, but counted */

/* A kernel's declaration of itself. */
typedef struct hr_kernel {
  uint32_t abi_version;     /* HEADROOM_ABI_VERSION */
  const char* name;         /* short, unique, [a-z0-9_.-] */
  const char* description;  /* one line: the method */
  int32_t level;            /* an hr_level */
  int32_t input_format;     /* an hr_format: Q, K, V (core) or X, W, b (block) */
  int32_t output_format;    /* an hr_format other than int8 */
  hr_quant q_quant, k_quant, v_quant; /* when input_format is int8 */
  uint32_t mask_kinds;      /* HR_MASK_* bits supported */
  int32_t masked_row;       /* an hr_masked_row */
  int32_t returns_lse;      /* 1: writes hr_core_problem.lse */
  uint32_t layouts;         /* HR_LAYOUT_* bits accepted for q, k, v and o */
  int64_t max_kv_len;       /* longest key sequence accepted; 0 = no limit */
  int32_t (*run_core)(const hr_core_problem* p);   /* level core; else NULL */
  int32_t (*run_block)(const hr_block_problem* p); /* level block; else NULL */
} hr_kernel;

/* The type of the exported entry point. */
typedef const hr_kernel* (*hr_kernel_entry_fn)(void);

#ifdef __cplusplus
}
#endif

#endif /* HEADROOM_KERNEL_ABI_H */
