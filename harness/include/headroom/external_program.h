// headroom — the exchange with a kernel that is an external program (docs/external-program.md).
//
// headroom runs a command line CMD (through /bin/sh, in its own process group,
// under a subreaper that ends every process CMD starts when CMD ends):
//
//   CMD describe    prints the kernel's declaration as one JSON object on stdout
//                   and exits 0 (declaration_from_json says what it may hold);
//   CMD run DIR     DIR holds problem.json and the inputs as .npy files in the
//                   declared input format; the program writes DIR/o.npy (core)
//                   or DIR/y.npy (block), and DIR/lse.npy when it declares
//                   returns_lse, then exits 0 — or exits 77 to decline the
//                   problem (reported as unsupported).
//   CMD run-backward DIR  (a program declaring "backward": true) DIR holds the
//                   forward's inputs plus o.npy, lse.npy and d_o.npy; the
//                   program writes d_q.npy, d_k.npy, d_v.npy (and d_bias.npy
//                   when it declares "bias_grad" and the mask is a bias).
//
// Inputs (C-order, little-endian; the logical [B, H, T, D] order whatever the
// plug-in layouts): q.npy [B, Hq, Tq, Dk], k.npy, v.npy [B, Hkv, Tk, Dk|Dv];
// binary16 as '<f2', bfloat16 as '<u2' bit patterns, float32 '<f4', float64
// '<f8', int8 codes '|i1' with q_scale.npy '<f4' (shape as quant.h) and, when
// asymmetric, q_zero_point.npy '<i4' (likewise k_, v_); key_lengths.npy '<i8'
// [B], mask.npy '|b1' [B, 1|Hq, Tq, Tk], bias.npy '<f4' [B, 1|Hq, Tq, Tk].
// Block: x_q.npy [B, Tq, Dm], x_kv.npy [B, Tk, Dm], w_q.npy [Dm, Hq·Dk],
// w_k.npy, w_v.npy, w_o.npy [Hq·Dv, Dm], b_*.npy [n] when present.
// Outputs: o.npy [B, Hq, Tq, Dv] / y.npy [B, Tq, Dm] with the dtype of the
// output format, lse.npy '<f4' [B, Hq, Tq]. Anything else — missing,
// truncated, another dtype or shape — is bad_output naming the file. A `run`
// that exits leaving a process it started running (forked, setsid,
// double-forked) is stray_process naming the process (which is killed).
// The exchange folder is created under the temp directory and always removed.
#pragma once

#include <filesystem>
#include <string>

#include "headroom/attach.h"
#include "headroom/kernel.h"

namespace headroom {

/// The exchange's version: "protocol" in describe's JSON and in problem.json.
/// Protocol 2 follows kernel_abi.h version 2 field for field; protocol 1
/// programs keep working (docs/external-program.md).
inline constexpr int kExternalProtocolVersion = 2;
inline constexpr int kOldestExternalProtocolVersion = 1;
/// The version of persistent mode ("serve" in describe's JSON, and the
/// program's ready line): `CMD serve` answers many calls over stdin/stdout.
inline constexpr int kServeProtocolVersion = 1;
/// The exit status with which `CMD run DIR` declines a problem.
inline constexpr int kExternalExitUnsupported = 77;

/// Returns: the declaration in `text`, one JSON object with the fields
///   "protocol" 1 or 2, "name", "level" ("core"|"block"), "input_format",
///   "output_format" (format names of format.h), "mask_kinds" (array of mask
///   kind names of problem.h), "masked_row" ("zeros"|"nan"|"never_called");
///   optional "description" (""), "returns_lse" (false), "max_kv_len" (0 = no
///   limit), "layouts" (["BHTD"]: the only layout of .npy files);
///   int8 input: "q_quant", "k_quant", "v_quant" each {"granularity":
///   "per_tensor"|"per_head"|"per_token"|"per_channel", "asymmetric": bool};
///   protocol 2 also: "key_dims", "value_dims" (arrays of positive integers),
///   "head_dim_multiple", "kv_len_multiple", "max_q_len", "max_batch"
///   (integers ≥ 0), as in kernel_abi.h version 2.
/// Throws InputError with `origin` as the file and the field as the place
/// for malformed JSON, a missing, unknown or mistyped field, an unknown name,
/// and every rule of check_declaration. Protocol 2 may add "serve": 0 or
/// kServeProtocolVersion (persistent mode); it is stored in `*serve` when
/// given (0 when absent), since it says how to run the program, not what the kernel is.
KernelDeclaration declaration_from_json(const std::string& text, const std::string& origin, int* serve = nullptr);

/// Returns: `d` as `CMD describe` would print it (declaration_from_json reads
/// it back to an equal declaration).
std::string declaration_to_json(const KernelDeclaration& d);

/// Writes problem.json and the input files of one call into `dir` (existing).
/// Preconditions: c = receive(case, d).
void write_exchange(const std::filesystem::path& dir, const ReceivedCase& c, const KernelDeclaration& d);

/// Returns: the outputs read back from `dir`: status ok with out (and lse),
/// or bad_output with a detail naming the file and what is wrong with it.
KernelRun read_exchange(const std::filesystem::path& dir, const ReceivedCase& c, const KernelDeclaration& d);

/// Writes problem.json ("pass": "backward") and the inputs of one backward
/// call into `dir` (existing): those of write_exchange, plus o.npy (the output
/// format's dtype, [B, Hq, Tq, Dv]: `o` rounded to the output format), lse.npy
/// ('<f4' [B, Hq, Tq]: `lse` rounded to float32) and d_o.npy (the input
/// format's dtype, [B, Hq, Tq, Dv]: the case's received dO). problem.json's
/// "outputs" name d_q, d_k, d_v (output format, the shapes of q, k, v) and
/// d_bias ('<f4', the bias's shape) when d declares HR_BACKWARD_BIAS_GRAD and
/// the mask is a bias. Preconditions: as AttachedKernel::run_backward; throws
/// std::invalid_argument otherwise.
void write_backward_exchange(const std::filesystem::path& dir, const ReceivedCase& c, const KernelDeclaration& d,
                             const Tensor& o, const Tensor& lse);

/// Returns: the gradients read back from `dir` after a backward call: status
/// ok with d_q, d_k, d_v (and d_bias), or bad_output naming the first file
/// missing, mistyped, mis-shaped or malformed.
BackwardRun read_backward_exchange(const std::filesystem::path& dir, const ReceivedCase& c, const KernelDeclaration& d);

/// Ends every external kernel program now running, with every process it
/// started (their supervisors SIGKILL and reap them, and exit on their own).
/// Async-signal-safe: meant for the handler of a signal that ends headroom,
/// since the programs run in groups of their own and Ctrl-C at a terminal
/// does not reach them. (A SIGKILLed headroom cannot call it; the supervisors
/// then end their programs by themselves: docs/reliability.md.)
void kill_running_programs() noexcept;

/// Removes the exchange folder of every external-program call now in progress
/// (files and folders in it included; links removed, never followed).
/// Async-signal-safe, for the same handler, after kill_running_programs().
void remove_exchange_folders() noexcept;

/// Removes, from `temp_dir`, every "headroom-run-<pid>-*" folder owned by this
/// user whose <pid> is not a running process: what a SIGKILLed headroom left.
/// The first exchange folder a process makes calls it on the temporary
/// directory. Returns: how many it removed. Folders of running processes, of
/// other users, links and names of another form are left alone.
int sweep_abandoned_exchange_folders(const std::filesystem::path& temp_dir);

}  // namespace headroom
