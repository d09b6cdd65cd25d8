// headroom — the error of one output element: ranks in a format, ULP distance, scaled error.
#include <cmath>
#include <cstdio>
#include <limits>
#include <stdexcept>

#include "headroom/scores.h"

namespace headroom {
namespace {

// Precision p (with the hidden bit) and minimum normal exponent of each output
// format: IEEE 754-2019 Table 3.5 for binary64/32/16; bfloat16 is float32's
// exponent range with p = 8. int8 kernels write float32 (format.h).
struct FormatParams {
  int precision;
  int emin;
  int emax;
};

FormatParams params_of(Format f) {
  switch (f) {
    case Format::float64: return {53, -1022, 1023};
    case Format::float32: return {24, -126, 127};
    case Format::binary16: return {11, -14, 15};
    case Format::bfloat16: return {8, -126, 127};
    case Format::int8:
    case Format::e4m3:
    case Format::e5m2: return {24, -126, 127};
  }
  throw std::invalid_argument("format_rank: not a Format value");
}

// The smallest positive subnormal of F, 2^(emin − p + 1): the absolute error
// floor below which F cannot resolve anything.
double smallest_subnormal(Format f) {
  const FormatParams fp = params_of(f);
  return std::ldexp(1.0, fp.emin - fp.precision + 1);
}

}  // namespace

std::int64_t format_rank(double x, Format f) {
  if (std::isnan(x)) throw std::invalid_argument("format_rank: NaN has no rank");
  const FormatParams fp = params_of(f);
  const double r = round_to_format(x, f);
  const double a = std::fabs(r);
  const std::int64_t per_binade = std::int64_t{1} << (fp.precision - 1);
  std::int64_t rank = 0;
  if (std::isinf(a)) {
    // IEEE encoding: +inf is the all-ones exponent with zero fraction, i.e. the
    // successor of the largest finite value's pattern. emax − emin + 2 = 2^w − 1.
    rank = (fp.emax - fp.emin + 2) * per_binade;
  } else if (a < std::ldexp(1.0, fp.emin)) {
    // Subnormal (or zero): a = k · 2^(emin − p + 1) with integer k < 2^(p−1);
    // the scaling by a power of two is exact.
    rank = static_cast<std::int64_t>(std::ldexp(a, fp.precision - 1 - fp.emin));
  } else {
    // Normal: a = m · 2^e with m ∈ [1, 2) of p bits, so a · 2^(p−1−e) is the
    // integer significand in [2^(p−1), 2^p); binades below add 2^(p−1) ranks each.
    const int e = std::ilogb(a);
    rank = static_cast<std::int64_t>(std::ldexp(a, fp.precision - 1 - e)) + (e - fp.emin) * per_binade;
  }
  return std::signbit(r) ? -rank : rank;
}

std::int64_t ulp_distance(double a, double b, Format f) {
  const std::int64_t d = format_rank(a, f) - format_rank(b, f);
  return d < 0 ? -d : d;
}

ElementError element_error(double o, double ref, double bound, double magnitude, Format f) {
  ElementError e;
  // o and ref are doubles; their difference is rounded once (relative 2^-53),
  // far below any error a kernel of these formats can show.
  e.abs = std::fabs(o - ref);
  if (ref == 0) {
    e.rel = e.abs == 0 ? 0.0 : std::numeric_limits<double>::infinity();
  } else {
    e.rel = e.abs / std::fabs(ref);
  }
  const double unit = std::fmax(unit_roundoff(f) * magnitude, smallest_subnormal(f));
  e.scaled = e.abs / unit;
  e.ulp = ulp_distance(o, ref, f);

  // o* lies in [ref − r, ref + r] with r = bound + 2^-53·|ref| (reference.h).
  // Rounding is monotone, so if both ends round to the same value of F every
  // point between does and round_F(o*) is known; otherwise the ULP figure may
  // be off by one. The ends are computed in double and stepped one double
  // outward so the computed interval contains the true one.
  const double r = bound + 0x1p-53 * std::fabs(ref);
  if (r > 0) {
    const double lo = std::nextafter(ref - r, -std::numeric_limits<double>::infinity());
    const double hi = std::nextafter(ref + r, std::numeric_limits<double>::infinity());
    e.ulp_uncertain = format_rank(lo, f) != format_rank(hi, f);
  }
  return e;
}

std::vector<double> ulp_histogram_edges() {
  std::vector<double> edges{0.0, 0.5};
  for (int k = 0; k <= 20; ++k) edges.push_back(std::ldexp(1.0, k));
  edges.push_back(std::numeric_limits<double>::infinity());
  return edges;
}

std::string hex_float(double x) {
  char buf[48];
  std::snprintf(buf, sizeof buf, "%a", x);
  return buf;
}

}  // namespace headroom
