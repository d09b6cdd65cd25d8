// headroom suites — what each built-in suite covers: cases, largest Tk, head dims, group sizes, masks, formats.
//
//   headroom suites            every suite, a block of "  label: text" lines each
//   headroom suites --markdown the same as a Markdown table (README's coverage table)
#include <cstdio>
#include <memory>
#include <string>

#include "command.h"
#include "headroom/suite.h"

namespace headroom::cli {
namespace {

int suites_main(bool markdown) {
  if (markdown) {
    std::printf("| suite | what it covers |\n|---|---|\n");
    for (const SuiteInfo& s : kSuites) {
      std::string cell;
      for (const auto& line : coverage_text(suite_coverage(suite_requests(s.name)))) cell += (cell.empty() ? "" : "<br>") + line;
      std::printf("| `%s` | %s |\n", std::string(s.name).c_str(), cell.c_str());
    }
    return 0;
  }
  for (const SuiteInfo& s : kSuites) {
    std::printf("%s — %s\n", std::string(s.name).c_str(), std::string(s.summary).c_str());
    for (const auto& line : coverage_text(suite_coverage(suite_requests(s.name)))) std::printf("  %s\n", line.c_str());
  }
  return 0;
}

const CommandRegistration reg{"suites", 25, [](CLI::App& app) {
  auto* cmd = app.add_subcommand("suites", "Say what each built-in suite covers (largest Tk, head dims, group sizes, masks)");
  auto md = std::make_shared<bool>(false);
  cmd->add_flag("--markdown", *md, "print a Markdown table");
  cmd->callback([md] { exit_with(suites_main(*md)); });
}};

}  // namespace
}  // namespace headroom::cli
