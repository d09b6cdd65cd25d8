// Hand-built run records for the report tests (report_test.cpp, report_html_test.cpp).
#pragma once

#include <cmath>
#include <string>
#include <vector>

#include "headroom/record.h"

namespace headroom::testing {

// A case with the figures that the reports read; everything else plausible.
inline CaseRecord make_case(const std::string& name, const std::string& family, double scaled, double ulp,
                            bool within = true, std::int64_t kv_len = 16, double logit_scale = 4.0) {
  CaseRecord c;
  c.name = name;
  c.family = family;
  c.seed = 1000 + name.size();
  c.size = 10;
  c.level = "core";
  c.shape = "1,2,2,8," + std::to_string(kv_len) + ",16,16";
  c.kv_len = kv_len;
  c.logit_scale = logit_scale;
  c.mask = "none";
  c.format = "float32";
  c.figures.elements = 256;
  c.figures.max_ulp = ulp;
  c.figures.max_scaled_error = scaled;
  c.figures.max_abs_error = scaled * 0x1p-24;
  c.figures.rmse = scaled * 0x1p-26;
  c.figures.relative_rmse = scaled * 0x1p-25;
  c.figures.cosine = 1;
  c.figures.lse_error = std::nan("");
  c.figures.ratio_to_plain = 1.5;
  c.figures.kernel_error = scaled;
  c.figures.worst_index = "0,1,3,5";
  c.figures.worst_expected = 0.1875;             // 0x1.8p-3
  c.figures.worst_obtained = 0.1875 + 0x1p-26;   // 0x1.8000008p-3
  c.within_budget = within;
  if (!within) c.reasons = {"max_scaled_error " + std::to_string(scaled) + " > limit 8"};
  c.replay = "headroom replay --kernel f32_tiled --family " + family + " --seed " + std::to_string(c.seed) + " --case " + name;
  c.ulp_histogram.assign(24, 0.0);
  c.ulp_histogram[0] = 200;
  c.ulp_histogram[2] = 50;
  c.ulp_histogram[3] = 6;
  c.limits.max_ulp = INFINITY;
  c.limits.max_scaled_error = 8;
  c.limits.max_rel_rmse = 0x1p-22;
  c.limits.max_ratio_to_plain = 4;
  return c;
}

inline RunRecord make_record(std::vector<CaseRecord> cases) {
  RunRecord r;
  r.command = "qualify";
  r.kernel = "f32_tiled";
  r.kernel_description = "tiled online softmax, float32";
  r.input_format = r.output_format = "float32";
  r.suite = "quick";
  r.budget = "defaults";
  r.cases = std::move(cases);
  return r;
}

}  // namespace headroom::testing
