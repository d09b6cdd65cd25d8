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
/// the exact received values (what the reference must use); for int8 the codes
/// and scales are kept too.
struct ReceivedCase {
  Case received;  ///< same problem, tensors replaced by the received values
  std::optional<QuantizedTensor> q8, k8, v8;  ///< int8 core inputs
  Format input_format = Format::float32;      ///< the format the tensors were received in
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

enum class RunStatus : unsigned char {
  ok,
  unsupported,  ///< the kernel returned HR_UNSUPPORTED
  crash,        ///< signal other than a guard-page fault, exit(), or memory limit
  oob_read,     ///< touched the guard page after an input
  oob_write,    ///< damaged a canary around an output
  timeout,      ///< over the time limit
  bad_output    ///< external program: missing / malformed / mis-shaped output
};
/// Returns: the fault class name used in JSON ("ok", "unsupported", "crash", "oob_read", ...).
const char* run_status_name(RunStatus s);

/// Isolation (isolate = true): the call runs in a forked child. Every input
/// buffer ends exactly where a PROT_NONE guard page begins (so one element
/// read past the end faults; the start is aligned only to the element size)
/// and is read-only; every output has 64 canary bytes before and after it
/// and a guard page after that; outputs are prefilled with a quiet-NaN
/// pattern, so an element left unwritten reads as NaN. The child has no core
/// dumps, its stdout goes to stderr (headroom's stdout stays headroom's), and
/// RLIMIT_AS = its address space at fork + memory_limit_bytes.
/// In-process (isolate = false): same buffers, guard pages left accessible
/// and checked like canaries afterwards; no time or memory limit, and a
/// kernel that crashes or calls exit() ends headroom with it (for speed on
/// kernels already known to behave).
/// External programs always run in their own process group, under the time
/// limit but with no address-space limit (GPU runtimes and sanitizer builds
/// reserve terabytes they never touch); isolate is moot for them.
struct RunOptions {
  bool isolate = true;          ///< run in a child process (guard pages, canaries, limits)
  double time_limit_s = 20.0;   ///< wall clock, seconds; the child is SIGKILLed past it
  std::uint64_t memory_limit_bytes = std::uint64_t{4} << 30;  ///< address space the call may add
};

struct KernelRun {
  RunStatus status = RunStatus::ok;
  std::string detail;  ///< human-readable reason when status != ok
  Tensor out;          ///< core [B, Hq, Tq, Dv] or block [B, Tq, Dm], output-format values as doubles;
                       ///< filled only when status is ok (unwritten elements read as NaN)
  Tensor lse;          ///< [B, Hq, Tq] when ok and the kernel returns log-sum-exp, else empty
  std::int64_t unwritten = 0;         ///< output elements still holding headroom's NaN fill (never written;
                                      ///< plug-ins only: an external program writes whole files)
  std::int64_t first_unwritten = -1;  ///< flat index into `out` of the first of them, −1 when none
};

class AttachedKernel {
 public:
  virtual ~AttachedKernel() = default;
  virtual const KernelDeclaration& declaration() const = 0;
  /// Returns: the outcome of one call on `c`. Never throws for kernel misbehaviour.
  /// Preconditions: `c` = receive(case, declaration()); throws
  /// std::invalid_argument otherwise (a caller's mistake, not the kernel's).
  virtual KernelRun run(const ReceivedCase& c, const RunOptions& opt) = 0;
};

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
