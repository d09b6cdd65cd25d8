// headroom — writing the requested reports (reports.h).
#include "headroom/reports.h"

#include "headroom/atomic_file.h"
#include "headroom/html_report.h"
#include "headroom/junit_report.h"
#include "headroom/markdown_report.h"

namespace headroom {

void write_reports(const RunRecord& r, const ReportOptions& options) {
  if (!options.markdown.empty()) write_file_atomically(options.markdown, markdown_report(r));
  if (!options.html.empty()) write_file_atomically(options.html, html_report(r));
  if (!options.junit.empty()) write_file_atomically(options.junit, junit_report(r));
}

}  // namespace headroom
