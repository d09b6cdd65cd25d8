// headroom — format names, unit roundoffs and rounding a double to a format.
#include "headroom/format.h"

#include <array>
#include <stdexcept>
#include <utility>

#include "headroom/binary16.h"

namespace headroom {

std::string_view format_name(Format f) {
  switch (f) {
    case Format::float64: return "float64";
    case Format::float32: return "float32";
    case Format::binary16: return "binary16";
    case Format::bfloat16: return "bfloat16";
    case Format::int8: return "int8";
    case Format::e4m3: return "e4m3";
    case Format::e5m2: return "e5m2";
  }
  throw std::invalid_argument("format_name: not a Format value");
}

std::optional<Format> parse_format(std::string_view name) {
  static constexpr std::array<std::pair<std::string_view, Format>, 15> kNames{{
      {"float64", Format::float64}, {"f64", Format::float64},
      {"float32", Format::float32}, {"f32", Format::float32},
      {"binary16", Format::binary16}, {"f16", Format::binary16}, {"fp16", Format::binary16},
      {"half", Format::binary16},
      {"bfloat16", Format::bfloat16}, {"bf16", Format::bfloat16},
      {"int8", Format::int8},
      {"e4m3", Format::e4m3}, {"float8_e4m3", Format::e4m3},
      {"e5m2", Format::e5m2}, {"float8_e5m2", Format::e5m2},
  }};
  for (const auto& [known, format] : kNames) {
    if (name == known) return format;
  }
  return std::nullopt;
}

double unit_roundoff(Format f) {
  // u = 2^-p for round-to-nearest; p from IEEE 754-2019 Table 3.5 (binary64 53,
  // binary32 24, binary16 11); bfloat16 keeps float32's exponent with p = 8.
  switch (f) {
    case Format::float64: return 0x1p-53;
    case Format::float32: return 0x1p-24;
    case Format::binary16: return 0x1p-11;
    case Format::bfloat16: return 0x1p-8;
    case Format::int8:  // int8 and 8-bit float kernels write float32
    case Format::e4m3:
    case Format::e5m2: return 0x1p-24;
  }
  throw std::invalid_argument("unit_roundoff: not a Format value");
}

double round_to_format(double x, Format f) {
  switch (f) {
    case Format::float64: return x;
    // The C++ double → float conversion rounds to nearest even under the
    // default rounding mode, overflowing to ±inf (IEEE 754-2019 §5.4.2).
    case Format::float32: return static_cast<double>(static_cast<float>(x));
    case Format::binary16: return static_cast<double>(binary16_to_float(double_to_binary16(x)));
    case Format::bfloat16: return static_cast<double>(bfloat16_to_float(double_to_bfloat16(x)));
    case Format::int8:
    case Format::e4m3:
    case Format::e5m2: return static_cast<double>(static_cast<float>(x));
  }
  throw std::invalid_argument("round_to_format: not a Format value");
}

bool is_quantised(Format f) { return f == Format::int8 || is_fp8(f); }

bool is_fp8(Format f) { return f == Format::e4m3 || f == Format::e5m2; }

}  // namespace headroom
