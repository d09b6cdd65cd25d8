// headroom merge — join the records of shards into the record of the whole run (merge.h).
#include <iostream>
#include <memory>

#include "command.h"
#include "run_common.h"
#include "headroom/merge.h"
#include "headroom/reports.h"
#include "headroom/terminal_report.h"

namespace headroom::cli {
namespace {

struct MergeFlags {
  std::vector<std::string> inputs;
  std::string json, markdown, html, junit;
  bool allow_partial = false;
};

// Exit 0 once the merged record is written: merging judges nothing. The
// merged verdict is in the record and on stdout; `compare` or the reports
// act on it.
int merge_main(const MergeFlags& f) {
  for (const auto& [option, path] : {std::pair{"--json", f.json}, {"--markdown", f.markdown}, {"--html", f.html},
                                    {"--junit", f.junit}})
    check_output_path(option, path);
  std::vector<std::filesystem::path> files(f.inputs.begin(), f.inputs.end());
  const MergeResult m = merge_files(files, f.allow_partial);
  for (const auto& note : m.notes) std::cerr << "headroom merge: note: " << note << '\n';
  write_run_record(m.record, f.json);
  write_reports(m.record, ReportOptions{f.markdown, f.html, f.junit});
  std::cout << "merged " << m.record.cases.size() << " cases from " << files.size() << " records into " << f.json
            << '\n';
  print_summary(stdout, m.record);
  return 0;
}

const CommandRegistration reg{"merge", 61, [](CLI::App& app) {
  auto flags = std::make_shared<MergeFlags>();
  auto* cmd = app.add_subcommand("merge", "Join the JSON records of shards (same kernel and suite, disjoint cases)");
  cmd->add_option("RECORDS", flags->inputs, "the shards' JSON records")->required();
  cmd->add_option("--json", flags->json, "write the merged record here")->required();
  cmd->add_option("--markdown", flags->markdown, "also write a review report in Markdown here");
  cmd->add_option("--html", flags->html, "also write a self-contained HTML report here");
  cmd->add_option("--junit", flags->junit, "also write JUnit XML here");
  cmd->add_flag("--allow-partial", flags->allow_partial,
                "merge even when shards of the split are missing; the verdict then says partial_pass or partial_fail");
  cmd->callback([flags] { exit_with(merge_main(*flags)); });
}};

}  // namespace
}  // namespace headroom::cli
