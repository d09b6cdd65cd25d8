// Tests of the case loop (qualify.h): replay commands that reproduce the
// verdict, and a case the kernel declines listed as skipped, not as a fault.
#include <gtest/gtest.h>

#include <unistd.h>

#include <filesystem>
#include <string>
#include <vector>

#include "headroom/case_folder.h"
#include "headroom/generate.h"
#include "headroom/qualify.h"

namespace headroom {
namespace {

// A core float32 kernel that declines every problem (HR_UNSUPPORTED).
class Declining : public AttachedKernel {
 public:
  Declining() {
    decl_.name = "declining";
    decl_.mask_kinds = 0x3F;
    decl_.masked_row = MaskedRowConvention::zeros;
  }
  const KernelDeclaration& declaration() const override { return decl_; }
  std::vector<double> seen_q;  ///< Q as the last call received it
  KernelRun run(const ReceivedCase& rc, const RunOptions&) override {
    seen_q = rc.received.core_inputs.q.values;
    KernelRun r;
    r.status = RunStatus::unsupported;
    r.detail = "the kernel returned HR_UNSUPPORTED";
    return r;
  }

 private:
  KernelDeclaration decl_;
};

TEST(Runner, DeclinedCaseIsSkippedWithItsReasonNotAFault) {
  Declining k;
  CaseRequest req;
  req.family = "gaussian";
  req.seed = 1;
  req.size = 10;
  req.level = Level::core;
  const std::vector<PlannedCase> cases{{make_case(req), req, {}, {}}};
  RunnerOptions opt;
  opt.judge.detect.run.isolate = false;
  opt.apply_budget = budget_applier(default_budget(Format::float32));
  const RunRecord r = run_cases(k, cases, opt);
  EXPECT_TRUE(r.cases.empty());
  ASSERT_EQ(r.skipped.size(), 1u);
  EXPECT_NE(r.skipped[0].find("declined by the kernel (the kernel returned HR_UNSUPPORTED): not run, not a fault"),
            std::string::npos)
      << r.skipped[0];
  EXPECT_TRUE(r.fault_totals().empty());
  EXPECT_EQ(r.verdict(), "pass");
  // Declining everything is no plain pass: the level's cases were offered and not taken.
  EXPECT_EQ(r.verdict_line(), "pass on 0 of 1 core cases");
}

TEST(Runner, AFolderIsReadWhenItsTurnComesNotWhenPlanned) {
  // A corpus of production-sized cases must not be held whole: planned(dir)
  // keeps the folder's name and path only, and run_cases reads it when it runs.
  CaseRequest req;
  req.family = "gaussian";
  req.seed = 1;
  req.size = 10;
  req.level = Level::core;
  const auto dir = std::filesystem::temp_directory_path() / ("headroom_runner_turn_" + std::to_string(getpid()));
  std::filesystem::remove_all(dir);
  write_case(make_case(req), dir);
  const PlannedCase p = planned(dir);
  EXPECT_TRUE(p.c.name.empty());
  EXPECT_TRUE(p.c.core_inputs.q.values.empty()) << "planning holds no tensor";
  EXPECT_EQ(p.case_name(), make_case(req).name);

  // The folder changes after planning: the kernel receives what it holds then.
  req.seed = 2;
  const Case later = make_case(req);
  std::filesystem::remove_all(dir);
  write_case(later, dir);
  Declining k;
  RunnerOptions opt;
  opt.judge.detect.run.isolate = false;
  opt.apply_budget = budget_applier(default_budget(Format::float32));
  const RunRecord r = run_cases(k, {p}, opt);
  ASSERT_EQ(r.skipped.size(), 1u);
  EXPECT_EQ(r.skipped[0].rfind(p.case_name() + ": ", 0), 0u) << "named as planned: " << r.skipped[0];
  EXPECT_EQ(k.seen_q, later.core_inputs.q.values);
  std::filesystem::remove_all(dir);
}

TEST(Runner, ReplayCommandsCarryTheBinaryTheKernelOptionAndTheJudgingOptions) {
  RunnerOptions opt;
  opt.tool = "build/tools/headroom";
  opt.kernel_spec = "python3 my kernel.py";
  opt.kernel_is_program = true;
  opt.judging_options = " --budget b.toml --time-limit 5";
  EXPECT_EQ(replay_command(opt, "declared_name", "cases/c 1"),
            "build/tools/headroom replay --kernel-cmd 'python3 my kernel.py' --budget b.toml --time-limit 5 'cases/c 1'");
  CaseRequest req;
  req.family = "gaussian";
  req.seed = 7;
  req.size = 10;
  const std::string line = make_and_replay_command(opt, "declared_name", req, "case-x");
  EXPECT_EQ(line.rfind("build/tools/headroom case make --family gaussian --seed 7 --size 10 --out case-x && "
                       "build/tools/headroom replay --kernel-cmd ",
                       0),
            0u)
      << line;
  opt.kernel_spec.clear();
  opt.kernel_is_program = false;
  opt.judging_options.clear();
  EXPECT_EQ(replay_command(opt, "f32_textbook", "d"), "build/tools/headroom replay --kernel f32_textbook d");
  EXPECT_EQ(shell_quote("it's"), "'it'\\''s'");
}

}  // namespace
}  // namespace headroom
