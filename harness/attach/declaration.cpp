// headroom — reading a kernel's declaration, trusting nothing in it (kernel.h).
#include <cstring>
#include <string>

#include "headroom/input_error.h"
#include "headroom/kernel.h"
#include "headroom/kernel_abi.h"

namespace headroom {
namespace {

constexpr std::size_t kMaxNameLength = 64;
constexpr std::uint32_t kAllMasks = HR_MASK_NONE | HR_MASK_CAUSAL_TOP_LEFT | HR_MASK_CAUSAL_BOTTOM_RIGHT |
                                    HR_MASK_KEY_PADDING | HR_MASK_DENSE | HR_MASK_BIAS;
constexpr std::uint32_t kAllLayouts = HR_LAYOUT_BHTD | HR_LAYOUT_BTHD;
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
    default: break;
  }
  refuse(origin, place, "unknown format value " + std::to_string(v),
         "use one of the HR_FORMAT_* values of kernel_abi.h (0..4)");
}

QuantScheme scheme_of(const hr_quant& q, const std::string& origin, const std::string& place) {
  QuantScheme s;
  switch (q.granularity) {
    case HR_QUANT_PER_TENSOR: s.granularity = Granularity::per_tensor; break;
    case HR_QUANT_PER_HEAD: s.granularity = Granularity::per_head; break;
    case HR_QUANT_PER_TOKEN: s.granularity = Granularity::per_token; break;
    case HR_QUANT_PER_CHANNEL: s.granularity = Granularity::per_channel; break;
    default:
      refuse(origin, place + ".granularity", "unknown granularity value " + std::to_string(q.granularity),
             "use one of the HR_QUANT_* values of kernel_abi.h (0..3)");
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
  return std::string(granularity_name(q.granularity)) + (q.asymmetric ? ",asymmetric" : "");
}

}  // namespace

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

void check_declaration(const KernelDeclaration& d, const std::string& origin) {
  if (d.name.empty() || d.name.size() > kMaxNameLength) {
    refuse(origin, "field \"name\"", "the name is empty or longer than 64 characters",
           "give the kernel a short unique name of [a-z0-9_.-]");
  }
  for (char ch : d.name) {
    bool ok = (ch >= 'a' && ch <= 'z') || (ch >= '0' && ch <= '9') || ch == '_' || ch == '.' || ch == '-';
    if (!ok) {
      refuse(origin, "field \"name\"", "name \"" + d.name + "\" holds a character outside [a-z0-9_.-]",
             "rename the kernel using lower-case letters, digits, '_', '.' and '-' only");
    }
  }
  if (d.output_format == Format::int8) {
    refuse(origin, "field \"output_format\"", who(d) + " declares int8 output; int8 is an input format only",
           "return float32 (or binary16, bfloat16, float64) and declare that");
  }
  if (d.level == Level::block && d.input_format == Format::int8) {
    refuse(origin, "field \"input_format\"", who(d) + " is a block kernel with int8 input; headroom quantises only Q, K, V",
           "declare a float input format for block kernels, or make it a core kernel");
  }
  if (d.input_format != Format::int8 && !(d.q_quant == QuantScheme{} && d.k_quant == QuantScheme{} && d.v_quant == QuantScheme{})) {
    refuse(origin, "field \"q_quant\"", who(d) + " gives quantisation schemes but its input format is " +
               std::string(format_name(d.input_format)),
           "leave q_quant, k_quant, v_quant zero unless input_format is int8");
  }
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
}

KernelDeclaration declaration_of(const hr_kernel* k, const std::string& origin) {
  if (k == nullptr) {
    refuse(origin, "declaration", "the declaration pointer is NULL",
           "return a pointer to a static const hr_kernel from " HEADROOM_KERNEL_ENTRY "()");
  }
  if (k->abi_version != HEADROOM_ABI_VERSION) {
    refuse(origin, "field \"abi_version\"",
           "built against kernel_abi.h version " + std::to_string(k->abi_version) + ", this headroom speaks version " +
               std::to_string(HEADROOM_ABI_VERSION),
           "rebuild the kernel against this headroom's headroom/kernel_abi.h and set abi_version = HEADROOM_ABI_VERSION");
  }
  KernelDeclaration d;
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
  if (d.input_format == Format::int8) {
    d.q_quant = scheme_of(k->q_quant, origin, "field \"q_quant\" of " + kernel);
    d.k_quant = scheme_of(k->k_quant, origin, "field \"k_quant\" of " + kernel);
    d.v_quant = scheme_of(k->v_quant, origin, "field \"v_quant\" of " + kernel);
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
  if (d.input_format == Format::int8) {
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
  return s;
}

}  // namespace headroom
