// headroom — the certified d(bias) from the certified dS (reference_backward.h).
#include <cmath>
#include <stdexcept>

#include "bound_arith.h"
#include "headroom/reference_backward.h"

namespace headroom {

GradientReference bias_gradient(const BackwardReference& ref, std::int64_t mask_heads) {
  using detail::add_up;
  using detail::mul_up;
  const std::vector<std::int64_t>& e = ref.d_s.out.shape;
  if (e.size() != 4) throw std::invalid_argument("bias_gradient: the reference carries no dS");
  const std::int64_t heads = e[1];
  if (mask_heads == heads) return ref.d_s;
  if (mask_heads != 1) throw std::invalid_argument("bias_gradient: a bias has 1 or Hq heads");
  const std::int64_t cells = e[2] * e[3];
  GradientReference g{Tensor({e[0], 1, e[2], e[3]}), Tensor({e[0], 1, e[2], e[3]}), Tensor({e[0], 1, e[2], e[3]})};
  const double gamma = detail::gamma_up(heads, 0x1p-53);
  const double per_term = add_up(0x1p-52, mul_up(gamma, gamma));
  for (std::int64_t b = 0; b < e[0]; ++b)
    for (std::int64_t c = 0; c < cells; ++c) {
      // Sum2: s the running sum, t the sum of its TwoSum errors (Knuth's TwoSum, 6 operations, exact).
      double s = 0, t = 0, bound = 0, abs_sum = 0, magnitude = 0;
      for (std::int64_t h = 0; h < heads; ++h) {
        const std::size_t at = static_cast<std::size_t>((b * heads + h) * cells + c);
        const double p = ref.d_s.out.values[at];
        const double x = s + p, z = x - s;
        t += (s - (x - z)) + (p - z);
        s = x;
        bound += ref.d_s.bound.values[at];
        abs_sum += std::fabs(p);
        magnitude += ref.d_s.magnitude.values[at];
      }
      const std::size_t at = static_cast<std::size_t>(b * cells + c);
      g.out.values[at] = s + t;
      // Sums of `heads` nonnegative terms, taken upwards (bound_arith.h); exact zeros stay 0 with bound 0.
      if (bound > 0 || abs_sum > 0)
        g.bound.values[at] =
            add_up(detail::nonneg_sum_up(bound, heads), mul_up(per_term, detail::nonneg_sum_up(abs_sum, heads)));
      // A lower end: heads − 1 additions of nonnegative terms, each rounding by at most a factor 1 + 2^-53.
      g.magnitude.values[at] = detail::mul_down(magnitude, 1.0 - detail::gamma_up(heads, 0x1p-53));
    }
  return g;
}

}  // namespace headroom
