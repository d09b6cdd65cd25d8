// headroom — Tensor's out-of-line members and bit-level comparison.
#include "headroom/tensor.h"

#include <bit>
#include <cstdint>
#include <stdexcept>
#include <string>

namespace headroom {

Tensor::Tensor(std::vector<std::int64_t> extents) : shape(std::move(extents)) {
  for (std::size_t axis = 0; axis < shape.size(); ++axis) {
    if (shape[axis] < 0) {
      throw std::invalid_argument("Tensor: extent " + std::to_string(shape[axis]) + " of axis " +
                                  std::to_string(axis) + " is negative");
    }
  }
  values.assign(static_cast<std::size_t>(size()), 0.0);
}

std::int64_t Tensor::size() const {
  std::int64_t n = 1;
  for (std::int64_t extent : shape) n *= extent;
  return n;
}

bool bit_identical(const Tensor& a, const Tensor& b) {
  if (a.shape != b.shape || a.values.size() != b.values.size()) return false;
  for (std::size_t i = 0; i < a.values.size(); ++i) {
    // Compare patterns, not values: == would call -0 equal to +0 and NaN unequal to itself.
    if (std::bit_cast<std::uint64_t>(a.values[i]) != std::bit_cast<std::uint64_t>(b.values[i])) return false;
  }
  return true;
}

}  // namespace headroom
