// headroom hunt — property-based search for failing cases, each shrunk and saved.
#include <iostream>

#include "command.h"
#include "headroom/hunt.h"
#include "run_common.h"
#include "usage_error.h"

namespace headroom::cli {
namespace {

struct HuntFlags {
  RunFlags run;
  int cases = 100;
  std::uint64_t seed = 1;
  std::string save;
  std::vector<std::string> families;
  int max_shrink_steps = 200;
  std::int64_t max_kv_len = 0;
};

int hunt_main(const HuntFlags& f) {
  std::string identity = setup_identity(f.run) + " cases " + std::to_string(f.cases) + " seed " + std::to_string(f.seed) +
                         (f.max_kv_len > 0 ? " max-kv-len " + std::to_string(f.max_kv_len) : "");
  for (const auto& fam : f.families) identity += " " + fam;
  RunSetup setup = open_run(f.run, "hunt", identity);
  HuntOptions opt;
  opt.runner = setup.runner;
  opt.cases = f.cases;
  opt.seed = f.seed;
  opt.families = f.families;
  opt.save = f.save;
  opt.max_shrink_steps = f.max_shrink_steps;
  opt.max_kv_len = f.max_kv_len;
  HuntResult result = hunt(*setup.kernel, opt);
  for (const auto& h : result.findings)
    std::cout << "found " << h.signature << ": " << h.original << " shrunk in " << h.shrink_steps << " steps to "
              << h.shrunk << (h.saved.empty() ? "" : ", saved in " + h.saved.string()) << '\n';
  result.record.command = "hunt";
  result.record.suite = "hunt";
  return finish_run(result.record, f.run, setup);
}

const CommandRegistration reg{"hunt", 30, [](CLI::App& app) {
  auto flags = std::make_shared<HuntFlags>();
  auto* cmd = app.add_subcommand("hunt", "Search for failing cases with random generation; shrink and save each failure");
  add_run_flags(cmd, flags->run);
  cmd->add_option("--cases", flags->cases, "cases to generate")->check(integer_in("--cases", 1, 1000000, "100"));
  cmd->add_option("--seed", flags->seed, "first seed (case i uses seed + i)")
      ->check(seed_value("--seed"));
  cmd->add_option("--save", flags->save, "save each shrunk failing case as a case folder here");
  cmd->add_option("--family", flags->families, "only these families (repeatable); default all of the kernel's level");
  cmd->add_option("--max-shrink-steps", flags->max_shrink_steps, "shrinks judged per failure")->check(integer_in("--max-shrink-steps", 0, 100000, "200", "0 saves failures unshrunk"));
  cmd->add_option("--max-kv-len", flags->max_kv_len,
                  "also draw production shapes (head dims 64-256, groups to 16, batches to 8, lengths tile multiples "
                  "as often as not) with Tk up to this, for half the cases (16 to 131072; default: small shapes only)")
      ->check(CLI::Validator(
          [range = integer_in("--max-kv-len", kMinHuntKvLen, kMaxHuntKvLen, "16384", "or 0 for small shapes only")](
              std::string& text) { return text == "0" ? std::string() : range(text); },
          "INT"));
  cmd->callback([flags] { exit_with(hunt_main(*flags)); });
}};

}  // namespace
}  // namespace headroom::cli
