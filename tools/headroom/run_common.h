// headroom — the options and plumbing that qualify, hunt and replay share.
#pragma once

#include <memory>
#include <string>

#include <CLI/CLI.hpp>

#include "headroom/attach.h"
#include "headroom/budget.h"
#include "headroom/journal.h"
#include "headroom/qualify.h"
#include "headroom/record.h"

namespace headroom::cli {

struct RunFlags {
  std::string kernel;        ///< --kernel: a bundled name or a shared library path
  std::string kernel_cmd;    ///< --kernel-cmd: an external program
  std::string budget;        ///< --budget FILE
  std::string json;          ///< --json OUT
  std::string markdown, html, junit;
  std::string shard = "1/1";
  bool resume = false;
  std::string journal;       ///< --journal FILE (default: <json>.journal, or headroom-<command>.journal)
  double time_limit = 20.0;
  bool no_isolation = false;
  unsigned threads = 0;      ///< reference threads; 0 = all cores
  int determinism_runs = 2;
  bool quiet = false;
  bool strict_budget = false;  ///< --strict-budget: a budget section naming no kernel of the run is an error
};

/// Adds the shared options to `cmd`, bound to `f`.
void add_run_flags(CLI::App* cmd, RunFlags& f);

/// Checks that a file can be written at `path` before any work is done:
/// its folder exists and is writable, and `path` is not a folder. Throws
/// InputError("command line", "<option> <path>", problem, fix) otherwise.
/// Empty `path`: nothing to check.
void check_output_path(const std::string& option, const std::string& path);

/// Returns: the options of `f` that change a verdict, as replay commands carry
/// them (RunnerOptions::judging_options): --budget, and --time-limit,
/// --no-isolation, --determinism-runs, --strict-budget where they differ from their defaults.
std::string judging_options(const RunFlags& f);

/// Returns: the kernel and options that make two runs the same run (for the journal's identity).
std::string setup_identity(const RunFlags& f);

/// Everything a run needs, opened from the flags.
struct RunSetup {
  std::unique_ptr<AttachedKernel> kernel;
  std::unique_ptr<AttachedKernel> plain;  ///< the bundled textbook kernel of the same formats, or null
  std::unique_ptr<AttachedKernel> plain_backward;  ///< the plain same-precision backward, or null
  std::string spec;                       ///< how the user named the kernel, for replay commands
  Budget budget;
  std::unique_ptr<Journal> journal;
  RunnerOptions runner;
  std::vector<std::string> warnings;      ///< printed on stderr when found; carried into the record
};

/// Returns: the setup for `command` ("qualify", "hunt", "replay"); `identity`
/// identifies the run for the journal. Throws InputError for bad flags or files.
RunSetup open_run(const RunFlags& f, const std::string& command, const std::string& identity);

/// Writes the JSON record and the reports the flags ask for, prints the
/// terminal summary, and returns the exit code: 0 pass, 1 fail.
int finish_run(RunRecord& record, const RunFlags& f, const RunSetup& setup);

}  // namespace headroom::cli
