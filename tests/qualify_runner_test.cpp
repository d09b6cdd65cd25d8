// Tests of the case loop (qualify.h): replay commands that reproduce the
// verdict, and a case the kernel declines listed as skipped, not as a fault.
#include <gtest/gtest.h>

#include <unistd.h>

#include <filesystem>
#include <map>
#include <memory>
#include <string>
#include <vector>

#include "headroom/bundled_registry.h"
#include "headroom/case_folder.h"
#include "headroom/generate.h"
#include "headroom/judge.h"
#include "headroom/qualify.h"
#include "headroom/record.h"

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

AttachedKernel& bundled(const std::string& name) {
  static std::map<std::string, std::unique_ptr<AttachedKernel>> cache;
  auto& k = cache[name];
  if (!k) k = attach_in_process(find_bundled(name)->kernel);
  return *k;
}

Case small_case(const std::string& family, std::uint64_t seed, Level level) {
  CaseRequest req;
  req.family = family;
  req.seed = seed;
  req.size = 12;
  req.level = level;
  return make_case(req);
}

// judge_case may take a case's tensors (the runner hands it every case it
// makes or reads, so a production case is held once): the record must be the
// one a copied case gives, bit for bit, whatever the kernel's formats (taken
// when the kernel receives the source values unrounded; copied when the
// input-quantisation split needs them again).
TEST(Runner, TakingACaseChangesNoFigure) {
  struct Trial {
    const char* kernel;
    Level level;
    bool taken;
  };
  const Trial trials[] = {{"f32_tiled_16", Level::core, true},
                          {"f16_f32acc", Level::core, false},
                          {"i8_tokenwise", Level::core, false},
                          {"f32_backward_tiled", Level::core, true},
                          {"block_f32", Level::block, true}};
  JudgeOptions opt;
  opt.detect.run.isolate = false;
  for (const Trial& t : trials) {
    AttachedKernel& k = bundled(t.kernel);
    for (const char* family : {"gaussian", "large_logits", "outlier_channels"}) {
      for (std::uint64_t seed : {1u, 2u}) {
        const Case c = small_case(t.level == Level::block ? "block_gaussian" : family, seed, t.level);
        const Judgement copied = judge_case(k, c, opt, "r");
        Case handed = c;
        const Judgement taken = judge_case(k, std::move(handed), opt, "r");
        EXPECT_EQ(to_json(copied.record).dump(), to_json(taken.record).dump()) << t.kernel << " " << c.name;
        EXPECT_EQ(copied.unfit.has_value(), taken.unfit.has_value()) << t.kernel << " " << c.name;
        const bool emptied = t.level == Level::core ? handed.core_inputs.k.values.empty()
                                                    : handed.block_inputs.w_o.values.empty();
        if (!copied.unfit) {
          EXPECT_EQ(emptied, t.taken) << t.kernel << " " << c.name;
        }
        EXPECT_EQ(handed.name, c.name);
      }
    }
  }
}

// The runner hands its case to judge_case; a failure saved afterwards must
// still hold the whole case (made again), tensors and all.
TEST(Runner, ASavedFailureHoldsTheWholeCase) {
  CaseRequest req;
  req.family = "large_logits";
  req.seed = 3;
  req.size = 12;
  req.level = Level::core;
  const auto dir = std::filesystem::temp_directory_path() / ("headroom_runner_saved_" + std::to_string(getpid()));
  std::filesystem::remove_all(dir);
  RunnerOptions opt;
  opt.judge.detect.run.isolate = false;
  opt.apply_budget = budget_applier(default_budget(Format::float32));
  opt.save_failures = dir;
  const RunRecord r = run_cases(bundled("no_max_shift"), {planned(req)}, opt);
  ASSERT_EQ(r.cases.size(), 1u);
  ASSERT_FALSE(r.cases[0].within_budget) << "no_max_shift must fail on large logits";
  const Case made = make_case(req);
  const Case saved = read_case(dir / case_folder_name(made.name));
  EXPECT_TRUE(bit_identical(saved.core_inputs.q, made.core_inputs.q));
  EXPECT_TRUE(bit_identical(saved.core_inputs.k, made.core_inputs.k));
  EXPECT_TRUE(bit_identical(saved.core_inputs.v, made.core_inputs.v));
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
