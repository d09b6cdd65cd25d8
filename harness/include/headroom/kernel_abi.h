/* headroom — the plain C99 interface an attention kernel plug-in compiles against.
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
 *
 * Versions (docs/kernel-abi-v2.md has the design and the rules of evolution):
 *   1  forward kernels: level, formats (float64, float32, binary16, bfloat16,
 *      int8 with scales), masks, masked-row convention, log-sum-exp, layouts,
 *      max_kv_len.
 *   2  appended, never reordered, so a version-1 plug-in still loads and runs:
 *      - shapes a kernel accepts: key_dims, value_dims, head_dim_multiple,
 *        kv_len_multiple, max_q_len, max_batch;
 *      - 8-bit floats: HR_FORMAT_E4M3, HR_FORMAT_E5M2, HR_QUANT_PER_BLOCK with
 *        q_block/k_block/v_block, fp8_saturating, p_quant, p_scale;
 *      - inference variants: features (paged K/V, packed variable lengths,
 *        split-KV partials, sliding windows, soft-capping, sink logits),
 *        split_kv_len, and the tail of hr_core_problem that carries them;
 *      - backward: hr_backward_problem, run_backward, backward_flags.
 *      Every addition is neutral at zero; headroom gives a kernel only problems
 *      its declaration covers, and refuses a declaration asking for something
 *      this build of headroom does not judge yet, naming the field.
 */
#ifndef HEADROOM_KERNEL_ABI_H
#define HEADROOM_KERNEL_ABI_H

#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

/* Bumped on any change to the structures below. headroom loads every version
 * from HEADROOM_ABI_OLDEST_VERSION to HEADROOM_ABI_VERSION. */
#define HEADROOM_ABI_VERSION 2
#define HEADROOM_ABI_OLDEST_VERSION 1

/* The symbol a plug-in exports. */
#define HEADROOM_KERNEL_ENTRY "headroom_kernel_entry"

/* Element formats. Storage: float64 `double`, float32 `float`, binary16 and
 * bfloat16 `uint16_t` bit patterns, int8 `int8_t` codes (see hr_quant), and
 * (version 2) E4M3 / E5M2 `uint8_t` codes of the OCP 8-bit floating point
 * formats, whose value is decode(code) * scale, the scales as for int8 with no
 * zero points. */
