// headroom compare — diff two run records; exit 1 on a regression beyond the tolerance (compare.h).
#include <iostream>
#include <memory>

#include "command.h"
#include "headroom/compare.h"
#include "run_common.h"
#include "usage_error.h"

namespace headroom::cli {
namespace {

struct CompareFlags {
  std::string base, next, json, markdown;
  double tolerance = kDefaultCompareTolerance;
};

const CommandRegistration reg{"compare", 60, [](CLI::App& app) {
  auto flags = std::make_shared<CompareFlags>();
  auto* cmd = app.add_subcommand("compare",
                                 "Compare two JSON records per family x format; exit 1 on a regression beyond the "
                                 "tolerance or any new fault");
  cmd->add_option("BASE", flags->base, "the record to compare against")->required();
  cmd->add_option("NEW", flags->next, "the new record")->required();
  cmd->add_option("--tolerance", flags->tolerance,
                  "relative growth of an error figure still accepted (default 0.10 = 10 %); faults never")
      ->capture_default_str()
      ->check(number_in("--tolerance", 0, false, 1000, "0.1", "0 accepts no growth at all"));
  cmd->add_option("--json", flags->json, "write the comparison as JSON here");
  cmd->add_option("--markdown", flags->markdown, "write the comparison as Markdown here (for a pull request)");
  cmd->callback([flags] {
    check_output_path("--json", flags->json);
    check_output_path("--markdown", flags->markdown);
    exit_with(run_compare(flags->base, flags->next, flags->tolerance, flags->json, std::cout, flags->markdown));
  });
}};

}  // namespace
}  // namespace headroom::cli
