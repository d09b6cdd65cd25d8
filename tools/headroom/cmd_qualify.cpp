// headroom qualify — run a deterministic suite (or the user's shapes) against a kernel and give the verdict.
#include "command.h"
#include "headroom/generate.h"
#include "headroom/input_error.h"
#include "headroom/shapes_file.h"
#include "headroom/suite.h"
#include "run_common.h"

namespace headroom::cli {
namespace {

struct QualifyFlags {
  RunFlags run;
  std::string suite = "quick";
  bool suite_given = false;
  std::string save;
  std::vector<std::string> shapes;  ///< --shape, each B,Hq,Hkv,Tq,Tk,Dk,Dv
  std::string shapes_file;
  std::vector<std::string> families;
};

// The requests of the run, and the name the record gives them.
std::vector<CaseRequest> requests_of(const QualifyFlags& f, std::string& name) {
  if (f.shapes.empty() && f.shapes_file.empty()) {
    name = f.suite;
    return only_families(suite_requests(f.suite), f.families);
  }
  if (f.suite_given)
    throw InputError("command line", "--suite", "is given with --shape/--shapes, which replace the suite",
                     "drop --suite to run your shapes, or drop --shape/--shapes to run the suite");
  std::vector<CoreShape> shapes;
  if (!f.shapes_file.empty()) shapes = load_shapes_file(f.shapes_file);
  for (const std::string& s : f.shapes) shapes.push_back(parse_user_shape(s));
  name = f.shapes_file.empty() ? "shapes" : "shapes " + f.shapes_file;
  return only_families(shape_requests(shapes), f.families);
}

int qualify_main(const QualifyFlags& f) {
  std::string name;
  const auto requests = requests_of(f, name);
  if (requests.empty())
    throw InputError("command line", "--family", "leaves no case of the suite",
                     "name families the suite runs (`headroom case families`)");
  std::string identity = setup_identity(f.run) + " suite " + name;
  for (const auto& fam : f.families) identity += " family " + fam;
  for (const auto& s : f.shapes) identity += " shape " + s;
  RunSetup setup = open_run(f.run, "qualify", identity);
  setup.runner.save_failures = f.save;
  std::vector<PlannedCase> cases;
  cases.reserve(requests.size());
  for (const auto& r : requests) cases.push_back(planned(r));
  RunRecord record = run_cases(*setup.kernel, cases, setup.runner);
  record.command = "qualify";
  record.suite = name;
  return finish_run(record, f.run, setup);
}

const CommandRegistration reg{"qualify", 20, [](CLI::App& app) {
  auto flags = std::make_shared<QualifyFlags>();
  auto* cmd = app.add_subcommand("qualify", "Run a suite of adversarial cases against a kernel; exit 0 within budget, 1 outside");
  add_run_flags(cmd, flags->run);
  auto* suite = cmd->add_option("--suite", flags->suite, "quick | standard | deep (see `headroom suites`)")
                    ->check(CLI::IsMember({"quick", "standard", "deep"}));
  cmd->add_option("--shape", flags->shapes,
                  "run every adversarial family at this shape B,Hq,Hkv,Tq,Tk,Dk,Dv instead of a suite (repeatable)");
  cmd->add_option("--shapes", flags->shapes_file,
                  "run every adversarial family at the shapes of this model file (TOML, docs/shapes-format.md)");
  cmd->add_option("--family", flags->families, "run only cases of this generator family (repeatable)");
  cmd->add_option("--save", flags->save, "save each failing case as a case folder here");
  cmd->callback([flags, suite] {
    flags->suite_given = suite->count() > 0;
    exit_with(qualify_main(*flags));
  });
}};

}  // namespace
}  // namespace headroom::cli
