// headroom qualify — run a deterministic suite against a kernel and give the verdict.
#include "command.h"
#include "headroom/generate.h"
#include "headroom/suite.h"
#include "run_common.h"

namespace headroom::cli {
namespace {

struct QualifyFlags {
  RunFlags run;
  std::string suite = "quick";
  std::string save;
};

int qualify_main(const QualifyFlags& f) {
  const auto requests = suite_requests(f.suite);
  RunSetup setup = open_run(f.run, "qualify", setup_identity(f.run) + " suite " + f.suite);
  setup.runner.save_failures = f.save;
  std::vector<PlannedCase> cases;
  cases.reserve(requests.size());
  for (const auto& r : requests) cases.push_back({make_case(r), r, {}});
  RunRecord record = run_cases(*setup.kernel, cases, setup.runner);
  record.command = "qualify";
  record.suite = f.suite;
  return finish_run(record, f.run, setup);
}

const CommandRegistration reg{"qualify", 20, [](CLI::App& app) {
  auto flags = std::make_shared<QualifyFlags>();
  auto* cmd = app.add_subcommand("qualify", "Run a suite of adversarial cases against a kernel; exit 0 within budget, 1 outside");
  add_run_flags(cmd, flags->run);
  cmd->add_option("--suite", flags->suite, "quick | standard | deep")->check(CLI::IsMember({"quick", "standard", "deep"}));
  cmd->add_option("--save", flags->save, "save each failing case as a case folder here");
  cmd->callback([flags] { exit_with(qualify_main(*flags)); });
}};

}  // namespace
}  // namespace headroom::cli
