// headroom — calling a kernel_abi.h kernel, isolated or not, and naming what went wrong (abi_kernel.h).
#include "attach/abi_kernel.h"

#include <cinttypes>
#include <cstdio>
#include <stdexcept>
#include <utility>

#include "attach/isolation.h"
#include "attach/packing.h"

namespace headroom {

const char* run_status_name(RunStatus s) {
  switch (s) {
    case RunStatus::ok: return "ok";
    case RunStatus::unsupported: return "unsupported";
    case RunStatus::crash: return "crash";
    case RunStatus::oob_read: return "oob_read";
    case RunStatus::oob_write: return "oob_write";
    case RunStatus::timeout: return "timeout";
    case RunStatus::bad_output: return "bad_output";
  }
  return "?";
}

namespace attach_detail {
namespace {

std::string hex_address(std::uintptr_t a) {
  char buf[32];
  std::snprintf(buf, sizeof buf, "0x%" PRIxPTR, a);
  return buf;
}

std::string mib(std::uint64_t bytes) {
  char buf[32];
  std::snprintf(buf, sizeof buf, "%.0f MiB", static_cast<double>(bytes) / (1 << 20));
  return buf;
}

// Turns a guard-page or read-only-input fault into its fault class.
KernelRun fault_run(const GuardedArena::Hit& hit, int write) {
  KernelRun r;
  const std::string kind = hit.role == GuardedArena::Role::input ? "input " : "output ";
  if (!hit.in_guard) {
    r.status = RunStatus::oob_write;
    r.detail = "wrote into " + kind + hit.name + " at byte " + std::to_string(hit.past_end) + " (inputs are read-only)";
    return r;
  }
  // Past an output, any touch is a stray write (or a read of what was never
  // the kernel's); past an input, it is a read unless the CPU says write.
  const bool is_write = write == 1 || (write == -1 && hit.role == GuardedArena::Role::output);
  r.status = is_write ? RunStatus::oob_write : RunStatus::oob_read;
  r.detail = std::string(is_write ? "wrote" : "read") + " byte " + std::to_string(hit.past_end) + " past the end of " +
             kind + hit.name + " (guard page)";
  return r;
}

KernelRun classify(const CallOutcome& out, const PackedCall& p, const RunOptions& opt) {
  using How = CallOutcome::How;
  KernelRun r;
  switch (out.how) {
    case How::timeout: {
      char buf[96];
      std::snprintf(buf, sizeof buf, "over the time limit of %g s (killed with SIGKILL)", opt.time_limit_s);
      r.status = RunStatus::timeout;
      r.detail = buf;
      return r;
    }
    case How::signaled: {
      if (out.fault_recorded) {
        if (auto hit = p.arena.locate(out.fault_addr)) return fault_run(*hit, out.fault_write);
      }
      r.status = RunStatus::crash;
      r.detail = "killed by " + signal_text(out.signo);
      if (out.fault_recorded) {
        r.detail += " at address " + hex_address(out.fault_addr);
        if (out.fault_addr < 65536 && opt.memory_limit_bytes != 0) {
          r.detail += " (a null pointer: perhaps an allocation refused under the memory limit of +" +
                      mib(opt.memory_limit_bytes) + ")";
        }
      }
      return r;
    }
    case How::exited:
      r.status = RunStatus::crash;
      r.detail = out.exit_called ? "the kernel called exit(" + std::to_string(out.exit_code) + ")"
                                 : "the process ended with exit code " + std::to_string(out.exit_code) +
                                       " before the kernel returned (_exit or a runtime abort inside the kernel)";
      return r;
    case How::exception:
      r.status = RunStatus::crash;
      r.detail = out.bad_alloc ? "allocation failed (" + out.message + "): memory limit of +" +
                                     mib(opt.memory_limit_bytes) + " address space reached"
                               : "the kernel threw a C++ exception: " + out.message;
      return r;
    case How::failed:
      r.status = RunStatus::crash;
      r.detail = "could not run the kernel: " + out.message;
      return r;
    case How::returned: break;
  }
  if (auto damage = p.arena.damage()) {
    r.status = RunStatus::oob_write;
    r.detail = *damage;
    return r;
  }
  if (out.rc == HR_UNSUPPORTED) {
    r.status = RunStatus::unsupported;
    r.detail = "the kernel returned HR_UNSUPPORTED";
    return r;
  }
  if (out.rc != HR_OK) {
    r.status = RunStatus::crash;
    r.detail = "the kernel returned " + std::to_string(out.rc) + ", neither HR_OK (0) nor HR_UNSUPPORTED (1)";
    return r;
  }
  r.out = unpack_output(p);
  r.lse = unpack_lse(p);
  r.unwritten = count_unwritten(p, &r.first_unwritten);
  return r;
}

class AbiKernel final : public AttachedKernel {
 public:
  AbiKernel(const hr_kernel* k, KernelDeclaration d, std::shared_ptr<void> keep_alive)
      : declaration_(std::move(d)), keep_alive_(std::move(keep_alive)) {
    // Copied now: a plug-in's run pointers are read once, like its declaration.
    run_core_ = k->run_core;
    run_block_ = k->run_block;
  }

  const KernelDeclaration& declaration() const override { return declaration_; }

  KernelRun run(const ReceivedCase& c, const RunOptions& opt) override {
    PackedCall p = pack(c, declaration_);
    std::function<int()> call = [this, &p]() -> int {
      return p.level == Level::core ? run_core_(&p.core) : run_block_(&p.block);
    };
    CallOutcome out;
    if (opt.isolate) {
      p.arena.protect();
      out = call_isolated(call, opt.time_limit_s, opt.memory_limit_bytes);
    } else {
      out = call_in_process(call);
    }
    return classify(out, p, opt);
  }

 private:
  KernelDeclaration declaration_;
  std::shared_ptr<void> keep_alive_;
  std::int32_t (*run_core_)(const hr_core_problem*) = nullptr;
  std::int32_t (*run_block_)(const hr_block_problem*) = nullptr;
};

}  // namespace

std::unique_ptr<AttachedKernel> make_abi_kernel(const hr_kernel* k, const std::string& origin,
                                                std::shared_ptr<void> keep_alive) {
  KernelDeclaration d = declaration_of(k, origin);
  return std::make_unique<AbiKernel>(k, std::move(d), std::move(keep_alive));
}

}  // namespace attach_detail

std::unique_ptr<AttachedKernel> attach_in_process(const hr_kernel* k) {
  return attach_detail::make_abi_kernel(k, "bundled kernel table", nullptr);
}

}  // namespace headroom
