// headroom bench — the inputs every timed row uses: one head, unmasked, scale
// 1/sqrt(D), Q/K/V (and dO) drawn N(0, 1) from one seeded stream and rounded
// to float32, each tensor drawn in the order the caller asks for it.
#pragma once

#include <cmath>
#include <cstdint>
#include <random>
#include <utility>
#include <vector>

#include "headroom/problem.h"
#include "headroom/tensor.h"

namespace bench {

/// Float32-valued N(0, 1) tensors from one seeded stream: the same seed and the
/// same sequence of shapes give the same values.
class GaussianTensors {
 public:
  explicit GaussianTensors(std::uint64_t seed) : rng_(seed) {}
  headroom::Tensor operator()(std::vector<std::int64_t> shape) {
    headroom::Tensor x(std::move(shape));
    for (double& v : x.values) v = static_cast<float>(dist_(rng_));
    return x;
  }

 private:
  std::mt19937_64 rng_;
  std::normal_distribution<double> dist_{0.0, 1.0};
};

/// Returns: the shape [1, 1, 1, tq, t, d, d] with scale 1/sqrt(d), no mask.
inline headroom::CoreProblem one_head_problem(std::int64_t tq, std::int64_t t, std::int64_t d) {
  headroom::CoreProblem p;
  p.shape = {1, 1, 1, tq, t, d, d};
  p.scale = static_cast<float>(1.0 / std::sqrt(static_cast<double>(d)));
  return p;
}

}  // namespace bench
