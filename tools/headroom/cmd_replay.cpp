// headroom replay — run saved case folders (a corpus, or cases saved by qualify/hunt).
#include <algorithm>
#include <filesystem>
#include <set>

#include "command.h"
#include "headroom/case_folder.h"
#include "headroom/input_error.h"
#include "run_common.h"

namespace headroom::cli {
namespace {

namespace fs = std::filesystem;

struct ReplayFlags {
  RunFlags run;
  std::vector<std::string> dirs;
};

// A folder with manifest.json is a case; any other folder is searched for cases below it.
void collect(const fs::path& dir, std::vector<fs::path>& out) {
  std::error_code ec;
  if (!fs::is_directory(dir, ec))
    throw InputError(dir.string(), "folder", "is not a folder", "give case folders or folders that contain them");
  if (fs::exists(dir / "manifest.json")) {
    out.push_back(dir);
    return;
  }
  std::vector<fs::path> subs;
  for (const auto& e : fs::directory_iterator(dir))
    if (e.is_directory() && !e.is_symlink()) subs.push_back(e.path());
  std::sort(subs.begin(), subs.end());
  for (const auto& s : subs) collect(s, out);
}

int replay_main(const ReplayFlags& f) {
  std::vector<fs::path> folders;
  for (const auto& d : f.dirs) collect(d, folders);
  if (folders.empty())
    throw InputError(f.dirs.front(), "folder", "holds no case folder (no manifest.json found)",
                     "give folders written by `headroom case make`, qualify --save or hunt --save");
  std::vector<PlannedCase> cases;
  std::set<std::string> names;
  for (const auto& dir : folders) {
    // One case folder in memory at a time: read here (a malformed folder is
    // refused before anything runs), then again when its turn comes.
    PlannedCase p = planned(dir);
    // Names must be unique in a record; two corpora may reuse one.
    if (!names.insert(p.name).second) {
      p.name += "@" + dir.string();
      names.insert(p.name);
    }
    cases.push_back(std::move(p));
  }
  std::string identity = setup_identity(f.run);
  for (const auto& d : folders) identity += " " + d.string();
  RunSetup setup = open_run(f.run, "replay", identity);
  RunRecord record = run_cases(*setup.kernel, cases, setup.runner);
  record.command = "replay";
  record.suite = "replay";
  return finish_run(record, f.run, setup);
}

const CommandRegistration reg{"replay", 40, [](CLI::App& app) {
  auto flags = std::make_shared<ReplayFlags>();
  auto* cmd = app.add_subcommand("replay", "Run saved case folders against a kernel; exit 0 within budget, 1 outside");
  add_run_flags(cmd, flags->run);
  cmd->add_option("CASE_DIR", flags->dirs,
                  "one or more case folders, or folders holding them (a corpus), e.g. corpora/no_max_shift")
      ->required();
  cmd->callback([flags] { exit_with(replay_main(*flags)); });
}};

}  // namespace
}  // namespace headroom::cli
