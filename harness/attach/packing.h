// headroom — a received case laid out as the C ABI's problem structure.
//
// Internal to the attach stage. Every input (Q, K, V, int8 scales and zero
// points, mask arrays; X, W, b) is its own guarded input buffer holding the
// received values in the declared format; every output (O or Y, the
// log-sum-exp) is its own canaried output buffer prefilled with "unwritten"
// NaNs. Core tensors are BHTD contiguous when the kernel declares BHTD, else
// BTHD strided (extents stay [B, H, T, D]; strides say where elements are).
#pragma once

#include <cstdint>
#include <optional>

#include "attach/guarded_arena.h"
#include "headroom/attach.h"
#include "headroom/kernel_abi.h"

namespace headroom::attach_detail {

struct PackedCall {
  GuardedArena arena;
  hr_core_problem core{};    ///< level core
  hr_block_problem block{};  ///< level block
  Level level = Level::core;
  Format output_format = Format::float32;
  std::size_t out_slot = 0;
  std::optional<std::size_t> lse_slot;
  std::int64_t out_extents[4] = {1, 1, 1, 1};
  std::int64_t out_strides[4] = {0, 0, 0, 0};
  std::vector<std::int64_t> out_shape;  ///< of KernelRun::out: [B, Hq, Tq, Dv] or [B, Tq, Dm]
  /// HR_FEATURE_SPLIT_PARTIALS: o_partials [S, B·Hq, Tq, Dv] (output format,
  /// contiguous) and lse_partials [S, B, Hq, Tq] (float32); S = 0 otherwise.
  std::int64_t num_splits = 0;
  std::size_t partial_slot = 0, lse_partial_slot = 0;
};

/// A backward call's buffers: the forward's inputs and mask, O, lse and dO as
/// guarded inputs, dQ, dK, dV (and d(bias)) as canaried outputs prefilled
/// with "unwritten" NaNs, laid out as the forward's (BHTD or BTHD).
struct PackedBackward {
  GuardedArena arena;
  hr_backward_problem problem{};
  Format output_format = Format::float32;
  std::size_t grad_slot[3] = {0, 0, 0};          ///< dQ, dK, dV
  std::int64_t grad_extents[3][4] = {};
  std::int64_t grad_strides[3][4] = {};
  std::optional<std::size_t> bias_slot;           ///< d(bias), float32, contiguous
  std::vector<std::int64_t> bias_shape;
};

/// Returns: the buffers and problem structure for one backward call of kernel
/// `d` on `c`, given O and lse. Preconditions: as AttachedKernel::run_backward.
PackedBackward pack_backward(const ReceivedCase& c, const KernelDeclaration& d, const Tensor& o, const Tensor& lse);

/// Returns: the gradients of a returned backward call into `r` (d_q, d_k, d_v, d_bias).
void unpack_gradients(const PackedBackward& p, BackwardRun& r);

/// Returns: nothing when `c` was received for kernel `d` (level, input format,
/// mask kind, int8 codes and schemes); throws std::invalid_argument otherwise.
void check_received(const ReceivedCase& c, const KernelDeclaration& d);

/// Returns: the buffers and problem structure for one call of kernel `d` on `c`.
/// Preconditions: c = receive(case, d) (checked: std::invalid_argument otherwise).
PackedCall pack(const ReceivedCase& c, const KernelDeclaration& d);

/// Returns: the output tensor (values of the output format, as doubles) and,
/// when returned, the log-sum-exp [B, Hq, Tq].
Tensor unpack_output(const PackedCall& p);
Tensor unpack_lse(const PackedCall& p);
/// Returns: the split partials of a call (KernelRun::o_partials, lse_partials);
/// empty tensors when the call has none.
void unpack_partials(const PackedCall& p, Tensor& o_partials, Tensor& lse_partials);
/// Returns: how many output elements still hold the unwritten fill; sets
/// `*first` to the flat index (into unpack_output's tensor) of the first, −1 when none.
std::int64_t count_unwritten(const PackedCall& p, std::int64_t* first);

}  // namespace headroom::attach_detail
