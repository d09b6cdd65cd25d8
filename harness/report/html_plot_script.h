// headroom — the inline script that draws the HTML report's plots (internal to the report stage).
//
// The page embeds its data as JSON in <script type="application/json"
// id="headroom-data"> (html_report.cpp writes it) and this script turns it
// into four inline SVG plots, so the file needs nothing from the network:
//   svg#plot-kv-len        one <circle class="mark"> per case with a finite scaled error: against Tk
//   svg#plot-logit-scale   the same against the largest |scaled score|
//   svg#plot-ulp-histogram one <rect class="mark"> per non-empty bucket of the summed ULP histogram
//   svg#plot-faults        one <rect class="mark"> per (family, fault class) with a count > 0
// When done it sets data-plots="drawn" on <body> (tests read that back).
#pragma once

namespace headroom::report_detail {

extern const char* const kPlotScript;

}  // namespace headroom::report_detail
