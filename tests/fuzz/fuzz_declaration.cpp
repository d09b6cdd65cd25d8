// headroom fuzzing — an external program's `describe` output (declaration_from_json) on arbitrary text.
//
// What a program prints is as untrusted as a file. An InputError is the normal
// outcome; anything else is a finding: a crash, a sanitizer report, a leak,
// another exception, or an accepted declaration that does not survive
// declaration_to_json → declaration_from_json unchanged.
#include <cstddef>
#include <cstdint>
#include <cstdlib>
#include <string>

#include "headroom/external_program.h"
#include "headroom/input_error.h"

namespace {

void check(bool ok) {
  if (!ok) std::abort();
}

bool same(const headroom::KernelDeclaration& a, const headroom::KernelDeclaration& b) {
  return a.name == b.name && a.description == b.description && a.level == b.level &&
         a.input_format == b.input_format && a.output_format == b.output_format && a.q_quant == b.q_quant &&
         a.k_quant == b.k_quant && a.v_quant == b.v_quant && a.mask_kinds == b.mask_kinds &&
         a.masked_row == b.masked_row && a.returns_lse == b.returns_lse && a.layouts == b.layouts &&
         a.max_kv_len == b.max_kv_len && a.key_dims == b.key_dims && a.value_dims == b.value_dims &&
         a.head_dim_multiple == b.head_dim_multiple && a.kv_len_multiple == b.kv_len_multiple &&
         a.max_q_len == b.max_q_len && a.max_batch == b.max_batch;
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  const std::string text(reinterpret_cast<const char*>(data), size);
  headroom::KernelDeclaration d;
  try {
    d = headroom::declaration_from_json(text, "`fuzz describe`");
  } catch (const headroom::InputError&) {
    return 0;
  }
  check(same(headroom::declaration_from_json(headroom::declaration_to_json(d), "`fuzz rewritten`"), d));
  check(!headroom::declaration_summary(d).empty());
  return 0;
}
