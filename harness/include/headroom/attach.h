// headroom — attaching a kernel and running it on a case, whatever form it takes.
//
// Three ways in, one behaviour behind them: a bundled kernel (in-process
// registry), a shared library loaded by path, an external program exchanging
// .npy files. A run can be isolated in a child process with guard pages after
// every input and canaries around every output; what goes wrong is reported as
// a RunStatus, never as a crash of headroom.
#pragma once

#include <cstdint>
#include <memory>
#include <optional>
#include <string>
#include <vector>

#include "headroom/case.h"
#include "headroom/kernel.h"
#include "headroom/quant.h"
#include "headroom/tensor.h"

struct hr_kernel;

namespace headroom {

/// What a kernel receives for a case: the case's source values rounded or
/// quantised to the kernel's input format. `core_inputs` / `block_inputs` hold
/// the exact received values (what the reference must use); for int8, e4m3
/// and e5m2 the codes and scales are kept too.
struct ReceivedCase {
  Case received;  ///< same problem, tensors replaced by the received values
  std::optional<QuantizedTensor> q8, k8, v8;  ///< int8 / e4m3 / e5m2 core inputs (codes and scales)
  Format input_format = Format::float32;      ///< the format the tensors were received in
  /// Paged K/V (paged_kv.h): pages whose every K element is set to
  /// page_poison_k and V element to page_poison_v when packed, so a detector
  /// can tell whether a kernel reads them (pages in no block table hold 0
  /// otherwise). Empty as received.
  std::vector<std::int32_t> poisoned_pages{};
  double page_poison_k = 0.0, page_poison_v = 0.0;
};

/// Returns: why kernel `d` cannot be given case `c` (level, mask kind,
/// the declared shape limits of KernelDeclaration::shape_unfit, a fully masked row for a never_called kernel, int8 at block
/// level), or nothing when it can. Callers skip such cases; receive refuses them.
std::optional<std::string> why_unfit(const Case& c, const KernelDeclaration& d);

/// Returns: the case as the kernel declared by `d` receives it: every source
/// tensor (Q, K, V; X, W, b) rounded to d.input_format with round-to-nearest-
/// even (binary16.h, format.h; float64 unchanged), or quantised with d's
/// per-input schemes (quant.h); the upstream gradient dO, when the case has
/// one, rounded like Q, K, V (to float32 for int8); an additive bias rounded to float32 (the ABI
/// passes it as float); dense mask entries normalised to 0/1. The values are
/// exactly those the kernel's buffers will hold. Values beyond a format's range
/// become ±infinity, as the conversion prescribes.
/// Throws InputError naming the case when why_unfit says no, when the case is
/// inconsistent (validate), or when int8 quantisation refuses the values.
ReceivedCase receive(const Case& c, const KernelDeclaration& d);
/// As above, taking the case's tensors instead of copying them: each is
/// rounded where it lies, so a case is held once while it is received.
ReceivedCase receive(Case&& c, const KernelDeclaration& d);

enum class RunStatus : unsigned char {
  ok,
  unsupported,  ///< the kernel returned HR_UNSUPPORTED
  crash,        ///< signal other than a guard-page fault, exit(), or memory limit
  oob_read,     ///< touched the guard page after an input
  oob_write,    ///< damaged a canary around an output
  timeout,      ///< over the time limit
  bad_output,   ///< external program: missing / malformed / mis-shaped output
  stray_process ///< the call returned but left a process it started running
};
/// Returns: the fault class name used in JSON ("ok", "unsupported", "crash", "oob_read", ...).
const char* run_status_name(RunStatus s);

/// Isolation (isolate = true): the call runs in a child process, forked by a
/// small worker process started when the kernel was attached (so a call costs
/// the same however much headroom holds), or by headroom itself when the
/// worker cannot be used. The child leads its own process group and reaps
/// what the kernel starts: a process still running when the call returns is
/// killed and reported (stray_process). Every input
/// buffer ends exactly where a PROT_NONE guard page begins (so one element
/// read past the end faults; the start is aligned only to the element size)
/// and is read-only; every output has 64 canary bytes before and after it
/// and a guard page after that; outputs are prefilled with a quiet-NaN
/// pattern, so an element left unwritten reads as NaN. The child has no core
/// dumps, its stdout goes to stderr (headroom's stdout stays headroom's), and
/// RLIMIT_AS = its address space at fork + memory_limit_bytes.
/// Time (isolated calls): the limit (call_time_limit: time_limit_s plus a
/// share that grows with the problem) bounds the CPU time of the child, all
/// its threads, and separately the wall time in which none of its threads is
/// running or waiting for a core (asleep, blocked on I/O or a device): waiting
/// for a core on a busy machine counts against neither, so a sound kernel is
/// not timed out by load, while a hanging kernel, spinning or asleep, ends
/// about one limit after it started. Every timeout names the limit it broke.
/// In-process (isolate = false): same buffers, guard pages left accessible
/// and checked like canaries afterwards; no time or memory limit, and a
/// kernel that crashes or calls exit() ends headroom with it (for speed on
/// kernels already known to behave).
/// External programs always run in their own process group, under the time
/// limit but with no address-space limit (GPU runtimes and sanitizer builds
/// reserve terabytes they never touch); isolate is moot for them.
struct RunOptions {
  bool isolate = true;          ///< run in a child process (guard pages, canaries, limits)
  double time_limit_s = 20.0;   ///< seconds for a small problem (CPU, and asleep); the child is SIGKILLed
                                ///< past call_time_limit (external programs: wall clock, unscaled)
  std::uint64_t memory_limit_bytes = std::uint64_t{4} << 30;  ///< address space the call may add
  double seconds_per_work = 5e-9;  ///< CPU seconds added per multiply-add of the problem (0: none)
};

struct KernelRun {
  RunStatus status = RunStatus::ok;
  std::string detail;  ///< human-readable reason when status != ok
  Tensor out;          ///< core [B, Hq, Tq, Dv] or block [B, Tq, Dm], output-format values as doubles;
                       ///< filled only when status is ok (unwritten elements read as NaN)
  Tensor lse;          ///< [B, Hq, Tq] when ok and the kernel returns log-sum-exp, else empty
  /// HR_FEATURE_SPLIT_PARTIALS, when ok: each split's output [S, B·Hq, Tq, Dv]
  /// (output-format values) and log-sum-exp [S, B, Hq, Tq]; else empty.
  Tensor o_partials, lse_partials;
  std::int64_t unwritten = 0;         ///< output elements still holding headroom's NaN fill (never written;
                                      ///< plug-ins only: an external program writes whole files)
  std::int64_t first_unwritten = -1;  ///< flat index into `out` of the first of them, −1 when none
};

/// The outcome of one backward call: gradients in the kernel's output format
/// (as doubles), filled only when status is ok (unwritten elements read as NaN).
struct BackwardRun {
  RunStatus status = RunStatus::ok;
  std::string detail;  ///< human-readable reason when status != ok
  Tensor d_q;          ///< [B, Hq, Tq, Dk]
  Tensor d_k;          ///< [B, Hkv, Tk, Dk]
  Tensor d_v;          ///< [B, Hkv, Tk, Dv]
  Tensor d_bias;       ///< [B, Hm, Tq, Tk] float32 values when the kernel declares HR_BACKWARD_BIAS_GRAD and
                       ///< the mask is a bias; else empty
};

class AttachedKernel {
 public:
  virtual ~AttachedKernel() = default;
  virtual const KernelDeclaration& declaration() const = 0;
  /// Returns: the outcome of one call on `c`. Never throws for kernel misbehaviour.
  /// Preconditions: `c` = receive(case, declaration()); throws
  /// std::invalid_argument otherwise (a caller's mistake, not the kernel's).
  virtual KernelRun run(const ReceivedCase& c, const RunOptions& opt) = 0;
  /// Returns: the outcomes of `times` (1 … 4) calls on `c` made one after
  /// another in one process (isolated: one child), so that state a kernel
  /// keeps between calls shows; fewer when a call ended that process (the last
  /// one says how). This default makes `times` separate calls of run().
  virtual std::vector<KernelRun> run_repeated(const ReceivedCase& c, const RunOptions& opt, int times);
  /// Returns: the outcome of one backward call on `c` given the forward output
  /// `o` [B, Hq, Tq, Dv] (values of the kernel's output format; rounded to it
  /// when not) and log-sum-exp `lse` [B, Hq, Tq] (rounded to float32; −inf or
  /// NaN on fully masked rows). Under the same buffers, guards and isolation as
  /// run. Never throws for kernel misbehaviour.
  /// Preconditions: declaration().backward, `c` = receive(case, declaration())
  /// of a case with dO (ReceivedCase::received.d_o); throws
  /// std::invalid_argument otherwise.
  virtual BackwardRun run_backward(const ReceivedCase& c, const Tensor& o, const Tensor& lse, const RunOptions& opt);
};

/// Returns: the CPU-time limit of one isolated call on `c`, in seconds:
/// opt.time_limit_s + opt.seconds_per_work × the multiply-adds of the problem
/// (core: score elements B·Hq·Tq·Tk × (Dk + Dv); block: those plus the four
/// projections). The default 5e-9 s allows a kernel 0.2 G multiply-adds per
/// second, far below any vectorised or even scalar float loop.
double call_time_limit(const Case& c, const RunOptions& opt);
/// Returns: the CPU-time limit of one isolated backward call on core case `c`,
/// in seconds: as call_time_limit with the backward's multiply-adds
/// B·Hq·Tq·Tk × (3Dk + 2Dv) (S recomputed, dP, dV, dQ, dK: one product each).
double backward_call_time_limit(const Case& c, const RunOptions& opt);

/// Returns: a kernel from the in-process table `k` (a bundled kernel).
std::unique_ptr<AttachedKernel> attach_in_process(const hr_kernel* k);
/// Returns: a kernel loaded from a shared library. Throws InputError naming the
/// file and the fix for a missing file, a missing entry symbol, an ABI version
/// mismatch or a garbage declaration.
std::unique_ptr<AttachedKernel> attach_library(const std::string& path);
/// Returns: a kernel run as an external program (see external_program.h for the
/// exchange protocol). Throws InputError when its declaration is unreadable.
std::unique_ptr<AttachedKernel> attach_program(const std::string& command, double time_limit_s);

/// Returns: the kernel a user names: a path (contains '/' or ends in ".so") is
/// loaded with attach_library, anything else is a bundled kernel's name.
/// Throws InputError for an unknown name, saying how to list the names
/// (`headroom kernels --names`), and as attach_library for a bad library.
std::unique_ptr<AttachedKernel> attach_kernel(const std::string& spec);

}  // namespace headroom
