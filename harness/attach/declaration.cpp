// headroom — reading a kernel's declaration, trusting nothing in it (kernel.h).
#include <algorithm>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <string>
#include <vector>

#include "headroom/input_error.h"
#include "headroom/kernel.h"
#include "headroom/kernel_abi.h"

namespace headroom {
namespace {

constexpr std::size_t kMaxNameLength = kMaxKernelNameLength;
constexpr std::size_t kMaxDimList = 64;  // entries read from a zero-terminated head-dim list
constexpr std::uint32_t kAllMasks = HR_MASK_NONE | HR_MASK_CAUSAL_TOP_LEFT | HR_MASK_CAUSAL_BOTTOM_RIGHT |
                                    HR_MASK_KEY_PADDING | HR_MASK_DENSE | HR_MASK_BIAS;
constexpr std::uint32_t kAllLayouts = HR_LAYOUT_BHTD | HR_LAYOUT_BTHD;
// The HR_FEATURE_* bits this build judges; the others are refused (refuse_unjudged).
constexpr std::uint32_t kJudgedFeatures = HR_FEATURE_WINDOW | HR_FEATURE_SOFTCAP | HR_FEATURE_SINKS | HR_FEATURE_VARLEN |
                                          HR_FEATURE_PAGED_KV | HR_FEATURE_SPLIT_PARTIALS;
constexpr MaskKind kMaskKinds[] = {MaskKind::none,        MaskKind::causal_top_left, MaskKind::causal_bottom_right,
                                   MaskKind::key_padding, MaskKind::dense,           MaskKind::bias};

std::string who(const KernelDeclaration& d) { return d.name.empty() ? std::string("kernel") : "kernel \"" + d.name + "\""; }

[[noreturn]] void refuse(const std::string& origin, const std::string& place, const std::string& problem,
                         const std::string& fix) {
  throw InputError(origin, place, problem, fix);
}

Format format_of(std::int32_t v, const std::string& origin, const std::string& place) {
  switch (v) {
    case HR_FORMAT_FLOAT64: return Format::float64;
    case HR_FORMAT_FLOAT32: return Format::float32;
    case HR_FORMAT_BINARY16: return Format::binary16;
    case HR_FORMAT_BFLOAT16: return Format::bfloat16;
    case HR_FORMAT_INT8: return Format::int8;
    case HR_FORMAT_E4M3: return Format::e4m3;
    case HR_FORMAT_E5M2: return Format::e5m2;
    default: break;
  }
  refuse(origin, place, "unknown format value " + std::to_string(v),
         "use one of the HR_FORMAT_* values of kernel_abi.h (0..6)");
}

QuantScheme scheme_of(const hr_quant& q, std::int32_t block, const std::string& origin, const std::string& place) {
  QuantScheme s;
  switch (q.granularity) {
    case HR_QUANT_PER_TENSOR: s.granularity = Granularity::per_tensor; break;
    case HR_QUANT_PER_HEAD: s.granularity = Granularity::per_head; break;
    case HR_QUANT_PER_TOKEN: s.granularity = Granularity::per_token; break;
    case HR_QUANT_PER_CHANNEL: s.granularity = Granularity::per_channel; break;
    case HR_QUANT_PER_BLOCK: s.granularity = Granularity::per_block; break;
    default:
      refuse(origin, place + ".granularity", "unknown granularity value " + std::to_string(q.granularity),
             "use one of the HR_QUANT_* values of kernel_abi.h (0..4)");
  }
  s.block = s.granularity == Granularity::per_block ? block : 0;
  if (s.granularity == Granularity::per_block && block < 1) {
    refuse(origin, place + ".granularity", "per-block scales with a block of " + std::to_string(block) + " tokens",
           "set q_block, k_block or v_block (tokens per scale block, e.g. 64 or 128) for each per-block input");
  }
  if (s.granularity != Granularity::per_block && block != 0) {
    refuse(origin, place + ".granularity", "a block size of " + std::to_string(block) + " for " +
               std::string(granularity_name(s.granularity)) + " scales",
           "leave q_block, k_block, v_block zero unless that input's granularity is HR_QUANT_PER_BLOCK");
  }
  if (q.asymmetric != 0 && q.asymmetric != 1) {
    refuse(origin, place + ".asymmetric", "value " + std::to_string(q.asymmetric) + " is neither 0 nor 1",
           "set 0 for symmetric, 1 for asymmetric (zero points given)");
  }
  s.asymmetric = q.asymmetric == 1;
  return s;
}

std::string mask_list(std::uint32_t bits) {
  std::string out;
  for (MaskKind k : kMaskKinds) {
    if ((bits & mask_bit(k)) == 0) continue;
    if (!out.empty()) out += ',';
    out += mask_kind_name(k);
  }
  return out;
}

// "per_token" or "per_token,asymmetric": one space-free token for the summary line.
std::string scheme_token(const QuantScheme& q) {
  std::string s = granularity_name(q.granularity) == "per_block" ? "per_block:" + std::to_string(q.block)
                                                                  : std::string(granularity_name(q.granularity));
  return s + (q.asymmetric ? ",asymmetric" : "");
}


// A float exactly, in the shortest decimal that reads back (e.g. "448").
std::string fmt_float(float v) {
  char buf[32];
  std::snprintf(buf, sizeof buf, "%.9g", static_cast<double>(v));
  return buf;
}

std::string dim_list(const std::vector<std::int64_t>& dims) {
  std::string out;
  for (std::int64_t v : dims) out += (out.empty() ? "" : ",") + std::to_string(v);
  return out;
}

// Reads a zero-terminated int32 list, at most kMaxDimList entries before the 0.
std::vector<std::int64_t> dims_of(const std::int32_t* list, const std::string& origin, const std::string& place) {
  std::vector<std::int64_t> out;
  if (list == nullptr) return out;
  for (std::size_t i = 0;; ++i) {
    if (i == kMaxDimList) {
      refuse(origin, place, "no terminating 0 within " + std::to_string(kMaxDimList) + " entries",
             "end the list with 0, e.g. {64, 128, 0}, or set the pointer to NULL for any");
    }
    if (list[i] == 0) break;
    out.push_back(list[i]);
  }
  std::sort(out.begin(), out.end());
  if (out.empty()) {
    refuse(origin, place, "the list is empty (its first entry is the terminating 0)",
           "list the accepted head dims before the 0, or set the pointer to NULL for any");
  }
  return out;
}

// Rule 6 of docs/kernel-abi-v2.md: a version-2 field whose judging this build
// does not have yet is refused, so no kernel passes on something never tried.
void refuse_unjudged(const hr_kernel* k, const std::string& kernel, const std::string& origin) {
  struct Field {
    const char* name;
    bool set;
    const char* what;
  };
  const Field fields[] = {
      {"features", (k->features & ~kJudgedFeatures) != 0, "features beyond window, softcap, sinks, varlen, paged K/V and split partials"},
  };
  for (const Field& f : fields) {
    if (!f.set) continue;
    refuse(origin, std::string("field \"") + f.name + "\" of " + kernel,
           std::string(f.what) + " are not judged by this headroom yet",
           std::string("leave ") + f.name + " at zero (NULL for a pointer): a version-2 field is neutral at zero");
  }
}

// The backward entry: known flag bits, flags only with an entry, core level
// with float inputs (the backward reference's domain).
void check_backward_fields(const KernelDeclaration& d, const std::string& origin) {
  constexpr std::uint32_t known = HR_BACKWARD_RECOMPUTES | HR_BACKWARD_NONDETERMINISTIC | HR_BACKWARD_BIAS_GRAD;
  const std::string kernel = "kernel \"" + d.name + "\"";
  if ((d.backward_flags & ~known) != 0)
    refuse(origin, "field \"backward_flags\" of " + kernel, "holds bits outside HR_BACKWARD_*",
           "combine HR_BACKWARD_RECOMPUTES, HR_BACKWARD_NONDETERMINISTIC and HR_BACKWARD_BIAS_GRAD only");
  if (!d.backward && d.backward_flags != 0)
    refuse(origin, "field \"backward_flags\" of " + kernel, "is set but the kernel has no run_backward",
           "point run_backward at the backward entry, or leave backward_flags 0");
  if (d.backward && d.level != Level::core)
    refuse(origin, "field \"run_backward\" of " + kernel, "a backward entry is judged for core kernels only",
           "set run_backward to NULL on a block kernel");
  if (d.backward && is_quantised(d.input_format))
    refuse(origin, "field \"run_backward\" of " + kernel,
           "a backward entry with " + std::string(format_name(d.input_format)) + " inputs is not judged",
           "declare a float input format for a backward kernel, or set run_backward to NULL");
}

}  // namespace

void check_fp8_declaration(const KernelDeclaration& d, const std::string& origin) {
  if (is_fp8(d.output_format)) {
    refuse(origin, "field \"output_format\"", who(d) + " declares " + std::string(format_name(d.output_format)) +
               " output; 8-bit floats are input formats only",
           "return float32 (or binary16, bfloat16, float64) and declare that");
  }
  if (is_fp8(d.input_format)) {
    if (d.level == Level::block) {
      refuse(origin, "field \"input_format\"", who(d) + " is a block kernel with 8-bit float input; headroom quantises only Q, K, V",
             "declare a float input format for block kernels, or make it a core kernel");
    }
    for (const auto& [field, s] : {std::pair{"q_quant", &d.q_quant}, std::pair{"k_quant", &d.k_quant}, std::pair{"v_quant", &d.v_quant}}) {
      if (s->asymmetric) {
        refuse(origin, std::string("field \"") + field + "\"", who(d) + " declares asymmetric 8-bit float scales",
               "set asymmetric = 0: 8-bit float inputs have scales only, no zero points");
      }
    }
  }
  if (d.p_quant && !is_fp8(*d.p_quant)) {
    refuse(origin, "field \"p_quant\"", who(d) + " rounds P to " + std::string(format_name(*d.p_quant)),
           "use HR_PQUANT_E4M3 or HR_PQUANT_E5M2, or HR_PQUANT_NONE");
  }
  if (d.p_quant && d.level == Level::block) {
    refuse(origin, "field \"p_quant\"", who(d) + " is a block kernel declaring P quantisation",
           "declare p_quant on core kernels only");
  }
  if (!(d.p_scale > 0.0f) || !std::isfinite(d.p_scale)) {
    refuse(origin, "field \"p_scale\"", who(d) + " declares p_scale " + std::to_string(d.p_scale),
           "use a positive finite factor, or 0 for 1");
  }
  if (!d.p_quant && d.p_scale != 1.0f) {
    refuse(origin, "field \"p_scale\"", who(d) + " declares p_scale without p_quant",
           "leave p_scale 0 unless p_quant rounds the probabilities");
  }
  if (d.fp8_saturating && !is_fp8(d.input_format) && !d.p_quant) {
    refuse(origin, "field \"fp8_saturating\"", who(d) + " declares saturating 8-bit conversions but has none",
           "leave fp8_saturating 0 unless the input format is E4M3/E5M2 or p_quant is set");
  }
}

const char* masked_row_name(MaskedRowConvention c) {
  switch (c) {
    case MaskedRowConvention::zeros: return "zeros";
    case MaskedRowConvention::nan: return "nan";
    case MaskedRowConvention::never_called: return "never_called";
  }
  return "?";
}

std::uint32_t mask_bit(MaskKind k) {
  switch (k) {
    case MaskKind::none: return HR_MASK_NONE;
    case MaskKind::causal_top_left: return HR_MASK_CAUSAL_TOP_LEFT;
    case MaskKind::causal_bottom_right: return HR_MASK_CAUSAL_BOTTOM_RIGHT;
    case MaskKind::key_padding: return HR_MASK_KEY_PADDING;
    case MaskKind::dense: return HR_MASK_DENSE;
    case MaskKind::bias: return HR_MASK_BIAS;
  }
  return 0;
}

bool KernelDeclaration::supports(MaskKind k) const { return (mask_kinds & mask_bit(k)) != 0; }

bool KernelDeclaration::accepts(const Mask& m) const {
  return supports(m.kind) && (!m.has_window() || (features & HR_FEATURE_WINDOW) != 0) &&
         (!m.is_varlen() || (features & HR_FEATURE_VARLEN) != 0);
}

void check_declaration(const KernelDeclaration& d, const std::string& origin) {
  check_backward_fields(d, origin);
  if (d.name.empty() || d.name.size() > kMaxNameLength) {
    refuse(origin, "field \"name\"", "the name is empty or longer than 64 characters",
           "give the kernel a short unique name of [a-z0-9_.-]");
  }
  if (!valid_kernel_name(d.name)) {
    refuse(origin, "field \"name\"", "name \"" + d.name + "\" holds a character outside [a-z0-9_.-]",
           "rename the kernel using lower-case letters, digits, '_', '.' and '-' only");
  }
  if (d.output_format == Format::int8) {
    refuse(origin, "field \"output_format\"", who(d) + " declares int8 output; int8 is an input format only",
           "return float32 (or binary16, bfloat16, float64) and declare that");
  }
  if (d.level == Level::block && d.input_format == Format::int8) {
    refuse(origin, "field \"input_format\"", who(d) + " is a block kernel with int8 input; headroom quantises only Q, K, V",
           "declare a float input format for block kernels, or make it a core kernel");
  }
  if (!is_quantised(d.input_format) && !(d.q_quant == QuantScheme{} && d.k_quant == QuantScheme{} && d.v_quant == QuantScheme{})) {
    refuse(origin, "field \"q_quant\"", who(d) + " gives quantisation schemes but its input format is " +
               std::string(format_name(d.input_format)),
           "leave q_quant, k_quant, v_quant zero unless input_format is int8, e4m3 or e5m2");
  }
  check_fp8_declaration(d, origin);
  if ((d.mask_kinds & ~kAllMasks) != 0) {
    refuse(origin, "field \"mask_kinds\"", who(d) + " sets mask bits outside HR_MASK_*",
           "combine only the HR_MASK_* bits of kernel_abi.h");
  }
  if (d.mask_kinds == 0) {
    refuse(origin, "field \"mask_kinds\"", who(d) + " supports no mask kind at all",
           "declare at least HR_MASK_NONE");
  }
  if ((d.layouts & ~kAllLayouts) != 0 || d.layouts == 0) {
    refuse(origin, "field \"layouts\"", who(d) + " declares no layout or bits outside HR_LAYOUT_*",
           "set HR_LAYOUT_BHTD and/or HR_LAYOUT_BTHD");
  }
  if (d.returns_lse && d.level == Level::block) {
    refuse(origin, "field \"returns_lse\"", who(d) + " is a block kernel; only core kernels return log-sum-exp",
           "set returns_lse to 0");
  }
  if (d.max_kv_len < 0) {
    refuse(origin, "field \"max_kv_len\"", who(d) + " declares max_kv_len " + std::to_string(d.max_kv_len),
           "use 0 for no limit or the longest key sequence accepted");
  }
  for (const auto& [field, dims] : {std::pair{"key_dims", &d.key_dims}, std::pair{"value_dims", &d.value_dims}}) {
    std::vector<std::int64_t> sorted = *dims;
    std::sort(sorted.begin(), sorted.end());
    if (!sorted.empty() && sorted.front() < 1) {
      refuse(origin, std::string("field \"") + field + "\"", who(d) + " lists head dim " + std::to_string(sorted.front()),
             "list only positive head dims");
    }
    if (std::adjacent_find(sorted.begin(), sorted.end()) != sorted.end()) {
      refuse(origin, std::string("field \"") + field + "\"", who(d) + " lists a head dim twice (" + dim_list(*dims) + ")",
             "list each accepted head dim once");
    }
  }
  if ((d.features & ~kJudgedFeatures) != 0) {
    refuse(origin, "field \"features\"", who(d) + " declares features this headroom does not judge yet",
           "declare only HR_FEATURE_WINDOW, HR_FEATURE_SOFTCAP, HR_FEATURE_SINKS, HR_FEATURE_VARLEN, "
           "HR_FEATURE_PAGED_KV and HR_FEATURE_SPLIT_PARTIALS for now");
  }
  const bool split = (d.features & HR_FEATURE_SPLIT_PARTIALS) != 0;
  if (split && d.split_kv_len < 1) {
    refuse(origin, "field \"split_kv_len\"", who(d) + " declares HR_FEATURE_SPLIT_PARTIALS with split_kv_len " +
                                                  std::to_string(d.split_kv_len),
           "give the keys each split covers (>= 1)");
  }
  if (!split && d.split_kv_len != 0) {
    refuse(origin, "field \"split_kv_len\"", who(d) + " sets split_kv_len without HR_FEATURE_SPLIT_PARTIALS",
           "declare HR_FEATURE_SPLIT_PARTIALS, or leave split_kv_len at 0");
  }
  if ((d.features & HR_FEATURE_VARLEN) != 0 && (d.features & (HR_FEATURE_PAGED_KV | HR_FEATURE_SPLIT_PARTIALS)) != 0) {
    refuse(origin, "field \"features\"", who(d) + " declares packed variable lengths with paged K/V or split partials",
           "headroom does not judge them together yet: declare them on separate kernels");
  }
  if (d.level != Level::core && (d.features & (HR_FEATURE_PAGED_KV | HR_FEATURE_SPLIT_PARTIALS)) != 0) {
    refuse(origin, "field \"features\"", who(d) + " is a block kernel declaring paged K/V or split partials",
           "declare them on a core kernel");
  }
  if (d.backward && (d.features & (HR_FEATURE_PAGED_KV | HR_FEATURE_SPLIT_PARTIALS)) != 0) {
    refuse(origin, "field \"features\"", who(d) + " declares a backward entry with paged K/V or split partials",
           "headroom does not judge their gradients: declare them on a forward-only kernel");
  }
  if (d.backward && (d.features & (HR_FEATURE_SOFTCAP | HR_FEATURE_SINKS | HR_FEATURE_VARLEN)) != 0) {
    refuse(origin, "field \"features\"", who(d) + " declares a backward entry with soft caps, sinks or variable lengths",
           "headroom does not judge their gradients yet: declare them on a forward-only kernel");
  }
  const std::pair<const char*, std::int64_t> counts[] = {{"head_dim_multiple", d.head_dim_multiple},
                                                         {"kv_len_multiple", d.kv_len_multiple},
                                                         {"max_q_len", d.max_q_len},
                                                         {"max_batch", d.max_batch}};
  for (const auto& [field, v] : counts) {
    if (v < 0) {
      refuse(origin, std::string("field \"") + field + "\"", who(d) + " declares " + field + " " + std::to_string(v),
             "use 0 for no constraint or a positive value");
    }
  }
}

std::optional<std::string> KernelDeclaration::shape_unfit(const CoreShape& s) const {
  const auto listed = [](const std::vector<std::int64_t>& dims, std::int64_t v) {
    return dims.empty() || std::find(dims.begin(), dims.end(), v) != dims.end();
  };
  if (!listed(key_dims, s.key_dim)) return "key dim " + std::to_string(s.key_dim) + " not declared (" + dim_list(key_dims) + ")";
  if (!listed(value_dims, s.value_dim)) {
    return "value dim " + std::to_string(s.value_dim) + " not declared (" + dim_list(value_dims) + ")";
  }
  if (head_dim_multiple > 1 && (s.key_dim % head_dim_multiple != 0 || s.value_dim % head_dim_multiple != 0)) {
    const std::int64_t dim = s.key_dim % head_dim_multiple != 0 ? s.key_dim : s.value_dim;
    return "head dim " + std::to_string(dim) + " not a multiple of the declared " + std::to_string(head_dim_multiple);
  }
  if (kv_len_multiple > 1 && s.kv_len % kv_len_multiple != 0) {
    return "Tk " + std::to_string(s.kv_len) + " not a multiple of the declared " + std::to_string(kv_len_multiple);
  }
  if (max_q_len > 0 && s.q_len > max_q_len) return "Tq over the declared maximum " + std::to_string(max_q_len);
  if (max_batch > 0 && s.batch > max_batch) return "batch over the declared maximum " + std::to_string(max_batch);
  if (max_kv_len > 0 && s.kv_len > max_kv_len) return "Tk over the declared maximum " + std::to_string(max_kv_len);
  return std::nullopt;
}

KernelDeclaration declaration_of(const hr_kernel* k, const std::string& origin) {
  if (k == nullptr) {
    refuse(origin, "declaration", "the declaration pointer is NULL",
           "return a pointer to a static const hr_kernel from " HEADROOM_KERNEL_ENTRY "()");
  }
  if (k->abi_version < HEADROOM_ABI_OLDEST_VERSION || k->abi_version > HEADROOM_ABI_VERSION) {
    refuse(origin, "field \"abi_version\"",
           "built against kernel_abi.h version " + std::to_string(k->abi_version) + ", this headroom speaks versions " +
               std::to_string(HEADROOM_ABI_OLDEST_VERSION) + " to " + std::to_string(HEADROOM_ABI_VERSION),
           "rebuild the kernel against this headroom's headroom/kernel_abi.h and set abi_version = HEADROOM_ABI_VERSION");
  }
  KernelDeclaration d;
  d.interface_version = static_cast<int>(k->abi_version);
  if (k->name == nullptr) {
    refuse(origin, "field \"name\"", "the name is NULL", "give the kernel a short unique name of [a-z0-9_.-]");
  }
  // strnlen bounds the read: a name without its terminator is rejected, not overrun.
  std::size_t n = strnlen(k->name, kMaxNameLength + 1);
  d.name.assign(k->name, n);
  if (k->description != nullptr) d.description.assign(k->description, strnlen(k->description, 512));
  const std::string kernel = who(d);
  switch (k->level) {
    case HR_LEVEL_CORE: d.level = Level::core; break;
    case HR_LEVEL_BLOCK: d.level = Level::block; break;
    default:
      refuse(origin, "field \"level\"", kernel + " has unknown level value " + std::to_string(k->level),
             "set HR_LEVEL_CORE (0) or HR_LEVEL_BLOCK (1)");
  }
  d.input_format = format_of(k->input_format, origin, "field \"input_format\" of " + kernel);
  d.output_format = format_of(k->output_format, origin, "field \"output_format\" of " + kernel);
  if (k->abi_version < 2 && (is_fp8(d.input_format) || is_fp8(d.output_format))) {
    refuse(origin, "field \"input_format\"", kernel + " declares an 8-bit float format with abi_version 1",
           "8-bit floats are kernel_abi.h version 2: set abi_version = HEADROOM_ABI_VERSION");
  }
  // Block sizes are version-2 fields: a version-1 declaration has none.
  const bool v2 = k->abi_version >= 2;
  if (is_quantised(d.input_format)) {
    d.q_quant = scheme_of(k->q_quant, v2 ? k->q_block : 0, origin, "field \"q_quant\" of " + kernel);
    d.k_quant = scheme_of(k->k_quant, v2 ? k->k_block : 0, origin, "field \"k_quant\" of " + kernel);
    d.v_quant = scheme_of(k->v_quant, v2 ? k->v_block : 0, origin, "field \"v_quant\" of " + kernel);
  } else {
    // Zero-initialised hr_quant means per_tensor symmetric: the neutral value a
    // float kernel leaves there. Anything else signals a confused declaration.
    const hr_quant* qs[] = {&k->q_quant, &k->k_quant, &k->v_quant};
    for (const hr_quant* q : qs) {
      if (q->granularity != 0 || q->asymmetric != 0) {
        refuse(origin, "field \"q_quant\"", kernel + " gives quantisation schemes but its input format is " +
                   std::string(format_name(d.input_format)),
               "leave q_quant, k_quant, v_quant zero unless input_format is HR_FORMAT_INT8");
      }
    }
  }
  d.mask_kinds = k->mask_kinds;
  switch (k->masked_row) {
    case HR_MASKED_ROW_ZEROS: d.masked_row = MaskedRowConvention::zeros; break;
    case HR_MASKED_ROW_NAN: d.masked_row = MaskedRowConvention::nan; break;
    case HR_MASKED_ROW_NEVER_CALLED: d.masked_row = MaskedRowConvention::never_called; break;
    default:
      refuse(origin, "field \"masked_row\"", kernel + " has unknown masked_row value " + std::to_string(k->masked_row),
             "set HR_MASKED_ROW_ZEROS, HR_MASKED_ROW_NAN or HR_MASKED_ROW_NEVER_CALLED");
  }
  if (k->returns_lse != 0 && k->returns_lse != 1) {
    refuse(origin, "field \"returns_lse\"", kernel + " has returns_lse " + std::to_string(k->returns_lse),
           "set 1 when the kernel writes hr_core_problem.lse, else 0");
  }
  d.returns_lse = k->returns_lse == 1;
  d.layouts = k->layouts;
  d.max_kv_len = k->max_kv_len;
  // A version-1 plug-in's hr_kernel ends at run_block: nothing after it is read.
  if (k->abi_version >= 2) {
    d.key_dims = dims_of(k->key_dims, origin, "field \"key_dims\" of " + kernel);
    d.value_dims = dims_of(k->value_dims, origin, "field \"value_dims\" of " + kernel);
    d.head_dim_multiple = k->head_dim_multiple == 0 ? 1 : k->head_dim_multiple;
    d.kv_len_multiple = k->kv_len_multiple == 0 ? 1 : k->kv_len_multiple;
    d.max_q_len = k->max_q_len;
    d.max_batch = k->max_batch;
    if (!is_quantised(d.input_format)) {
      for (const auto& [field, blk] : {std::pair{"q_block", k->q_block}, std::pair{"k_block", k->k_block}, std::pair{"v_block", k->v_block}}) {
        if (blk != 0) {
          refuse(origin, std::string("field \"") + field + "\" of " + kernel, "a block size on a kernel without quantised input",
                 "leave q_block, k_block, v_block zero unless the input format is int8, e4m3 or e5m2");
        }
      }
    }
    if (k->fp8_saturating != 0 && k->fp8_saturating != 1) {
      refuse(origin, "field \"fp8_saturating\" of " + kernel, "value " + std::to_string(k->fp8_saturating) + " is neither 0 nor 1",
             "set 1 when the kernel's 8-bit conversions saturate to the largest finite value, else 0");
    }
    d.fp8_saturating = k->fp8_saturating == 1;
    switch (k->p_quant) {
      case HR_PQUANT_NONE: break;
      case HR_PQUANT_E4M3: d.p_quant = Format::e4m3; break;
      case HR_PQUANT_E5M2: d.p_quant = Format::e5m2; break;
      default:
        refuse(origin, "field \"p_quant\" of " + kernel, "unknown p_quant value " + std::to_string(k->p_quant),
               "use HR_PQUANT_NONE, HR_PQUANT_E4M3 or HR_PQUANT_E5M2");
    }
    d.p_scale = k->p_scale == 0.0f ? 1.0f : k->p_scale;
    refuse_unjudged(k, kernel, origin);
    d.features = k->features;
    d.split_kv_len = k->split_kv_len;
    d.backward = k->run_backward != nullptr;
    d.backward_flags = k->backward_flags;
  }
  check_declaration(d, origin);
  if (d.level == Level::core && k->run_core == nullptr) {
    refuse(origin, "field \"run_core\"", kernel + " is a core kernel without a run_core function",
           "point run_core at the kernel's entry function");
  }
  if (d.level == Level::block && k->run_block == nullptr) {
    refuse(origin, "field \"run_block\"", kernel + " is a block kernel without a run_block function",
           "point run_block at the kernel's entry function");
  }
  if ((d.level == Level::core && k->run_block != nullptr) || (d.level == Level::block && k->run_core != nullptr)) {
    refuse(origin, d.level == Level::core ? "field \"run_block\"" : "field \"run_core\"",
           kernel + " sets a run function for the level it does not declare",
           "set the other level's run function to NULL, or declare that level");
  }
  return d;
}

std::string declaration_summary(const KernelDeclaration& d) {
  std::string s = d.level == Level::core ? "core" : "block";
  s += " in=" + std::string(format_name(d.input_format));
  if (is_quantised(d.input_format)) {
    s += " q=" + scheme_token(d.q_quant) + " k=" + scheme_token(d.k_quant) + " v=" + scheme_token(d.v_quant);
  }
  s += " out=" + std::string(format_name(d.output_format));
  s += " masks=" + mask_list(d.mask_kinds);
  s += " masked_row=" + std::string(masked_row_name(d.masked_row));
  if (d.level == Level::core) s += std::string(" lse=") + (d.returns_lse ? "yes" : "no");
  std::string layouts;
  if (d.layouts & HR_LAYOUT_BHTD) layouts += "BHTD";
  if (d.layouts & HR_LAYOUT_BTHD) layouts += layouts.empty() ? "BTHD" : ",BTHD";
  s += " layouts=" + layouts;
  s += " max_kv_len=" + (d.max_kv_len == 0 ? std::string("any") : std::to_string(d.max_kv_len));
  // Version-2 shape limits, only where the kernel constrains something.
  if (!d.key_dims.empty()) s += " key_dims=" + dim_list(d.key_dims);
  if (!d.value_dims.empty()) s += " value_dims=" + dim_list(d.value_dims);
  if (d.head_dim_multiple > 1) s += " head_dim_multiple=" + std::to_string(d.head_dim_multiple);
  if (d.kv_len_multiple > 1) s += " kv_len_multiple=" + std::to_string(d.kv_len_multiple);
  if (d.max_q_len > 0) s += " max_q_len=" + std::to_string(d.max_q_len);
  if (d.max_batch > 0) s += " max_batch=" + std::to_string(d.max_batch);
  if (d.features & HR_FEATURE_WINDOW) s += " window=yes";
  if (d.features & HR_FEATURE_SOFTCAP) s += " softcap=yes";
  if (d.features & HR_FEATURE_SINKS) s += " sinks=yes";
  if (d.features & HR_FEATURE_VARLEN) s += " varlen=yes";
  if (d.features & HR_FEATURE_PAGED_KV) s += " paged_kv=yes";
  if (d.features & HR_FEATURE_SPLIT_PARTIALS) s += " split_kv_len=" + std::to_string(d.split_kv_len);
  if (d.backward) {
    s += " backward=yes";
    if (d.backward_flags & HR_BACKWARD_RECOMPUTES) s += ",recomputes";
    if (d.backward_flags & HR_BACKWARD_NONDETERMINISTIC) s += ",nondeterministic";
    if (d.backward_flags & HR_BACKWARD_BIAS_GRAD) s += ",bias_grad";
  }
  // Version-2 8-bit float conversions, only where the kernel has any.
  if (is_fp8(d.input_format) || d.p_quant) s += std::string(" fp8_saturating=") + (d.fp8_saturating ? "yes" : "no");
  if (d.p_quant) s += " p_quant=" + std::string(format_name(*d.p_quant)) + " p_scale=" + fmt_float(d.p_scale);
  return s;
}

}  // namespace headroom
