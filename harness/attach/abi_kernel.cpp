// headroom — calling a kernel_abi.h kernel, isolated or not, and naming what went wrong (abi_kernel.h).
#include "attach/abi_kernel.h"

#include <cinttypes>
#include <cstdio>
#include <stdexcept>
#include <utility>

#include "attach/isolation.h"
#include "attach/isolation_worker.h"
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
    case RunStatus::stray_process: return "stray_process";
  }
  return "?";
}

std::vector<KernelRun> AttachedKernel::run_repeated(const ReceivedCase& c, const RunOptions& opt, int times) {
  std::vector<KernelRun> runs;
  for (int i = 0; i < times; ++i) runs.push_back(run(c, opt));
  return runs;
}

double call_time_limit(const Case& c, const RunOptions& opt) {
  if (!(opt.seconds_per_work > 0)) return opt.time_limit_s;
  double work = 0;
  if (c.level == Level::core) {
    const CoreShape& s = c.core.shape;
    work = static_cast<double>(s.batch) * static_cast<double>(s.q_heads) * static_cast<double>(s.q_len) *
           static_cast<double>(s.kv_len) * static_cast<double>(s.key_dim + s.value_dim);
  } else {
    const BlockShape& s = c.block.shape;
    const double b = static_cast<double>(s.batch), dm = static_cast<double>(s.model_dim);
    work = b * static_cast<double>(s.q_heads) * static_cast<double>(s.q_len) * static_cast<double>(s.kv_len) *
               static_cast<double>(s.key_dim + s.value_dim) +
           b * dm *
               (static_cast<double>(s.q_len) * static_cast<double>(s.q_heads) * static_cast<double>(s.key_dim + s.value_dim) +
                static_cast<double>(s.kv_len) * static_cast<double>(s.kv_heads) * static_cast<double>(s.key_dim + s.value_dim));
  }
  return opt.time_limit_s + opt.seconds_per_work * work;
}

