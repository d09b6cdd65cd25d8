// headroom tests — support for the bundled-kernel tests: hand-built problems, a
// plain double-precision attention to compare with, and a runner that calls a
// kernel directly through its hr_kernel (in-process, no harness).
//
// The double reference is the textbook formula (Vaswani et al. 2017, eq. 1)
// evaluated in binary64 on exactly the values the kernel receives; its own
// error (~1e-15 relative) is far below every tolerance used here.
#pragma once

#include <cstdint>
#include <string>
#include <vector>

#include "bundled.h"

namespace kt {

/// Returns: the bundled kernel called `name`, or nullptr.
inline const hr_kernel* find_kernel(const std::string& name);

struct Shape {
  std::int64_t batch, q_heads, kv_heads, q_len, kv_len, key_dim, value_dim;
};

/// Memory layouts the runner can lay tensors out in: contiguous BHTD,
/// contiguous BTHD, and BHTD with each row padded by 3 elements.
enum class Layout { bhtd, bthd, bhtd_padded };

/// A core problem as the kernel receives it. q, k, v hold the received values
/// (already rounded to binary16/bfloat16, or dequantised int8) in contiguous
/// BHTD order; for int8 the codes and per-token scales are kept as well.
struct Problem {
  Shape s{};
  float scale = 1.0f;
  std::int32_t format = HR_FORMAT_FLOAT32;
  std::uint32_t mask_kind = HR_MASK_NONE;
  std::vector<std::int64_t> key_lengths;  // [B]
  std::int64_t mask_heads = 1;            // dense / bias: 1 or Hq
  std::vector<std::uint8_t> allowed;      // [B, mask_heads, Tq, Tk]
  std::vector<float> bias;                // [B, mask_heads, Tq, Tk]
  std::vector<double> q, k, v;
  std::vector<std::int8_t> q8, k8, v8;
  std::vector<float> q_scales, k_scales, v_scales;  // per token: [B, H, T]

  bool visible(std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t j) const;
  double bias_at(std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t j) const;
  std::int64_t kv_head(std::int64_t h) const { return h / (s.q_heads / s.kv_heads); }
};

/// Returns: a problem of shape s with Q, K, V entries N(0, sigma²) (seeded),
/// scale 1/√Dk, received as `format`: rounded to nearest for binary16 and
/// bfloat16; for int8 quantised per token, symmetric, s = max|x| / 127.
inline Problem make_problem(const Shape& s, std::int32_t format, std::uint64_t seed, double sigma = 1.0);

/// Re-derives int8 codes, or re-rounds 16-bit values, after q/k/v were edited.
inline void requantise(Problem& p);

/// Gives p the mask `kind` in a standard form that always includes hard rows:
/// key padding Tk − 2 (odd batches 0: fully masked); dense 70% visible with
/// one fully masked row, one row seeing only the last key and key 2 hidden
/// from all; bias a linear position bias −0.1·|i − j| with some −inf entries
/// and one fully masked row. Causal kinds need nothing stored.
inline void set_mask(Problem& p, std::uint32_t kind, std::uint64_t seed);

/// Returns: a copy of p whose K and V rows at keys no query of their group
/// can see are NaN (int8: code −128 and scale NaN). A kernel that honours the
/// mask gives bit-identical output on both (DESIGN.md, mask_leak).
inline Problem poisoned(const Problem& p);

/// The double-precision answer: o and weight = Σ_j p_j |v_j| per output
/// element, lse per row, masked = 1 for rows with no visible key.
struct Reference {
  std::vector<double> o, weight, lse;
  std::vector<char> masked;
};
inline Reference reference(const Problem& p);

/// One call of a kernel. o in BHTD order as doubles (output format decoded);
/// lse when the kernel returns it; intact is false when anything outside the
/// output's elements (row padding, a guard row after O, after lse) changed.
struct Output {
  std::int32_t rc = -1;
  std::vector<double> o;
  std::vector<float> lse;
  std::vector<std::uint8_t> raw;  // the output bytes, for bit comparisons
  bool intact = true;
};
inline Output run(const hr_kernel& k, const Problem& p, Layout layout = Layout::bhtd);

/// Compared with the reference: worst |o − o*| / Σ_j p_j|v_j| over rows with a
/// visible key (inf on NaN), worst |lse − lse*| / max(1, |lse*|), and how many
/// fully masked rows broke the zeros convention (O not all ±0, or lse not −inf).
struct Score {
  double worst = 0.0, worst_lse = 0.0;
  int bad_masked_rows = 0;
  std::string where;  // of the worst element
};
inline Score score(const Problem& p, const Reference& r, const Output& out);

/// The multi-head block (kernel_abi.h, hr_block_problem) in float32 values.
struct BlockProblem {
  std::int64_t batch = 1, q_len = 1, kv_len = 1, model_dim = 1, q_heads = 1, kv_heads = 1, key_dim = 1, value_dim = 1;
  float scale = 1.0f;
  std::vector<float> x_q, x_kv, w_q, w_k, w_v, w_o, b_q, b_k, b_v, b_o;
  Problem attention;  // shape and mask of the attention inside; its q/k/v unused
};
/// Returns: a block problem with X ~ N(0, 1), W ~ N(0, 1/Dm), small biases, mask none.
inline BlockProblem make_block(std::int64_t batch, std::int64_t q_len, std::int64_t kv_len, std::int64_t model_dim,
                               std::int64_t q_heads, std::int64_t kv_heads, std::int64_t head_dim, std::uint64_t seed);
/// y* in double, and per element a magnitude Σ_c (Σ_j p_j|v_jc|)·|W_o[c, n]| + |b_o[n]|
/// that a float32 error is measured against.
struct BlockReference {
  std::vector<double> y, magnitude;
};
inline BlockReference block_reference(const BlockProblem& p);
/// Returns: Y as computed by the block kernel k ([B, Tq, Dm]), and its return code in rc.
inline std::vector<double> run_block(const hr_kernel& k, const BlockProblem& p, std::int32_t* rc);

}  // namespace kt

#include "kernels_support.hpp"  // the bodies (header-only: each test file is its own executable)
