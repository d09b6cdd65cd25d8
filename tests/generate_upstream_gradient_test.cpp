// headroom — tests of the upstream gradients dO (upstream_gradient.h): shapes, kinds, determinism.
#include "headroom/upstream_gradient.h"

#include <gtest/gtest.h>

#include <cmath>

#include "headroom/generate.h"

namespace headroom {
namespace {

const CoreShape kShape{2, 4, 2, 16, 9, 8, 12};

TEST(UpstreamGradient, EveryKindHasTheOutputShapeAndFloat32Values) {
  for (UpstreamKind kind : kUpstreamKinds) {
    SCOPED_TRACE(std::string(upstream_kind_name(kind)));
    EXPECT_EQ(parse_upstream_kind(upstream_kind_name(kind)), kind);
    const Tensor t = upstream_gradient(kShape, kind, 42);
    EXPECT_EQ(t.shape, (std::vector<std::int64_t>{2, 4, 16, 12}));
    for (double x : t.values) {
      EXPECT_TRUE(std::isfinite(x));
      EXPECT_EQ(static_cast<double>(static_cast<float>(x)), x);
    }
    EXPECT_TRUE(bit_identical(t, upstream_gradient(kShape, kind, 42)));
    EXPECT_FALSE(bit_identical(t, upstream_gradient(kShape, kind, 43)));
  }
  EXPECT_FALSE(parse_upstream_kind("cauchy").has_value());
}

TEST(UpstreamGradient, KindsHaveTheirDocumentedCharacter) {
  const Tensor hot = upstream_gradient(kShape, UpstreamKind::one_hot, 7);
  for (std::size_t row = 0; row < hot.values.size() / 12; ++row) {
    int nonzero = 0;
    for (std::size_t d = 0; d < 12; ++d) {
      const double x = hot.values[row * 12 + d];
      if (x != 0) {
        ++nonzero;
        EXPECT_EQ(std::fabs(x), 1.0);
      }
    }
    EXPECT_EQ(nonzero, 1) << "row " << row;
  }
  // Heavy tails: Student's t with 3 degrees of freedom has kurtosis far above
  // the Gaussian's 3 (infinite in theory; a sample of 1536 shows it plainly).
  auto kurtosis = [](const Tensor& t) {
    double m2 = 0, m4 = 0;
    for (double x : t.values) {
      m2 += x * x;
      m4 += x * x * x * x;
    }
    const double n = static_cast<double>(t.values.size());
    return (m4 / n) / ((m2 / n) * (m2 / n));
  };
  EXPECT_LT(kurtosis(upstream_gradient(kShape, UpstreamKind::gaussian, 7)), 4.0);
  EXPECT_GT(kurtosis(upstream_gradient(kShape, UpstreamKind::heavy_tailed, 7)), 5.0);
  double largest = 0;
  for (double x : upstream_gradient(kShape, UpstreamKind::large, 7).values) largest = std::max(largest, std::fabs(x));
  EXPECT_GT(largest, 4096.0);
  EXPECT_LT(largest, 65504.0);  // stays within binary16
}

TEST(UpstreamGradient, ACaseWithoutOneGetsADeterministicOneAndKeepsItsOwn) {
  const Case c = make_case({"gaussian", 3, 40, kShape, std::nullopt, std::nullopt, std::nullopt, {}});
  ASSERT_TRUE(c.d_o.values.empty());
  const Tensor a = upstream_gradient_for(c);
  EXPECT_EQ(a.shape, (std::vector<std::int64_t>{2, 4, 16, 12}));
  EXPECT_TRUE(bit_identical(a, upstream_gradient_for(c)));
  Case own = c;
  own.d_o = upstream_gradient(kShape, UpstreamKind::large, 1);
  EXPECT_TRUE(bit_identical(upstream_gradient_for(own), own.d_o));
}

}  // namespace
}  // namespace headroom
