// headroom — the number formats a kernel may receive and return.
//
// Values of every format are held by the harness as doubles: float32, binary16,
// bfloat16 and dequantised int8 values are all exactly representable in
// binary64, so no information is lost between the kernel's bytes and the
// reference's exact arithmetic.
#pragma once

#include <optional>
#include <string_view>

namespace headroom {

/// e4m3 and e5m2 are the OCP 8-bit floats (fp8.h); like int8 they are input
/// formats only, received as codes with scales (quant.h).
enum class Format : unsigned char { float64, float32, binary16, bfloat16, int8, e4m3, e5m2 };

/// Returns: the canonical name ("float64", "float32", "binary16", "bfloat16", "int8", "e4m3", "e5m2").
std::string_view format_name(Format f);

/// Returns: the format named `name` (canonical names; also "f64", "f32", "f16",
/// "fp16", "half", "bf16", "float8_e4m3", "float8_e5m2"), or nothing.
std::optional<Format> parse_format(std::string_view name);

/// Returns: the unit roundoff u = 2^-p of the format's round-to-nearest
/// (IEEE 754-2019 Table 3.5 precisions p: 53, 24, 11; bfloat16 p = 8).
/// For int8, e4m3 and e5m2, the unit roundoff of the float32 in which such
/// kernels produce their output (they are input formats only).
double unit_roundoff(Format f);

/// Returns: `x` rounded to the nearest value of format `f` (ties to even), with
/// overflow to ±infinity as IEEE 754 round-to-nearest prescribes. For int8,
/// e4m3 and e5m2, `x` rounded to float32 (see unit_roundoff).
double round_to_format(double x, Format f);

/// Returns: whether `f` is received as codes with scales (int8, e4m3, e5m2).
bool is_quantised(Format f);
/// Returns: whether `f` is one of the 8-bit floats (e4m3, e5m2).
bool is_fp8(Format f);

}  // namespace headroom
