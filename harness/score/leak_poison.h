// headroom — internal to the score stage: the poison the leak probes write
// into keys and values a kernel must not read (mask_leak.cpp, page_leak.cpp).
#pragma once

#include <algorithm>
#include <cmath>

#include "headroom/format.h"
#include "headroom/tensor.h"

namespace headroom::score_detail {

/// The largest poison exponent that stays finite in input format f.
inline int leak_poison_cap_log2(Format f) { return f == Format::binary16 ? 15 : f == Format::float64 ? 900 : 100; }

/// Returns: a power of two 2^8 above max|t| (so a leaked poison dominates what
/// it replaced), capped to stay finite in input format f (2^15 < 65504 for
/// binary16, 2^900 for float64, 2^100 otherwise: leak_poison_cap_log2).
inline double leak_poison(const Tensor& t, Format f) {
  double m = 0;
  for (double v : t.values) m = std::max(m, std::fabs(v));
  const int e = m > 0 ? std::ilogb(m) + 1 : 0;
  return std::ldexp(1.0, std::min(e + 8, leak_poison_cap_log2(f)));
}

}  // namespace headroom::score_detail
