// headroom — a kernel that is an external program in persistent mode: one process, many calls.
//
// The exchange folder and its files are those of one-shot mode
// (write_exchange / read_exchange, external_program.h); only how the program
// is told to run differs (program_session.h).
#include "attach/served_program.h"

#include "attach/exchange_folder.h"
#include "attach/packing.h"
#include "attach/program_session.h"
#include "headroom/external_program.h"

namespace headroom::attach_detail {
namespace {

class ServedProgram final : public AttachedKernel {
 public:
  ServedProgram(const std::string& command, KernelDeclaration d) : declaration_(std::move(d)), session_(command) {}
  const KernelDeclaration& declaration() const override { return declaration_; }

  KernelRun run(const ReceivedCase& c, const RunOptions& opt) override {
    check_received(c, declaration_);
    ExchangeFolder dir;
    write_exchange(dir.path(), c, declaration_);
    KernelRun r;
    if (!call("run", dir.path(), opt, r.status, r.detail)) return r;
    return read_exchange(dir.path(), c, declaration_);
  }

  BackwardRun run_backward(const ReceivedCase& c, const Tensor& o, const Tensor& lse, const RunOptions& opt) override {
    ExchangeFolder dir;
    write_backward_exchange(dir.path(), c, declaration_, o, lse);  // checks the preconditions
    BackwardRun r;
    if (!call("run-backward", dir.path(), opt, r.status, r.detail)) return r;
    return read_backward_exchange(dir.path(), c, declaration_);
  }

 private:
  // One request. Returns: true when the program replied "ok" (read its files);
  // else false with the status and detail set.
  bool call(const char* verb, const std::filesystem::path& dir, const RunOptions& opt, RunStatus& status,
            std::string& detail) {
    const SessionReply s = session_.call(dir, opt.time_limit_s, verb);
    detail = s.detail;
    switch (s.how) {
      case SessionReply::How::ok:
        return true;
      case SessionReply::How::unsupported:
        status = RunStatus::unsupported;
        detail = "the program replied \"unsupported\" (declines the problem)";
        return false;
      case SessionReply::How::timeout:
        status = RunStatus::timeout;
        return false;
      case SessionReply::How::broken:
        status = RunStatus::bad_output;
        return false;
      case SessionReply::How::error:
      case SessionReply::How::ended:
        status = RunStatus::crash;
        return false;
    }
    status = RunStatus::crash;
    return false;
  }

  KernelDeclaration declaration_;
  ProgramSession session_;
};

}  // namespace

std::unique_ptr<AttachedKernel> attach_served_program(const std::string& command, KernelDeclaration d) {
  return std::make_unique<ServedProgram>(command, std::move(d));
}

}  // namespace headroom::attach_detail
