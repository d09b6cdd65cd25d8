// headroom flawed specimen — varlen_offset_off_by_one: each sequence's keys run one past its end offset.
//
// Method: f32_varlen (varlen_prefill.h): packed variable-length prefill in
// float32, online softmax per sequence.
// DEFECT: the key count of sequence n is taken as cu_kv_lens[n+1] + 1 −
// cu_kv_lens[n] (clamped to the packed total so the last sequence stays in
// bounds): every sequence but the last also attends the first key of the next
// one, and its causal alignment and window shift by that one key. Dense
// batches are exactly f32_varlen's.
// Expected fault: mask_leak (a key of another sequence changes the row; the
// fault's detail names the row's sequence and place and the key's).
#include <cstdint>

#include "../kernel_list.h"
#include "../varlen_prefill.h"

namespace hr_kernels {
namespace {

std::int32_t run(const hr_core_problem* p) { return varlen_prefill(p, 1); }

}  // namespace

const hr_kernel varlen_offset_off_by_one = [] {
  hr_kernel k = f32_varlen;
  k.name = "varlen_offset_off_by_one";
  k.description = "float32 packed variable-length prefill whose key range runs one past each sequence's end offset";
  k.run_core = run;
  return k;
}();

}  // namespace hr_kernels
