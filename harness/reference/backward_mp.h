// headroom — gradient elements of attention in interval arithmetic on MPFR, precision raised until certified.
#pragma once

#include <cstdint>
#include <memory>

#include "headroom/reference_backward.h"

namespace headroom::detail {

/// Which gradient an element belongs to.
enum class GradKind : unsigned char { d_q, d_k, d_v, d_s };

/// Per-worker engine for single gradient elements. Every quantity is an
/// interval [lo, hi] of MPFR numbers at precision p, each end rounded
/// outwards (MPFR 4.2 manual, §4.4: every operation is correctly rounded in
/// the direction asked, so RNDD gives a lower and RNDU an upper bound of the
/// exact result, for + − × and for exp and log, which are monotone). The
/// exact gradient lies in the final interval by induction over the
/// operations; no error analysis beyond that is needed. The element's value
/// is the interval's midpoint m (rounded to p bits), its bound
/// max(hi − m, m − lo) rounded up; its magnitude is the natural magnitude of
/// reference_backward.h computed from the lower ends, rounded down (a
/// certified lower bound). Not shareable between threads.
class MpBackward {
 public:
  MpBackward(const CoreProblem& p, const CoreInputs& in, const Tensor& d_o, int target_log2);
  ~MpBackward();
  MpBackward(const MpBackward&) = delete;
  MpBackward& operator=(const MpBackward&) = delete;

  struct Element {
    double out = 0, bound = 0, magnitude = 0;
    bool certified = true;
  };
  /// Returns: one element. Indices as the tensor it belongs to: d_q (b, h, i, d),
  /// d_k and d_v (b, g, j, d), d_s (b, h, i, j). Starts at 192 bits and raises
  /// the precision until bound ≤ 2^target·magnitude or 4096 bits.
  Element element(GradKind kind, std::int64_t b, std::int64_t head, std::int64_t t, std::int64_t d);

  /// Returns: the highest precision used.
  long max_precision_used() const;

 private:
  struct Impl;
  std::unique_ptr<Impl> impl_;
};

}  // namespace headroom::detail
