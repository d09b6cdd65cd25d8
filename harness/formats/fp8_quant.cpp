// headroom — quantising to 8-bit floats with amax scales per tensor, head, token, channel or block,
// or with a delayed scale fixed beforehand (quant.h).
//
// The scale of a group is the smallest float32 s with M·s ≥ max|x| (M the
// format's largest finite value), so x/s never exceeds M and no code
// overflows, whatever the conversion's saturation mode. M·s is exact in double
// (M = 448 = 7·2^6 or 57344 = 7·2^13: 3 bits times s's 24), so the check is
// decided exactly.
#include <array>
#include <cmath>
#include <limits>
#include <stdexcept>
#include <string>

#include "headroom/fp8.h"
#include "headroom/quant.h"

namespace headroom {
namespace {

// Attempts at growing a scale by one ulp: the first guess is at most one
// rounding short, so one step suffices; the bound only turns a bug into an error.
constexpr int kScaleGrowthSteps = 64;

float amax_scale(double max_abs, double format_max) {
  if (max_abs == 0.0) return 1.0f;  // an all-zero group: any scale gives code 0
  const double v = max_abs / format_max;
  if (!(v <= static_cast<double>(std::numeric_limits<float>::max()))) {
    throw std::invalid_argument("quantize_fp8: a group needs a scale beyond float32's range");
  }
  float s = static_cast<float>(v);
  if (s == 0.0f) s = std::numeric_limits<float>::denorm_min();
  for (int step = 0; step < kScaleGrowthSteps; ++step) {
    if (static_cast<double>(s) * format_max >= max_abs) return s;
    s = std::nextafter(s, std::numeric_limits<float>::infinity());
  }
  throw std::logic_error("quantize_fp8: scale search did not converge");
}

// Both rules: `delayed` = 0 gives each group its amax scale and converts
// without saturation (nothing can overflow); `delayed` > 0 fixes every scale
// and converts with `saturating`.
QuantizedTensor quantize_fp8_with(const Tensor& x, QuantScheme scheme, Format format, float delayed, bool saturating) {
  if (!is_fp8(format)) {
    throw std::invalid_argument("quantize_fp8: " + std::string(format_name(format)) + " is not an 8-bit float format");
  }
  if (scheme.asymmetric) throw std::invalid_argument("quantize_fp8: 8-bit float schemes are symmetric (no zero points)");
  check_scheme(scheme, "quantize_fp8");
  if (x.rank() != 4 || static_cast<std::int64_t>(x.values.size()) != x.size()) {
    throw std::invalid_argument("quantize_fp8: the tensor is not a consistent [B, H, T, D] tensor");
  }
  const Fp8Kind kind = format == Format::e4m3 ? Fp8Kind::e4m3 : Fp8Kind::e5m2;
  QuantizedTensor q;
  q.shape = x.shape;
  q.scheme = scheme;
  q.format = format;
  q.scale_shape = scale_shape_of(x.shape, scheme.granularity, scheme.block);
  std::size_t groups = 1;
  for (std::int64_t e : q.scale_shape) groups *= static_cast<std::size_t>(e);

  std::vector<double> amax(groups, 0.0);
  const auto [nb, nh, nt, nd] = std::array{x.shape[0], x.shape[1], x.shape[2], x.shape[3]};
  for (std::int64_t b = 0; b < nb; ++b)
    for (std::int64_t h = 0; h < nh; ++h)
      for (std::int64_t t = 0; t < nt; ++t)
        for (std::int64_t d = 0; d < nd; ++d) {
          const double v = x.at(b, h, t, d);
          if (!std::isfinite(v)) {
            throw std::invalid_argument("quantize_fp8: element [" + std::to_string(b) + ", " + std::to_string(h) + ", " +
                                        std::to_string(t) + ", " + std::to_string(d) + "] is not finite");
          }
          double& m = amax[static_cast<std::size_t>(q.group(b, h, t, d))];
          m = std::fmax(m, std::fabs(v));
        }
  q.scales.resize(groups);
  for (std::size_t g = 0; g < groups; ++g) q.scales[g] = delayed > 0.0f ? delayed : amax_scale(amax[g], fp8_max(kind));

  q.codes.resize(static_cast<std::size_t>(x.size()));
  for (std::int64_t b = 0; b < nb; ++b)
    for (std::int64_t h = 0; h < nh; ++h)
      for (std::int64_t t = 0; t < nt; ++t)
        for (std::int64_t d = 0; d < nd; ++d) {
          const double s = q.scales[static_cast<std::size_t>(q.group(b, h, t, d))];
          // Amax scales: |x/s| ≤ M by the scale's choice, so the
          // non-saturating conversion cannot overflow; a non-finite code
          // there would be a bug, reported. Delayed scales: x/s may pass M.
          const std::uint8_t c = double_to_fp8(x.at(b, h, t, d) / s, kind, saturating);
          if (delayed == 0.0f && !std::isfinite(fp8_to_double(c, kind))) throw std::logic_error("quantize_fp8: a code overflowed");
          q.codes[static_cast<std::size_t>(x.offset(b, h, t, d))] = static_cast<std::int8_t>(c);
        }
  return q;
}

}  // namespace

QuantizedTensor quantize_fp8(const Tensor& x, QuantScheme scheme, Format format) {
  return quantize_fp8_with(x, scheme, format, 0.0f, false);
}

QuantizedTensor quantize_fp8_delayed(const Tensor& x, QuantScheme scheme, Format format, float delayed, bool saturating) {
  if (!(delayed > 0.0f) || std::isinf(delayed)) {
    throw std::invalid_argument("quantize_fp8_delayed: the delayed scale " + std::to_string(delayed) + " is not finite and > 0");
  }
  return quantize_fp8_with(x, scheme, format, delayed, saturating);
}

}  // namespace headroom
