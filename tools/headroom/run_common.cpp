// headroom — shared plumbing of qualify, hunt and replay (run_common.h).
#include "run_common.h"

#include <unistd.h>

#include <filesystem>
#include <iostream>
#include <thread>

#include <fmt/format.h>

#include "command.h"
#include "usage_error.h"
#include "headroom/bundled_registry.h"
#include "headroom/faults.h"
#include "headroom/input_error.h"
#include "headroom/judge_backward.h"
#include "headroom/progress_bar.h"
#include "headroom/reports.h"
#include "headroom/terminal_report.h"

namespace headroom::cli {

namespace {

// --shard as parse_shard reads it, refused by the parser with its range and fix.
CLI::Validator shard_text() {
  return CLI::Validator(
      [](std::string& text) -> std::string {
        const bool digits_only = text.find_first_not_of("0123456789/") == std::string::npos;  // no sign, no space
        try {
          if (digits_only) {
            parse_shard(text);
            return {};
          }
        } catch (const InputError&) {
        }
        return quote_input(text, 40) + " is not i/n with 1 ≤ i ≤ n ≤ " + std::to_string(kMaxShards) +
               " (fix: write e.g. --shard 2/3 for the second of three shards)";
      },
      "i/n");
}

}  // namespace

void add_run_flags(CLI::App* cmd, RunFlags& f) {
  cmd->add_option("--kernel", f.kernel, "bundled kernel name (see `headroom kernels`) or path to a plug-in .so");
  cmd->add_option("--kernel-cmd", f.kernel_cmd, "external kernel program, e.g. '/usr/bin/python3 my_kernel.py'");
  cmd->add_option("--budget", f.budget, "budget file (TOML; docs/budget-format.md); default: built-in budgets");
  cmd->add_option("--json", f.json, "write the result record (docs/result-schema.md) here");
  cmd->add_option("--markdown", f.markdown, "write a review report in Markdown here");
  cmd->add_option("--html", f.html, "write a self-contained HTML report here");
  cmd->add_option("--junit", f.junit, "write JUnit XML here (one test per family x format)");
  cmd->add_option("--shard", f.shard, "run only slice i of n (1-based), e.g. 2/4; join with `headroom merge`")
      ->check(shard_text());
  cmd->add_flag("--resume", f.resume, "continue an interrupted run from its journal");
  cmd->add_option("--journal", f.journal, "journal of finished cases (default: <json>.journal)");
  cmd->add_option("--time-limit", f.time_limit, "seconds one kernel call may take before it is a timeout")
      ->check(seconds_in("--time-limit"));
  cmd->add_flag("--no-isolation", f.no_isolation, "run the kernel in-process (faster; a crash ends headroom)");
  cmd->add_option("--threads", f.threads, "reference threads (default 0: one per core; at most 1024)")
      ->check(integer_in("--threads", 0, kMaxThreads, "2", "0 uses one thread per core"));
  cmd->add_option("--determinism-runs", f.determinism_runs, "identical runs compared for non-determinism (>= 2 checks)")
      ->check(integer_in("--determinism-runs", 1, 100, "3", "1 runs the kernel once, checking nothing"));
  cmd->add_flag("--quiet", f.quiet, "print only the verdict line");
  cmd->add_flag("--strict-budget", f.strict_budget,
                "a budget section naming no kernel of this run is an error, not a warning");
}

namespace {

std::string journal_path(const RunFlags& f, const std::string& command) {
  if (!f.journal.empty()) return f.journal;
  if (!f.json.empty()) return f.json + ".journal";
  return "headroom-" + command + ".journal";
}

}  // namespace

void check_output_path(const std::string& option, const std::string& path) {
  if (path.empty()) return;
  namespace fs = std::filesystem;
  const fs::path p(path);
  const fs::path folder = p.parent_path().empty() ? fs::path(".") : p.parent_path();
  const std::string place = option + " " + path;
  std::error_code ec;
  if (fs::is_directory(p, ec))
    throw InputError("command line", place, "is a folder", "give a file name inside it, e.g. " + (p / "out").string());
  if (!fs::is_directory(folder, ec))
    throw InputError("command line", place, "its folder " + folder.string() + " does not exist",
                     "create it first (mkdir -p " + folder.string() + ") or give another path");
  if (::access(folder.c_str(), W_OK) != 0)
    throw InputError("command line", place, "its folder " + folder.string() + " is not writable",
                     "give a path in a folder you can write");
}

std::string judging_options(const RunFlags& f) {
  const RunFlags defaults;
  std::string out;
  if (!f.budget.empty()) out += " --budget " + shell_quote(f.budget);
  if (f.strict_budget) out += " --strict-budget";
  if (f.time_limit != defaults.time_limit) out += " --time-limit " + fmt::format("{}", f.time_limit);
  if (f.no_isolation) out += " --no-isolation";
  if (f.determinism_runs != defaults.determinism_runs) out += " --determinism-runs " + std::to_string(f.determinism_runs);
  return out;
}

std::string setup_identity(const RunFlags& f) {
  return "kernel " + (f.kernel.empty() ? "cmd " + f.kernel_cmd : f.kernel) + " budget " + f.budget + " isolation " +
         (f.no_isolation ? "off" : "on") + " determinism " + std::to_string(f.determinism_runs);
}

RunSetup open_run(const RunFlags& f, const std::string& command, const std::string& identity) {
  RunSetup s;
  // Every output is checked before the first case runs: a run must not end by losing its verdict.
  check_output_path("--json", f.json);
  check_output_path("--markdown", f.markdown);
  check_output_path("--html", f.html);
  check_output_path("--junit", f.junit);
  check_output_path(f.journal.empty() ? (f.json.empty() ? "the journal" : "the journal of --json") : "--journal",
                    journal_path(f, command));
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
  s.plain_backward = plain_backward_for(s.kernel->declaration());
  s.budget = f.budget.empty() ? Budget{} : load_budget(f.budget);
  {
    // A section for a misspelt kernel would leave the intended limits unused without a word.
    std::vector<std::string> bundled;
    for (const auto& b : bundled_kernels()) bundled.push_back(b.declaration.name);
    const std::string& name = s.kernel->declaration().name;
    const auto unmatched = s.budget.unmatched_kernel_sections({name}, bundled);
    if (!unmatched.empty() && f.strict_budget) {
      const auto& u = unmatched.front();
      throw InputError(f.budget, "line " + std::to_string(u.line),
                       "[kernel." + u.name + "] names no kernel of this run (" + name + ")",
                       u.suggestion.empty() ? "name the kernel as `headroom kernels` or the plug-in declares it, or "
                                              "drop --strict-budget to allow sections for other kernels"
                                            : "rename it [kernel." + u.suggestion + "]");
    }
    for (const auto& u : unmatched) s.warnings.push_back(u.text());
    for (const auto& w : s.warnings) std::cerr << "headroom: warning: " << w << '\n';
  }

  RunnerOptions& r = s.runner;
  r.judge.detect.run.isolate = !f.no_isolation;
  r.judge.detect.run.time_limit_s = f.time_limit;
  r.judge.detect.determinism_runs = f.determinism_runs;
  r.judge.detect.reference.threads = f.threads ? f.threads : std::max(1u, std::thread::hardware_concurrency());
  r.judge.plain = s.plain.get();
  r.judge.plain_backward = s.plain_backward.get();
  r.shard = parse_shard(f.shard);
  r.kernel_spec = s.spec;
  r.kernel_is_program = !f.kernel_cmd.empty();
  r.tool = invoked_as();
  r.judging_options = judging_options(f);
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
  record.warnings = setup.warnings;
  const KernelBudget applied = setup.budget.for_kernel(setup.kernel->declaration());
  // The classes the verdict tolerated, from whichever section set them ([format.*] or [kernel.*]).
  record.tolerated_faults.clear();
  for (FaultClass c : applied.tolerated_faults) record.tolerated_faults.emplace_back(fault_class_name(c));
  const Limit& growth = applied.max_growth_exponent;
  if (growth.kind == Limit::Kind::fixed) {
    record.growth_limit = growth.value;
    record.growth_limit_origin = growth.origin;
  }
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