typedef enum hr_format {
  HR_FORMAT_FLOAT64 = 0,
  HR_FORMAT_FLOAT32 = 1,
  HR_FORMAT_BINARY16 = 2,
  HR_FORMAT_BFLOAT16 = 3,
  HR_FORMAT_INT8 = 4,
  HR_FORMAT_E4M3 = 5, /* version 2: bias 7, no infinities, largest finite 448 */
  HR_FORMAT_E5M2 = 6  /* version 2: bias 15, IEEE-like, largest finite 57344 */
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
 * (index (b*H + h)*T + t), per channel H*D (index h*D + d), and (version 2)
 * per block of blk tokens B*H*ceil(T/blk) (index (b*H + h)*ceil(T/blk) + t/blk),
 * blk being the kernel's q_block, k_block or v_block. */
typedef enum hr_granularity {
  HR_QUANT_PER_TENSOR = 0,
  HR_QUANT_PER_HEAD = 1,
  HR_QUANT_PER_TOKEN = 2,
  HR_QUANT_PER_CHANNEL = 3,
  HR_QUANT_PER_BLOCK = 4 /* version 2 */
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
  const float* scales;  /* int8: value = (code - zero_point) * scale; E4M3/E5M2: decode(code) * scale */
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

/* Version 2: keys and values in pages. Logical key t of sequence b lives in page
 * block_table[b * max_pages_per_seq + t / page_size], row t % page_size. */
typedef struct hr_paged_kv {
  hr_tensor k_pages;            /* [P, page_size, Hkv, Dk] */
  hr_tensor v_pages;            /* [P, page_size, Hkv, Dv] */
  const int32_t* block_table;   /* [B, max_pages_per_seq] page indices */
  const int64_t* seq_lens;      /* [B] keys of each sequence */
  int64_t page_size;            /* 0 when not paged */
  int64_t max_pages_per_seq;
} hr_paged_kv;

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

  /* ---- version 2 (zero, hence neutral, unless the case uses a feature the
   * kernel declared in hr_kernel.features) ---- */
  uint32_t features;                 /* the HR_FEATURE_* bits this problem uses; a field
                                        below means something only when its bit is set */
  int64_t window_left, window_right; /* HR_FEATURE_WINDOW: key j visible to query i only
                                        when i' - window_left <= j <= i' + window_right,
                                        i' = i under HR_MASK_CAUSAL_TOP_LEFT, else
                                        i + Tk - Tq; -1 leaves that side open */
  float softcap;                     /* HR_FEATURE_SOFTCAP: c > 0 replaces each scaled score
                                        z by c * tanh(z / c) before bias and mask; 0: none */
  const float* sinks;                /* HR_FEATURE_SINKS: [Hq] logits; exp(sinks[h]) joins each
                                        row's normaliser (and lse) with no value row; a row with
                                        no visible key stays fully masked; NULL: none */
  const int64_t* cu_q_lens;          /* HR_FEATURE_VARLEN: [B + 1] offsets of each sequence's
                                        rows in the packed q and o (extents [1, H, total, D]);
                                        q_len is then the largest length, lse [1, Hq, total];
                                        each sequence its own problem (causal alignment and
                                        window on its own lengths); NULL: dense */
  const int64_t* cu_kv_lens;         /* HR_FEATURE_VARLEN: [B + 1], likewise for k and v */
  hr_paged_kv paged;                 /* HR_FEATURE_PAGED_KV: k and v data are NULL and the
                                        keys and values live in pages */
  hr_out_tensor o_partials;          /* HR_FEATURE_SPLIT_PARTIALS: [S, B*Hq, Tq, Dv], split s
                                        over keys [s*split_kv_len, (s+1)*split_kv_len);
                                        data NULL otherwise */
  float* lse_partials;               /* [S, B, Hq, Tq] contiguous, with o_partials */
  int64_t num_splits;                /* S; 0 when o_partials is absent */
} hr_core_problem;

/* Version 2: the backward pass. With S = scale * Q K^T + mask, P = softmax(S),
 * O = P V and the upstream gradient dO: dV = P^T dO, dP = dO V^T,
 * D_i = sum_d dO_id O_id, dS = P o (dP - D), dQ = scale * dS K,
 * dK = scale * dS^T Q; grouped-query dK and dV sum over every query head of
 * the group; d(bias) = dS. */
typedef struct hr_backward_problem {
  hr_core_problem forward;     /* shape, scale, mask, q, k, v and the version-2 fields;
                                  forward.o and forward.lse are unused (NULL) */
  hr_tensor o;                 /* [B, Hq, Tq, Dv] the forward output given to the backward */
  const float* lse;            /* [B, Hq, Tq] contiguous, natural log */
  hr_tensor d_o;               /* [B, Hq, Tq, Dv] in the input format */
  hr_out_tensor d_q, d_k, d_v; /* extents of q, k, v; in the output format */
  float* d_bias;               /* [B, Hm, Tq, Tk] contiguous when the kernel declares
                                  HR_BACKWARD_BIAS_GRAD and the mask is a bias; else NULL */
} hr_backward_problem;

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

/* Version 2: hr_kernel.features bits, what else a kernel accepts. */
#define HR_FEATURE_PAGED_KV (1u << 0)       /* hr_core_problem.paged */
#define HR_FEATURE_VARLEN (1u << 1)         /* cu_q_lens, cu_kv_lens */
#define HR_FEATURE_SPLIT_PARTIALS (1u << 2) /* writes o_partials and lse_partials */
#define HR_FEATURE_WINDOW (1u << 3)         /* window_left, window_right */
#define HR_FEATURE_SOFTCAP (1u << 4)        /* softcap */
#define HR_FEATURE_SINKS (1u << 5)          /* sinks */

/* Version 2: hr_kernel.p_quant, the format the probabilities are rounded to
 * before P V (after multiplying by p_scale; divided by it after). */
#define HR_PQUANT_NONE 0
#define HR_PQUANT_E4M3 1
#define HR_PQUANT_E5M2 2

/* Version 2: hr_kernel.backward_flags bits. */
#define HR_BACKWARD_RECOMPUTES (1u << 0)       /* ignores o and lse and recomputes them */
#define HR_BACKWARD_NONDETERMINISTIC (1u << 1) /* atomics: judged on spread, not bit equality */
#define HR_BACKWARD_BIAS_GRAD (1u << 2)        /* writes d_bias */

/* A kernel's declaration of itself. Version 2 fields follow run_block; a
 * version-1 plug-in's declaration ends at run_block and headroom reads no
 * further. Every version-2 field is neutral at zero (NULL lists mean any). */
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

  /* ---- version 2: shapes accepted ---- */
  const int32_t* key_dims;   /* zero-terminated list of accepted Dk (at most 64); NULL: any */
  const int32_t* value_dims; /* likewise Dv; NULL: any */
  int32_t head_dim_multiple; /* Dk and Dv must be multiples of this; 0 or 1: any */
  int32_t kv_len_multiple;   /* Tk must be a multiple of this; 0 or 1: any */
  int64_t max_q_len;         /* largest Tq accepted; 0: no limit */
  int64_t max_batch;         /* largest batch accepted; 0: no limit */

  /* ---- version 2: 8-bit floats ---- */
  int32_t q_block, k_block, v_block; /* tokens per scale block with HR_QUANT_PER_BLOCK */
  int32_t fp8_saturating;    /* 1: the kernel's conversions saturate to the largest finite
                                value; 0: overflow gives NaN (E4M3) or infinity (E5M2) */
  int32_t p_quant;           /* an HR_PQUANT_* value */
  float p_scale;             /* P multiplied by this before rounding; 0 means 1 */

  /* ---- version 2: inference variants ---- */
  uint32_t features;         /* HR_FEATURE_* bits */
  int64_t split_kv_len;      /* HR_FEATURE_SPLIT_PARTIALS: keys per split */

  /* ---- version 2: backward ---- */
  int32_t (*run_backward)(const hr_backward_problem* p); /* NULL: forward only */
  uint32_t backward_flags;   /* HR_BACKWARD_* bits */
} hr_kernel;

/* The type of the exported entry point. */
typedef const hr_kernel* (*hr_kernel_entry_fn)(void);

#ifdef __cplusplus
}
#endif

#endif /* HEADROOM_KERNEL_ABI_H */
