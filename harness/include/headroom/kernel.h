// headroom — the C++ view of a kernel's declaration (kernel_abi.h's hr_kernel).
#pragma once

#include <cstdint>
#include <string>

#include "headroom/case.h"
#include "headroom/format.h"
#include "headroom/problem.h"
#include "headroom/quant.h"

namespace headroom {

enum class MaskedRowConvention : unsigned char { zeros, nan, never_called };

struct KernelDeclaration {
  std::string name;
  std::string description;
  Level level = Level::core;
  Format input_format = Format::float32;
  Format output_format = Format::float32;
  QuantScheme q_quant, k_quant, v_quant;  ///< meaningful when input_format is int8
  std::uint32_t mask_kinds = 1;           ///< HR_MASK_* bits
  MaskedRowConvention masked_row = MaskedRowConvention::zeros;
  bool returns_lse = false;
  std::uint32_t layouts = 1;              ///< HR_LAYOUT_* bits
  std::int64_t max_kv_len = 0;            ///< 0 = no limit

  /// Returns: whether the kernel declares support for mask kind k.
  bool supports(MaskKind k) const;
};

}  // namespace headroom
