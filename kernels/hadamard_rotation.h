// headroom kernels — a fixed random orthogonal rotation of the head dimension
// for incoherent processing (Shah et al. 2024, FlashAttention-3, §3.3: Q and K
// multiplied by the same random orthogonal matrix before quantising, so an
// outlier is spread over every channel and QKᵀ is unchanged).
//
// The matrix (our own construction of the kind §3.3 describes): R = H·S/√n
// on n = the smallest power of two ≥ Dk, H the n × n Walsh–Hadamard matrix
// (Sylvester's, entries ±1), S a fixed diagonal of pseudo-random signs (a
// splitmix64 stream from a fixed seed, so every call rotates alike). A row
// of Dk < n entries is padded with zeros first: padding preserves dot products
// and R is orthogonal, so (R·q)·(R·k) = q·k for every Dk.
// Arithmetic: double, the fast transform's n·log2(n) additions and one scaling;
// |computed − exact| ≤ about (log2(n) + 1)·2^-53·‖x‖ per entry, far below the
// E4M3 rounding (2^-4) the rotated values go to next.
#pragma once

#include <cstdint>
#include <vector>

namespace hr_kernels {

/// Returns: the rotated length n for a head dimension dk ≥ 1 (the smallest
/// power of two ≥ dk).
std::int64_t rotated_dim(std::int64_t dk);

/// Writes R·x into out[0..n) for x = in[0..dk) padded with zeros, n = rotated_dim(dk).
/// Preconditions: out holds n doubles; in and out do not overlap.
void rotate_row(const float* in, std::int64_t dk, double* out);

}  // namespace hr_kernels