double backward_call_time_limit(const Case& c, const RunOptions& opt) {
  if (!(opt.seconds_per_work > 0) || c.level != Level::core) return opt.time_limit_s;
  const CoreShape& s = c.core.shape;
  const double work = static_cast<double>(s.batch) * static_cast<double>(s.q_heads) * static_cast<double>(s.q_len) *
                      static_cast<double>(s.kv_len) * static_cast<double>(3 * s.key_dim + 2 * s.value_dim);
  return opt.time_limit_s + opt.seconds_per_work * work;
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

std::string timeout_text(const CallOutcome& out, const CallLimits& limits) {
  char buf[256];
  if (out.asleep) {
    std::snprintf(buf, sizeof buf,
                  "asleep or blocked (no thread running or waiting for a core) for over %.3g s, the time limit for "
                  "this problem, having used %.3g CPU s (killed with SIGKILL)",
                  limits.asleep_s, out.cpu_seconds);
  } else {
    std::snprintf(buf, sizeof buf,
                  "over the CPU time limit of %.3g s for this problem (used %.3g CPU s in %.3g s; killed with SIGKILL)",
                  limits.cpu_s, out.cpu_seconds, out.seconds);
  }
  return buf;
}

// The call's status and detail; its outputs are the caller's to unpack when ok.
KernelRun classify(const CallOutcome& out, const GuardedArena& arena, const RunOptions& opt, const CallLimits& limits) {
  using How = CallOutcome::How;
  KernelRun r;
  switch (out.how) {
    case How::timeout: {
      r.status = RunStatus::timeout;
      r.detail = timeout_text(out, limits);
      return r;
    }
    case How::signaled: {
      if (out.fault_recorded) {
        if (auto hit = arena.locate(out.fault_addr)) return fault_run(*hit, out.fault_write);
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
  if (auto damage = arena.damage()) {
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
  if (out.strays > 0) {
    r.status = RunStatus::stray_process;
    r.detail = strays_text(out.strays, out.stray_name);
    return r;
  }
  return r;
}

// A forward call classified, its outputs unpacked when it returned ok.
KernelRun forward_run(const CallOutcome& out, const PackedCall& p, const RunOptions& opt, const CallLimits& limits) {
  KernelRun r = classify(out, p.arena, opt, limits);
  if (r.status != RunStatus::ok) return r;
  r.out = unpack_output(p);
  r.lse = unpack_lse(p);
  unpack_partials(p, r.o_partials, r.lse_partials);
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
    if (k->abi_version >= 2) run_backward_ = k->run_backward;  // a version-1 declaration ends before it
    // Now, while headroom is small: the worker's copy of it stays that size.
    worker_.start();
  }

  const KernelDeclaration& declaration() const override { return declaration_; }

  KernelRun run(const ReceivedCase& c, const RunOptions& opt) override { return calls(c, opt, 1).front(); }

  std::vector<KernelRun> run_repeated(const ReceivedCase& c, const RunOptions& opt, int times) override {
    return calls(c, opt, times);
  }

  BackwardRun run_backward(const ReceivedCase& c, const Tensor& o, const Tensor& lse, const RunOptions& opt) override {
    if (run_backward_ == nullptr)
      throw std::invalid_argument("kernel \"" + declaration_.name + "\" has no backward entry");
    PackedBackward p = pack_backward(c, declaration_, o, lse);
    CallOutcome out;
    CallLimits limits;
    if (!opt.isolate) {
      out = call_in_process([&] { return run_backward_(&p.problem); });
    } else {
      const double cpu = backward_call_time_limit(c.received, opt);
      limits = CallLimits{cpu, cpu, opt.memory_limit_bytes};
      std::optional<CallOutcome> by = std::nullopt;
      if (p.arena.fd() >= 0) {
        const WorkerCall call{&p.arena, backward_thunk, reinterpret_cast<std::uintptr_t>(run_backward_), &p.problem,
                              sizeof p.problem};
        by = worker_.run({call}, limits);
        if (by) p.arena.mark_protected_elsewhere();
      }
      if (!by) {
        p.arena.protect();
        by = call_isolated([&](int) { return run_backward_(&p.problem); }, 1, limits);
      }
      out = *by;
    }
    const KernelRun k = classify(out, p.arena, opt, limits);
    BackwardRun r;
    r.status = k.status;
    r.detail = k.detail;
    if (r.status == RunStatus::ok) unpack_gradients(p, r);
    return r;
  }

 private:
  int call_one(const PackedCall& p) const { return p.level == Level::core ? run_core_(&p.core) : run_block_(&p.block); }

  // `times` calls on `c`, each with buffers of its own, in one process.
  std::vector<KernelRun> calls(const ReceivedCase& c, const RunOptions& opt, int times) {
    if (times < 1 || times > kMaxCallsPerChild) throw std::invalid_argument("run_repeated: 1 to 4 calls");
    std::vector<PackedCall> packs;
    for (int i = 0; i < times; ++i) packs.push_back(pack(c, declaration_));
    std::vector<KernelRun> runs;
    if (!opt.isolate) {
      for (const PackedCall& p : packs) runs.push_back(forward_run(call_in_process([&] { return call_one(p); }), p, opt, {}));
      return runs;
    }
    const double cpu = call_time_limit(c.received, opt);
    const CallLimits limits{cpu, cpu, opt.memory_limit_bytes};
    std::optional<CallOutcome> out = by_worker(packs, limits);
    if (!out) {
      for (PackedCall& p : packs) p.arena.protect();
      out = call_isolated([&](int i) { return call_one(packs[static_cast<std::size_t>(i)]); }, times, limits);
    }
    // Calls that returned, then the one that ended the child (if any).
    for (int i = 0; i < times; ++i) {
      CallOutcome one = *out;
      const bool returned = i < out->calls_returned;
      if (returned) {
        one.how = CallOutcome::How::returned;
        one.rc = out->rcs[i];
        if (i + 1 < times || out->how != CallOutcome::How::returned) one.strays = 0;  // counted once, at the end
      }
      runs.push_back(forward_run(one, packs[static_cast<std::size_t>(i)], opt, limits));
      if (!returned) break;
    }
    return runs;
  }

  // The calls made by the isolation worker; nothing when it cannot make them.
  std::optional<CallOutcome> by_worker(std::vector<PackedCall>& packs, const CallLimits& limits) {
    std::vector<WorkerCall> calls;
    for (const PackedCall& p : packs) {
      if (p.arena.fd() < 0) return std::nullopt;
      if (p.level == Level::core) {
        calls.push_back({&p.arena, core_thunk, reinterpret_cast<std::uintptr_t>(run_core_), &p.core, sizeof p.core});
      } else {
        calls.push_back({&p.arena, block_thunk, reinterpret_cast<std::uintptr_t>(run_block_), &p.block, sizeof p.block});
      }
    }
    auto out = worker_.run(calls, limits);
    if (out) {
      for (PackedCall& p : packs) p.arena.mark_protected_elsewhere();
    }
    return out;
  }

  static std::int32_t core_thunk(std::uintptr_t fn, const void* problem) {
    return reinterpret_cast<std::int32_t (*)(const hr_core_problem*)>(fn)(static_cast<const hr_core_problem*>(problem));
  }
  static std::int32_t block_thunk(std::uintptr_t fn, const void* problem) {
    return reinterpret_cast<std::int32_t (*)(const hr_block_problem*)>(fn)(static_cast<const hr_block_problem*>(problem));
  }
  static std::int32_t backward_thunk(std::uintptr_t fn, const void* problem) {
    return reinterpret_cast<std::int32_t (*)(const hr_backward_problem*)>(fn)(
        static_cast<const hr_backward_problem*>(problem));
  }
  static_assert(sizeof(hr_core_problem) <= kMaxProblemBytes && sizeof(hr_block_problem) <= kMaxProblemBytes &&
                sizeof(hr_backward_problem) <= kMaxProblemBytes);

  KernelDeclaration declaration_;
  std::shared_ptr<void> keep_alive_;
  IsolationWorker worker_;
  std::int32_t (*run_core_)(const hr_core_problem*) = nullptr;
  std::int32_t (*run_block_)(const hr_block_problem*) = nullptr;
  std::int32_t (*run_backward_)(const hr_backward_problem*) = nullptr;
};

}  // namespace

std::unique_ptr<AttachedKernel> make_abi_kernel(const hr_kernel* k, const std::string& origin,
                                                std::shared_ptr<void> keep_alive) {
  KernelDeclaration d = declaration_of(k, origin);
  return std::make_unique<AbiKernel>(k, std::move(d), std::move(keep_alive));
}

}  // namespace attach_detail

BackwardRun AttachedKernel::run_backward(const ReceivedCase&, const Tensor&, const Tensor&, const RunOptions&) {
  throw std::invalid_argument("kernel \"" + declaration().name + "\" has no backward entry");
}

std::unique_ptr<AttachedKernel> attach_in_process(const hr_kernel* k) {
  return attach_detail::make_abi_kernel(k, "bundled kernel table", nullptr);
}

}  // namespace headroom
