// headroom — a dense, row-major tensor of exact values.
//
// Every tensor the harness handles holds doubles: the exact values a kernel
// received (see format.h). Shapes are small vectors of extents; the last axis
// varies fastest.
#pragma once

#include <cstdint>
#include <initializer_list>
#include <vector>

namespace headroom {

struct Tensor {
  std::vector<std::int64_t> shape;
  std::vector<double> values;

  Tensor() = default;
  /// Returns: a zero tensor of the given shape. Preconditions: extents ≥ 0.
  explicit Tensor(std::vector<std::int64_t> extents);

  /// Returns: the product of the extents (1 for a rank-0 tensor).
  std::int64_t size() const;
  std::int64_t rank() const { return static_cast<std::int64_t>(shape.size()); }

  /// Returns: the row-major offset of a 4-index position. Preconditions: rank 4.
  std::int64_t offset(std::int64_t i0, std::int64_t i1, std::int64_t i2, std::int64_t i3) const {
    return ((i0 * shape[1] + i1) * shape[2] + i2) * shape[3] + i3;
  }
  /// Returns: the row-major offset of a 3-index position. Preconditions: rank 3.
  std::int64_t offset(std::int64_t i0, std::int64_t i1, std::int64_t i2) const {
    return (i0 * shape[1] + i1) * shape[2] + i2;
  }
  double& at(std::int64_t i0, std::int64_t i1, std::int64_t i2, std::int64_t i3) {
    return values[static_cast<std::size_t>(offset(i0, i1, i2, i3))];
  }
  double at(std::int64_t i0, std::int64_t i1, std::int64_t i2, std::int64_t i3) const {
    return values[static_cast<std::size_t>(offset(i0, i1, i2, i3))];
  }
  double& at(std::int64_t i0, std::int64_t i1, std::int64_t i2) {
    return values[static_cast<std::size_t>(offset(i0, i1, i2))];
  }
  double at(std::int64_t i0, std::int64_t i1, std::int64_t i2) const {
    return values[static_cast<std::size_t>(offset(i0, i1, i2))];
  }
};

/// Returns: true when shapes are equal and every value is bit-identical
/// (so -0 differs from +0 and NaNs compare by payload).
bool bit_identical(const Tensor& a, const Tensor& b);

}  // namespace headroom
