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
    const SessionReply s = session_.call(dir.path(), opt.time_limit_s);
    KernelRun r;
    r.detail = s.detail;
    switch (s.how) {
      case SessionReply::How::ok:
        return read_exchange(dir.path(), c, declaration_);
      case SessionReply::How::unsupported:
        r.status = RunStatus::unsupported;
        r.detail = "the program replied \"unsupported\" (declines the problem)";
        return r;
      case SessionReply::How::timeout:
        r.status = RunStatus::timeout;
        return r;
      case SessionReply::How::broken:
        r.status = RunStatus::bad_output;
        return r;
      case SessionReply::How::error:
      case SessionReply::How::ended:
        r.status = RunStatus::crash;
        return r;
    }
    r.status = RunStatus::crash;
    return r;
  }

 private:
  KernelDeclaration declaration_;
  ProgramSession session_;
};

}  // namespace

std::unique_ptr<AttachedKernel> attach_served_program(const std::string& command, KernelDeclaration d) {
  return std::make_unique<ServedProgram>(command, std::move(d));
}

}  // namespace headroom::attach_detail
