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
};

/// Returns: the case as the kernel declared by `d` receives it.
/// Throws InputError when the case does not fit the declaration (level, mask).
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

struct RunOptions {
  bool isolate = true;          ///< run in a child process (guard pages, canaries, limits)
  double time_limit_s = 20.0;
  std::uint64_t memory_limit_bytes = std::uint64_t{4} << 30;
};

struct KernelRun {
  RunStatus status = RunStatus::ok;
  std::string detail;  ///< human-readable reason when status != ok
  Tensor out;          ///< core [B, Hq, Tq, Dv] or block [B, Tq, Dm], output-format values as doubles
  Tensor lse;          ///< [B, Hq, Tq] when the kernel returns log-sum-exp, else empty
};

class AttachedKernel {
 public:
  virtual ~AttachedKernel() = default;
  virtual const KernelDeclaration& declaration() const = 0;
  /// Returns: the outcome of one call on `c`. Never throws for kernel misbehaviour.
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

}  // namespace headroom
