// headroom — running a list of cases against a kernel: shards, journal, budget, record.
//
// The loop behind `qualify`, `hunt` and `replay`: take this shard's slice of
// the cases, skip those the journal already holds, judge the rest (judge.h),
// apply the budget, append each finished case to the journal, and return the
// run record with cases sorted by name (so shards merge to the unsharded
// record). Failing cases can be saved as case folders, and then their replay
// command names the saved folder.
#pragma once

#include <cstdint>
#include <filesystem>
#include <functional>
#include <optional>
#include <string>
#include <vector>

#include "headroom/budget.h"
#include "headroom/case.h"
#include "headroom/generate.h"
#include "headroom/journal.h"
#include "headroom/judge.h"
#include "headroom/record.h"

namespace headroom {

/// A deterministic slice: shard `index` (0-based) of `count`.
struct Shard {
  int index = 0;
  int count = 1;
  /// Returns: "i/n" 1-based, as the user writes it.
  std::string text() const;
};

/// The most shards a run may be split into.
inline constexpr int kMaxShards = 100000;

/// Returns: the shard written "i/n" (1 ≤ i ≤ n ≤ kMaxShards, decimal). Throws
/// InputError(place "--shard") otherwise.
Shard parse_shard(const std::string& text);

/// Returns: whether case `name` belongs to shard `s`: a stable hash of the name
/// modulo the count, so every case lands in exactly one shard whatever the order.
bool in_shard(const std::string& name, const Shard& s);

/// Returns: a folder name for case `name` that cannot leave the folder it is
/// put in: characters other than [A-Za-z0-9._-] become '_', and a name of dots
/// alone ("", ".", "..") is prefixed with "case".
std::string case_folder_name(const std::string& name);

/// One case to run, and the request that recreates it from nothing (absent for a case read from a folder).
/// A case with an empty c.name is made (from its request) or read (from its
/// folder) when its turn comes, named `name` (planned() below), so a suite or
/// a corpus of production-sized cases never holds more than one case's
/// tensors at a time.
struct PlannedCase {
  Case c;
  std::optional<CaseRequest> request;
  std::filesystem::path folder;  ///< where the case was read from, when it was
  std::string name;              ///< the case's name when c is not made yet (c.name otherwise)

  /// Returns: the case's name.
  const std::string& case_name() const { return c.name.empty() ? name : c.name; }
};

/// Returns: the case of `r`, to be made by run_cases when its turn comes
/// (name from case_outline, no values yet). Throws: InputError as make_case.
PlannedCase planned(const CaseRequest& r);

/// Returns: the case folder `dir`, to be read again by run_cases when its
/// turn comes, named `name` (its manifest's name when empty). The folder is
/// read whole now, so a malformed one is refused before anything runs, and
/// dropped. Throws: InputError as read_case.
PlannedCase planned(const std::filesystem::path& dir, const std::string& name = "");

struct RunnerOptions {
  JudgeOptions judge;
  Shard shard;
  Journal* journal = nullptr;             ///< finished cases are appended here; cases found there are not re-run
  std::filesystem::path save_failures;    ///< folder for failing cases (empty: not saved)
  std::string kernel_spec;                ///< the kernel as the user named it, for replay commands
  bool kernel_is_program = false;         ///< kernel_spec is an external program (--kernel-cmd), not --kernel
  std::string tool = "headroom";          ///< the headroom binary as the user invoked it, for replay commands
  /// Every option that changes a verdict, as the user would type it, already
  /// quoted for a POSIX shell and with a leading space (" --budget b.toml
  /// --time-limit 5"): replay commands carry them, so they reproduce the verdict.
  std::string judging_options;
  /// Applies the budget: sets within_budget and reasons. Called once per judged case.
  std::function<void(CaseRecord&, const Judgement&, const Case&)> apply_budget;
  /// Called after each case (done counts cases of this shard finished so far, journal included).
  std::function<void(std::size_t done, std::size_t total, const CaseRecord&)> progress;
};

/// Returns: `s` quoted for a POSIX shell: as is when it holds no character the
/// shell treats specially, else in single quotes (a ' inside as '\'').
std::string shell_quote(const std::string& s);

/// Returns: the command that replays case folder `folder` as this run judged
/// it: "<tool> replay --kernel[-cmd] <spec><judging options> <folder>"
/// (`kernel_name` when opt.kernel_spec is empty).
std::string replay_command(const RunnerOptions& opt, const std::string& kernel_name, const std::string& folder);
/// Returns: the command that makes the case of `request` in folder `dir` and
/// replays it: "<tool> case make ... --out <dir> && " + replay_command(...).
std::string make_and_replay_command(const RunnerOptions& opt, const std::string& kernel_name,
                                    const CaseRequest& request, const std::string& dir);

/// Returns: a RunnerOptions::apply_budget that judges each case against `budget`
/// (budget.h judge(), at the case's accumulation length) and records the reasons
/// and notes.
std::function<void(CaseRecord&, const Judgement&, const Case&)> budget_applier(KernelBudget budget);

/// Returns: the record of running `cases` (this shard's slice) on kernel `k`.
/// Cases not fitting the kernel's declaration are listed in `skipped`.
RunRecord run_cases(AttachedKernel& k, const std::vector<PlannedCase>& cases, const RunnerOptions& opt,
                    std::vector<std::string>* skipped = nullptr);

}  // namespace headroom
