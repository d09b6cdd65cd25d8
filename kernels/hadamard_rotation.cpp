// headroom kernels — the fixed head-dimension rotation (hadamard_rotation.h).
#include "hadamard_rotation.h"

#include <cmath>

namespace hr_kernels {
namespace {

// splitmix64 (Steele, Lea and Flood 2014): one step of the stream, our seed.
std::uint64_t splitmix64(std::uint64_t x) {
  x += 0x9E3779B97F4A7C15ull;
  x = (x ^ (x >> 30)) * 0xBF58476D1CE4E5B9ull;
  x = (x ^ (x >> 27)) * 0x94D049BB133111EBull;
  return x ^ (x >> 31);
}

constexpr std::uint64_t kSignSeed = 0x6865616472306f6dull;  // any fixed value: the rotation is part of the kernel

double sign_of(std::int64_t d) { return (splitmix64(kSignSeed + static_cast<std::uint64_t>(d)) >> 63) ? -1.0 : 1.0; }

}  // namespace

std::int64_t rotated_dim(std::int64_t dk) {
  std::int64_t n = 1;
  while (n < dk) n *= 2;
  return n;
}

void rotate_row(const float* in, std::int64_t dk, double* out) {
  const std::int64_t n = rotated_dim(dk);
  for (std::int64_t d = 0; d < n; ++d) out[d] = d < dk ? sign_of(d) * static_cast<double>(in[d]) : 0.0;
  // The fast Walsh–Hadamard transform, in place: log2(n) butterfly stages.
  for (std::int64_t h = 1; h < n; h *= 2) {
    for (std::int64_t i = 0; i < n; i += 2 * h) {
      for (std::int64_t j = i; j < i + h; ++j) {
        const double a = out[j], b = out[j + h];
        out[j] = a + b;
        out[j + h] = a - b;
      }
    }
  }
  const double norm = 1.0 / std::sqrt(static_cast<double>(n));
  for (std::int64_t d = 0; d < n; ++d) out[d] *= norm;
}

}  // namespace hr_kernels
