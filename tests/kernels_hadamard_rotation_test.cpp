// headroom — the head-dimension rotation of e4m3_blockwise_rotated
// (kernels/hadamard_rotation.h): orthogonal for every Dk (zero padding to a
// power of two), the same for every call, and it spreads one outlier channel
// over every rotated channel — the property incoherent processing relies on
// (Shah et al. 2024, FlashAttention-3, §3.3).
#include <gtest/gtest.h>

#include <cmath>
#include <random>
#include <vector>

#include "hadamard_rotation.h"

namespace {

using hr_kernels::rotate_row;
using hr_kernels::rotated_dim;

std::vector<double> rotated(const std::vector<float>& x) {
  std::vector<double> out(static_cast<std::size_t>(rotated_dim(static_cast<std::int64_t>(x.size()))));
  rotate_row(x.data(), static_cast<std::int64_t>(x.size()), out.data());
  return out;
}

TEST(HadamardRotation, RotatedDimIsTheNextPowerOfTwo) {
  EXPECT_EQ(rotated_dim(1), 1);
  EXPECT_EQ(rotated_dim(2), 2);
  EXPECT_EQ(rotated_dim(3), 4);
  EXPECT_EQ(rotated_dim(64), 64);
  EXPECT_EQ(rotated_dim(65), 128);
  EXPECT_EQ(rotated_dim(192), 256);
}

// (Rq)·(Rk) = q·k and ‖Rq‖ = ‖q‖ within the transform's double rounding
// (about (log2 n + 1)·2^-53 relative; 1e-13 of ‖q‖‖k‖ leaves a wide margin).
TEST(HadamardRotation, KeepsDotProductsAndNormsForEveryHeadDim) {
  std::mt19937_64 gen(5);
  std::normal_distribution<float> normal(0.0f, 1.0f);
  for (std::int64_t dk : {1, 2, 3, 7, 8, 12, 17, 64, 96, 128, 130}) {
    std::vector<float> q(static_cast<std::size_t>(dk)), k(q.size());
    for (float& x : q) x = normal(gen);
    for (float& x : k) x = normal(gen);
    const std::vector<double> rq = rotated(q), rk = rotated(k);
    double dot = 0, rdot = 0, nq = 0, nk = 0, rnq = 0;
    for (std::size_t d = 0; d < q.size(); ++d) {
      dot += static_cast<double>(q[d]) * k[d];
      nq += static_cast<double>(q[d]) * q[d];
      nk += static_cast<double>(k[d]) * k[d];
    }
    for (std::size_t d = 0; d < rq.size(); ++d) {
      rdot += rq[d] * rk[d];
      rnq += rq[d] * rq[d];
    }
    const double tol = 1e-13 * std::sqrt(nq * nk);
    EXPECT_NEAR(rdot, dot, tol) << "Dk " << dk;
    EXPECT_NEAR(std::sqrt(rnq), std::sqrt(nq), 1e-13 * std::sqrt(nq)) << "Dk " << dk;
  }
}

// One outlier channel becomes n channels of magnitude |x|/√n each (R's
// entries are ±1/√n), whichever channel holds it; the signs differ between
// channels, so the rotation is not the plain transform.
TEST(HadamardRotation, SpreadsAnOutlierOverEveryChannel) {
  const std::int64_t dk = 64;
  int negative_first = 0;
  for (std::int64_t c = 0; c < dk; ++c) {
    std::vector<float> x(static_cast<std::size_t>(dk), 0.0f);
    x[static_cast<std::size_t>(c)] = 100.0f;
    const std::vector<double> r = rotated(x);
    for (double v : r) ASSERT_NEAR(std::abs(v), 100.0 / 8.0, 1e-12) << "channel " << c;
    negative_first += r[0] < 0 ? 1 : 0;
  }
  // Row 0 of the plain transform is all +1: R's first entries follow S's signs.
  EXPECT_GT(negative_first, 0);
  EXPECT_LT(negative_first, dk);
}

TEST(HadamardRotation, EveryCallRotatesAlike) {
  const std::vector<float> x = {1.5f, -2.0f, 0.25f, 3.0f, -0.5f};
  EXPECT_EQ(rotated(x), rotated(x));
}

}  // namespace
