// headroom — what a kernel receives: the case's source values in its declared input format (attach.h).
#include <cmath>
#include <cstdint>
#include <stdexcept>
#include <string>

#include "headroom/attach.h"
#include "headroom/binary16.h"
#include "headroom/input_error.h"
#include "headroom/kernel_abi.h"
#include "headroom/varlen.h"

namespace headroom {
namespace {

// The value a buffer of format f holds for source value x: the pattern nearest
// to x (ties to even), read back exactly. Converting from double rounds once.
double received_value(double x, Format f) {
  switch (f) {
    case Format::float64: return x;
    case Format::float32: return static_cast<double>(static_cast<float>(x));
    case Format::binary16: return binary16_to_float(double_to_binary16(x));
    case Format::bfloat16: return bfloat16_to_float(double_to_bfloat16(x));
    case Format::int8:
    case Format::e4m3:
    case Format::e5m2: break;
  }
  throw std::logic_error("received_value: int8 and 8-bit floats are quantised with scales, not rounded per value");
}

void round_in_place(Tensor& t, Format f) {
  if (f == Format::float64) return;
  for (double& v : t.values) v = received_value(v, f);
}

Tensor rounded(const Tensor& t, Format f) {
  Tensor out = t;
  round_in_place(out, f);
  return out;
}

// The mask as the ABI carries it: dense entries become 0/1 bytes, a bias
// becomes float32 (hr_mask.bias is const float*). −inf stays −inf.
Mask received_mask(const Mask& m) {
  Mask out = m;
  if (m.kind == MaskKind::dense) {
    for (double& v : out.allowed.values) v = v != 0.0 ? 1.0 : 0.0;
  } else if (m.kind == MaskKind::bias) {
    out.bias = rounded(m.bias, Format::float32);
  }
  return out;
}

bool has_fully_masked_row(const CoreShape& s, const Mask& m) {
  for (std::int64_t b = 0; b < s.batch; ++b) {
    for (std::int64_t h = 0; h < s.q_heads; ++h) {
      for (std::int64_t i = 0; i < s.q_len; ++i) {
        bool any = false;
        for (std::int64_t j = 0; j < s.kv_len && !any; ++j) any = m.visible(s, b, h, i, j);
        if (!any) return true;
      }
    }
  }
  return false;
}

std::string problems_text(const std::vector<ProblemError>& errors) {
  std::string text;
  for (const ProblemError& e : errors) text += (text.empty() ? "" : "; ") + e.message();
  return text;
}

// `delayed`: the case's delayed scale for this tensor (0: none; read by
// 8-bit float kernels only), converted with the kernel's saturation mode —
// saturating, since why_unfit keeps delayed cases from the others.
QuantizedTensor quantized(const Case& c, const Tensor& t, const QuantScheme& scheme, const KernelDeclaration& d,
                          float delayed, const char* which) {
  const Format f = d.input_format;
  try {
    if (f == Format::int8) return quantize(t, scheme);
    return delayed > 0.0f ? quantize_fp8_delayed(t, scheme, f, delayed, d.fp8_saturating) : quantize_fp8(t, scheme, f);
  } catch (const std::invalid_argument& e) {
    throw InputError(c.name, std::string("tensor ") + which,
                     std::string("cannot be quantised as ") + scheme_name(scheme) + ": " + e.what(),
                     "give the case finite values within float32 range");
  }
}

}  // namespace

std::optional<std::string> why_unfit(const Case& c, const KernelDeclaration& d) {
  const char* case_level = c.level == Level::core ? "core" : "block";
  if (c.level != d.level) {
    return std::string("the case is a ") + case_level + " problem and kernel \"" + d.name + "\" is a " +
           (d.level == Level::core ? "core" : "block") + " kernel";
  }
  const Mask& mask = c.level == Level::core ? c.core.mask : c.block.mask;
  const CoreShape shape = c.level == Level::core ? c.core.shape : c.block.shape.core();
  if (!d.supports(mask.kind)) {
    return "kernel \"" + d.name + "\" does not declare mask kind " + std::string(mask_kind_name(mask.kind));
  }
  if (mask.is_varlen() && (d.features & HR_FEATURE_VARLEN) == 0) return std::string("variable lengths not declared");
  if (!d.accepts(mask)) return std::string("sliding window not declared");
  if (c.level == Level::core && c.core.has_softcap() && (d.features & HR_FEATURE_SOFTCAP) == 0)
    return std::string("soft cap not declared");
  if (c.level == Level::core && c.core.has_sinks() && (d.features & HR_FEATURE_SINKS) == 0)
    return std::string("sink logits not declared");
  if (c.level == Level::core && c.core.has_paged_kv() && (d.features & HR_FEATURE_PAGED_KV) == 0)
    return std::string("paged K/V not declared");
  if (c.level == Level::core && c.core.has_paged_kv() && is_quantised(d.input_format))
    return std::string("paged K/V with ") + std::string(format_name(d.input_format)) +
           " codes is not judged (page-wise scales are not defined)";
  // A packed batch is declared to the kernel as N sequences of at most the
  // largest lengths (kernel_abi.h), and its limits apply to that.
  const bool offsets_ok = validate_varlen(mask, shape).empty();  // sequence() may index them
  if (auto reason = d.shape_unfit(offsets_ok ? declared_shape(shape, mask) : shape)) return reason;
  for (std::int64_t n = 0; offsets_ok && n < sequence_count(mask) && d.kv_len_multiple > 1; ++n) {
    const std::int64_t tk = sequence(mask, n).kv_len;
    if (tk % d.kv_len_multiple != 0)
      return "Tk " + std::to_string(tk) + " of sequence " + std::to_string(n) + " not a multiple of the declared " +
             std::to_string(d.kv_len_multiple);
  }
  // Delayed scales let values pass the format's largest finite value; a
  // non-saturating conversion turns them into NaN or infinite codes, whose
  // attention no reference defines.
  if (c.level == Level::core && c.core.fp8_delayed.any() && is_fp8(d.input_format) && !d.fp8_saturating) {
    return "delayed 8-bit scales (fp8_delayed_scales_hex) with kernel \"" + d.name +
           "\", which declares non-saturating conversions (fp8_saturating 0): values past the format's range would be NaN or infinite";
  }
  if (c.level == Level::block && is_quantised(d.input_format)) {
    return std::string(format_name(d.input_format)) + " input at block level is not supported (only Q, K, V are quantised)";
  }
  if (d.masked_row == MaskedRowConvention::never_called) {
    // The mask must be consistent before visible() may index it.
    const bool consistent = c.level == Level::core ? validate(c.core).empty() : validate(c.block).empty();
    if (consistent && has_fully_masked_row(shape, mask)) {
      return "the case has a fully masked query row and kernel \"" + d.name + "\" declares masked_row never_called";
    }
  }
  return std::nullopt;
}

ReceivedCase receive(const Case& c, const KernelDeclaration& d) { return receive(Case(c), d); }

// The source case is moved in and each tensor rounded where it lies, so the
// case is held once (not source, copy and rounded copy side by side).
ReceivedCase receive(Case&& source, const KernelDeclaration& d) {
  const std::vector<ProblemError> errors = source.level == Level::core ? validate(source.core, source.core_inputs)
                                                                       : validate(source.block, source.block_inputs);
  if (!errors.empty()) {
    throw InputError(source.name, "problem", "the case is inconsistent: " + problems_text(errors),
                     "regenerate the case or correct its manifest and tensors");
  }
  if (auto reason = why_unfit(source, d)) {
    throw InputError(source.name, "kernel declaration", *reason,
                     "choose a kernel that declares this case, or skip the case (why_unfit)");
  }
  ReceivedCase r;
  r.received = std::move(source);
  Case& c = r.received;
  r.input_format = d.input_format;
  if (c.level == Level::core) {
    c.core.mask = received_mask(c.core.mask);
    if (is_quantised(d.input_format)) {
      const CoreProblem::DelayedScales& ds = c.core.fp8_delayed;
      r.q8 = quantized(c, c.core_inputs.q, d.q_quant, d, ds.q, "q");
      c.core_inputs.q = dequantize(*r.q8);
      r.k8 = quantized(c, c.core_inputs.k, d.k_quant, d, ds.k, "k");
      c.core_inputs.k = dequantize(*r.k8);
      r.v8 = quantized(c, c.core_inputs.v, d.v_quant, d, ds.v, "v");
      c.core_inputs.v = dequantize(*r.v8);
    } else {
      for (Tensor* t : {&c.core_inputs.q, &c.core_inputs.k, &c.core_inputs.v}) round_in_place(*t, d.input_format);
    }
    // dO, when the case carries one, in the input format like Q, K, V (kernels
    // receiving codes with scales, int8 and the 8-bit floats, have no backward
    // and keep it float32).
    if (!c.d_o.values.empty()) round_in_place(c.d_o, is_quantised(d.input_format) ? Format::float32 : d.input_format);
  } else {
    c.block.mask = received_mask(c.block.mask);
    BlockInputs& in = c.block_inputs;
    for (Tensor* t : {&in.x_q, &in.x_kv, &in.w_q, &in.w_k, &in.w_v, &in.w_o, &in.b_q, &in.b_k, &in.b_v, &in.b_o})
      round_in_place(*t, d.input_format);
  }
  // Rounding a bias to float32 can carry a huge finite value to +inf: say so
  // here rather than hand the kernel a problem the model does not define.
  const std::vector<ProblemError> after = c.level == Level::core ? validate(c.core) : validate(c.block);
  if (!after.empty()) {
    throw InputError(c.name, "mask", "after rounding to the kernel's formats: " + problems_text(after),
                     "keep bias values within float32 range");
  }
  return r;
}

}  // namespace headroom
