// headroom kernels — the pieces of the multi-head block kernels in float32:
// the input projections split into heads, the attention of the heads (through
// f32_textbook's ABI entry), and the output projection.
//
// Shapes (kernel_abi.h, hr_block_problem): X [1, B, T, Dm], W [1, 1, Dm, H·D],
// b [1, 1, 1, H·D] (data NULL when absent); head h owns columns [h·D, (h+1)·D).
// Each kernel concatenates the heads itself, between attend_heads and
// output_projection, so that step is visible in its own file.
#pragma once

#include <cstdint>
#include <vector>

#include "headroom/kernel_abi.h"

namespace hr_kernels {

/// Returns: whether every present block tensor is float32 and the mask kind is known.
bool block_inputs_float32(const hr_block_problem& p);

/// Returns: X W + b split into heads, contiguous [B, heads, T, head_dim]:
/// out[b, h, t, e] = Σ_m X[0, b, t, m]·W[0, 0, m, h·head_dim + e] + b[h·head_dim + e],
/// summed in float32 in index order m, bias added last.
std::vector<float> project_heads(const hr_tensor& x, const hr_tensor& w, const hr_tensor& bias, std::int64_t batch,
                                 std::int64_t len, std::int64_t model_dim, std::int64_t heads, std::int64_t head_dim);

/// Returns: the attention of every head, contiguous [B, Hq, Tq, Dv], from the
/// projected q [B, Hq, Tq, Dk], k [B, Hkv, Tk, Dk], v [B, Hkv, Tk, Dv], computed
/// by f32_textbook through its hr_kernel entry with the block's scale and mask.
std::vector<float> attend_heads(const hr_block_problem& p, const std::vector<float>& q, const std::vector<float>& k,
                                const std::vector<float>& v);

/// Writes Y[0, b, t, :] = concat[b, t, :] W_o + b_o for concat contiguous
/// [B, Tq, Hq·Dv], summed in float32 in index order, bias added last.
void output_projection(const hr_block_problem& p, const std::vector<float>& concat);

}  // namespace hr_kernels
