// headroom — the HTML review report: one self-contained file, no network.
//
// The same sections as the Markdown report (markdown_report.h), plus four
// plots: error against sequence length (kv_len), error against logit scale
// (logit_scale), the histogram of ULP errors (ulp_histogram summed over
// cases) and faults by family. The plots are inline SVG drawn by an inline
// script from JSON embedded in the page; styles are inline too, and a
// Content-Security-Policy of default-src 'none' forbids the page any fetch, so
// it reads the same offline, attached to a CI run or mailed. Every string from
// the record is escaped, in the markup and in the embedded JSON.
#pragma once

#include <string>

#include "headroom/record.h"

namespace headroom {

/// Returns: the report as one HTML5 document (UTF-8).
std::string html_report(const RunRecord& r);

}  // namespace headroom
