// headroom — error growth with sequence length: the log-log slope of the
// scaled error against Tk, per format and family.
//
// A sound kernel's rounding errors accumulate like a random walk, so its
// scaled error grows about as √n with the accumulation length n ∝ Tk: an
// exponent near 0.5 (Higham & Mary, "A new approach to probabilistic rounding
// error analysis", SIAM J. Sci. Comput. 41(5), 2019). An error that grows
// with every key — a systematic bias, a low-precision accumulator — shows an
// exponent near 1. Each fit is derived from the case records alone, so a
// merged record fits what its shards fit together.
#pragma once

#include <cstdint>
#include <string>
#include <vector>

#include "headroom/record.h"

namespace headroom {

/// One least-squares line log10(e) = intercept + exponent · log10(Tk).
struct GrowthLine {
  double exponent = 0;
  double intercept = 0;
  double spread = 0;  ///< standard error of the exponent (residuals over n − 2 degrees of freedom)
};

/// The fit of one family's cases in one format.
struct FamilyGrowth {
  std::string format, family;
  std::size_t cases = 0;    ///< cases fitted
  std::size_t lengths = 0;  ///< distinct Tk among them
  std::int64_t min_kv_len = 0, max_kv_len = 0;
  GrowthLine median;  ///< through the median scaled error at each Tk
  GrowthLine worst;   ///< through the largest scaled error at each Tk
};

/// The fits of one format, and their summary over families.
struct FormatGrowth {
  std::string format;
  std::vector<FamilyGrowth> families;  ///< in name order
  double exponent = 0;          ///< median over families of median.exponent
  double low = 0, high = 0;     ///< smallest and largest median.exponent over families
  double worst_exponent = 0;    ///< median over families of worst.exponent
};

/// Fewest distinct Tk, and smallest ratio of the largest to the smallest, for a fit.
inline constexpr std::size_t kGrowthMinLengths = 3;
inline constexpr double kGrowthMinSpan = 4;

/// Returns: per input format (name order), the fits of each family whose
/// core cases with a finite scaled error > 0 and no fault span at least
/// kGrowthMinLengths distinct Tk over a ratio ≥ kGrowthMinSpan; formats with
/// no such family are left out.
std::vector<FormatGrowth> error_growth(const std::vector<CaseRecord>& cases);

/// Returns: one line per fitted format, e.g. "float32: growth exponent 0.51
/// (families 0.38 to 0.63, 12 fitted; worst-case error 0.55) — about 0.5 is a
/// random walk of roundings, about 1 an error that grows with every key".
std::vector<std::string> growth_lines(const std::vector<FormatGrowth>& g);

/// Returns: for each format whose exponent exceeds `limit` (a finite number),
/// "error growth exponent 0.98 for float32 is above the limit 0.75 (ORIGIN)";
/// empty when none does or the limit is NaN.
std::vector<std::string> growth_failures(const std::vector<FormatGrowth>& g, double limit, const std::string& origin);

}  // namespace headroom
