// headroom — the C++ view of a kernel's declaration (kernel_abi.h's hr_kernel).
//
// A declaration says what a kernel is: level, formats, masks, conventions and
// layouts. headroom only ever calls a kernel with problems its declaration
// covers, and judges it against what it declared. A declaration arrives from
// a plug-in (a C struct that may hold garbage) or from an external program's
// JSON (external_program.h); both are checked here before anything runs.
#pragma once

#include <cstdint>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "headroom/case.h"
#include "headroom/format.h"
#include "headroom/problem.h"
#include "headroom/quant.h"

struct hr_kernel;

namespace headroom {

enum class MaskedRowConvention : unsigned char { zeros, nan, never_called };

/// Returns: "zeros", "nan", "never_called".
const char* masked_row_name(MaskedRowConvention c);

/// The longest kernel name a declaration may give.
inline constexpr std::size_t kMaxKernelNameLength = 64;

/// Returns: whether `name` is a kernel name a declaration may give: 1 to
/// kMaxKernelNameLength characters of [a-z0-9_.-].
inline bool valid_kernel_name(std::string_view name) {
  if (name.empty() || name.size() > kMaxKernelNameLength) return false;
  for (char ch : name)
    if (!((ch >= 'a' && ch <= 'z') || (ch >= '0' && ch <= '9') || ch == '_' || ch == '.' || ch == '-')) return false;
  return true;
}

struct KernelDeclaration {
  std::string name;
  std::string description;
  Level level = Level::core;
  Format input_format = Format::float32;
  Format output_format = Format::float32;
  QuantScheme q_quant, k_quant, v_quant;  ///< meaningful when input_format is int8, e4m3 or e5m2
  std::uint32_t mask_kinds = 1;           ///< HR_MASK_* bits
  MaskedRowConvention masked_row = MaskedRowConvention::zeros;
  bool returns_lse = false;
  std::uint32_t layouts = 1;              ///< HR_LAYOUT_* bits
  std::int64_t max_kv_len = 0;            ///< 0 = no limit

  // Version 2 (kernel_abi.h): the shapes the kernel accepts. Empty lists,
  // multiples of 1 and maxima of 0 mean "any".
  std::vector<std::int64_t> key_dims;     ///< accepted Dk, ascending
  std::vector<std::int64_t> value_dims;   ///< accepted Dv, ascending
  std::int64_t head_dim_multiple = 1;     ///< Dk and Dv multiples of this
  std::int64_t kv_len_multiple = 1;       ///< Tk a multiple of this
  std::int64_t max_q_len = 0;             ///< 0 = no limit
  std::int64_t max_batch = 0;             ///< 0 = no limit
  std::uint32_t features = 0;             ///< HR_FEATURE_* bits (kernel_abi.h version 2)
  /// HR_FEATURE_SPLIT_PARTIALS: keys per split; split s covers keys
  /// [s·split_kv_len, (s+1)·split_kv_len) of each sequence. 0 otherwise.
  std::int64_t split_kv_len = 0;
  // Version 2: 8-bit floats. Block sizes live in the schemes (QuantScheme::block).
  bool fp8_saturating = false;            ///< the kernel's own 8-bit conversions saturate
  std::optional<Format> p_quant;          ///< e4m3/e5m2: P rounded to it before P·V; empty: not rounded
  float p_scale = 1.0f;                   ///< P multiplied by this before rounding, divided after
  /// The kernel_abi.h version (plug-ins) or exchange protocol (external
  /// programs) the kernel was written against; informational.
  int interface_version = 2;
  // Version 2: the backward entry (kernel_abi.h run_backward, docs/backward.md).
  bool backward = false;              ///< the kernel has a backward entry (core level, float inputs)
  std::uint32_t backward_flags = 0;   ///< HR_BACKWARD_* bits

  /// Returns: whether the kernel declares support for mask kind k.
  bool supports(MaskKind k) const;
  /// Returns: whether the kernel accepts mask `m`: its kind, and a sliding
  /// window only with HR_FEATURE_WINDOW.
  bool accepts(const Mask& m) const;
  /// Returns: why the kernel does not accept `s` (a head dim outside key_dims /
  /// value_dims or not a multiple, Tk not a multiple, Tq or batch over the
  /// maximum, Tk over max_kv_len), as a reason that names the declared limit
  /// and not the case, so equal reasons count together ("key dim 80 not
  /// declared (64, 128)"); nothing when it does.
  std::optional<std::string> shape_unfit(const CoreShape& s) const;
};

/// Returns: the HR_MASK_* bit of mask kind k (HR_MASK_NONE for none, ...).
std::uint32_t mask_bit(MaskKind k);

/// Returns: the declaration of `k`, fully checked. `origin` names where it came
/// from (a library path, "bundled"); errors name it as the file.
/// Reads a version-1 declaration's fields only (never past run_block) and a
/// version-2 one's whole.
/// Throws InputError naming origin, the kernel and the fix for: a null
/// declaration, an abi_version outside HEADROOM_ABI_OLDEST_VERSION ..
/// HEADROOM_ABI_VERSION, a null, empty,
/// over-long (> 64) or non-[a-z0-9_.-] name, an unknown level, format,
/// granularity or masked-row value, an int8 output, int8 input at block
/// level, quantisation schemes on a non-int8 kernel, mask bits outside
/// HR_MASK_*, no mask kind, layout bits outside HR_LAYOUT_* or none,
/// returns_lse other than 0/1 or on a block kernel, a negative max_kv_len,
/// or no run function for its level (or one for the other level); version 2:
/// a head-dim list that is unterminated within 64 entries, holds a value < 1
/// or a duplicate, a negative multiple or maximum, and any version-2 field
/// this build does not judge yet (8-bit formats, per-block scales, P
/// quantisation, features, split length) set non-neutral; backward_flags bits
/// outside HR_BACKWARD_*, flags without a run_backward, or a backward entry on
/// a block or int8 kernel.
KernelDeclaration declaration_of(const hr_kernel* k, const std::string& origin);

/// Returns: nothing when `d` is consistent; throws InputError naming origin
/// and the kernel for the format-independent rules listed above (name, int8
/// output, int8 block, masks, layouts, lse, max_kv_len, the version-2 shape
/// limits). declaration_of and
/// the external-program reader both end with this check.
void check_declaration(const KernelDeclaration& d, const std::string& origin);

/// Returns: nothing when `d`'s 8-bit float fields are consistent; throws
/// InputError for an 8-bit float output, 8-bit float input at block level,
/// asymmetric 8-bit float schemes, p_quant other than e4m3/e5m2 or on a block
/// kernel, p_scale not positive and finite or set without p_quant, and
/// fp8_saturating on a kernel with no 8-bit conversion. check_declaration
/// ends with it.
void check_fp8_declaration(const KernelDeclaration& d, const std::string& origin);

/// Returns: one line describing `d`, e.g.
/// "core in=binary16 out=float32 masks=none,causal_top_left masked_row=zeros
///  lse=yes layouts=BHTD max_kv_len=any".
std::string declaration_summary(const KernelDeclaration& d);

}  // namespace headroom
