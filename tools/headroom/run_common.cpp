// headroom — shared plumbing of qualify, hunt and replay (run_common.h).
#include "run_common.h"

#include <unistd.h>

#include <filesystem>
#include <iostream>
#include <thread>

#include "headroom/input_error.h"
#include "headroom/progress_bar.h"
#include "headroom/reports.h"
#include "headroom/terminal_report.h"

namespace headroom::cli {

void add_run_flags(CLI::App* cmd, RunFlags& f) {
  cmd->add_option("--kernel", f.kernel, "bundled kernel name (see `headroom kernels`) or path to a plug-in .so");
  cmd->add_option("--kernel-cmd", f.kernel_cmd, "external kernel program, e.g. '/usr/bin/python3 my_kernel.py'");
  cmd->add_option("--budget", f.budget, "budget file (TOML; docs/budget-format.md); default: built-in budgets");
  cmd->add_option("--json", f.json, "write the result record (docs/result-schema.md) here");
  cmd->add_option("--markdown", f.markdown, "write a review report in Markdown here");
  cmd->add_option("--html", f.html, "write a self-contained HTML report here");
  cmd->add_option("--junit", f.junit, "write JUnit XML here (one test per family x format)");
  cmd->add_option("--shard", f.shard, "run only slice i of n (1-based), e.g. 2/4; join with `headroom merge`");
  cmd->add_flag("--resume", f.resume, "continue an interrupted run from its journal");
  cmd->add_option("--journal", f.journal, "journal of finished cases (default: <json>.journal)");
  cmd->add_option("--time-limit", f.time_limit, "seconds one kernel call may take before it is a timeout")
      ->check(CLI::PositiveNumber);
  cmd->add_flag("--no-isolation", f.no_isolation, "run the kernel in-process (faster; a crash ends headroom)");
  cmd->add_option("--threads", f.threads, "reference threads (default: all cores)");
  cmd->add_option("--determinism-runs", f.determinism_runs, "identical runs compared for non-determinism (>= 2 checks)")
      ->check(CLI::Range(1, 100));
  cmd->add_flag("--quiet", f.quiet, "print only the verdict line");
}

namespace {

std::string journal_path(const RunFlags& f, const std::string& command) {
  if (!f.journal.empty()) return f.journal;
  if (!f.json.empty()) return f.json + ".journal";
  return "headroom-" + command + ".journal";
}

}  // namespace

std::string setup_identity(const RunFlags& f) {
  return "kernel " + (f.kernel.empty() ? "cmd " + f.kernel_cmd : f.kernel) + " budget " + f.budget + " isolation " +
         (f.no_isolation ? "off" : "on") + " determinism " + std::to_string(f.determinism_runs);
}

RunSetup open_run(const RunFlags& f, const std::string& command, const std::string& identity) {
  RunSetup s;
  if (f.kernel.empty() == f.kernel_cmd.empty())
    throw InputError("command line", "--kernel / --kernel-cmd", "give exactly one of them",
                     "name a bundled kernel or a plug-in with --kernel, or a program with --kernel-cmd");
  if (!f.kernel_cmd.empty()) {
    s.kernel = attach_program(f.kernel_cmd, f.time_limit);
    s.spec = f.kernel_cmd;
  } else {
    s.kernel = attach_kernel(f.kernel);
    s.spec = f.kernel;
  }
  s.plain = plain_kernel_for(s.kernel->declaration());
  s.budget = f.budget.empty() ? Budget{} : load_budget(f.budget);

  RunnerOptions& r = s.runner;
  r.judge.detect.run.isolate = !f.no_isolation;
  r.judge.detect.run.time_limit_s = f.time_limit;
  r.judge.detect.determinism_runs = f.determinism_runs;
  r.judge.detect.reference.threads = f.threads ? f.threads : std::max(1u, std::thread::hardware_concurrency());
  r.judge.plain = s.plain.get();
  r.shard = parse_shard(f.shard);
  r.kernel_spec = s.spec;
  r.apply_budget = budget_applier(s.budget.for_kernel(s.kernel->declaration()));
  s.journal = std::make_unique<Journal>(journal_path(f, command), command + " " + identity + " shard " + r.shard.text(),
                                        f.resume);
  r.journal = s.journal.get();
  if (!f.quiet) {
    // The bar draws only when stderr is a terminal; its total is known at the first case.
    auto bar = std::make_shared<std::unique_ptr<ProgressBar>>();
    r.progress = [bar](std::size_t done, std::size_t total, const CaseRecord& c) {
      if (!*bar) *bar = std::make_unique<ProgressBar>(total);
      (*bar)->update(done, c.name);
      if (done == total) (*bar)->finish();
    };
  }
  return s;
}

int finish_run(RunRecord& record, const RunFlags& f, const RunSetup& setup) {
  record.budget = setup.budget.source;
  if (!f.json.empty()) write_run_record(record, f.json);
  // The record is safe on disk: the journal has done its job.
  if (setup.journal) {
    std::error_code ec;
    std::filesystem::remove(setup.journal->path(), ec);
  }
  write_reports(record, ReportOptions{f.markdown, f.html, f.junit});
  const std::string verdict = record.verdict();
  if (f.quiet) {
    std::cout << "verdict: " << record.verdict_line() << " (evidence over the cases tried, not a proof)\n";
  } else {
    std::cout.flush();
    print_summary(stdout, record);
  }
  return verdict == "pass" ? 0 : 1;
}

}  // namespace headroom::cli
