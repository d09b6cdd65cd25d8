// headroom — writing the report files a command was asked for (--markdown, --html, --junit).
//
// qualify, hunt, replay and merge share this: they fill ReportOptions from
// their command line (tools/headroom/report_options.h adds the flags) and call
// write_reports() with the finished record. Each file is written atomically
// (atomic_file.h), so a reader never sees half a report.
#pragma once

#include <filesystem>

#include "headroom/record.h"

namespace headroom {

struct ReportOptions {
  std::filesystem::path markdown;  ///< empty: not written
  std::filesystem::path html;
  std::filesystem::path junit;
  bool any() const { return !markdown.empty() || !html.empty() || !junit.empty(); }
};

/// Writes each report whose path is set. Throws InputError naming the file when
/// one cannot be written (the others already written stay written).
void write_reports(const RunRecord& r, const ReportOptions& options);

}  // namespace headroom
