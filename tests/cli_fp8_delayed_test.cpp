// The fp8_scales delayed-scale kind on the command-line path (`headroom case
// make` then `headroom replay`): K's first key passes its delayed scale's
// range and is clipped to ±448 by the saturating conversion the bundled E4M3
// kernels declare; the clipped key still holds more than 464/480 of each row,
// so e4m3_overflow_nan (P·480 converted without saturation, the specimen "E4M3
// saturating to NaN instead of the largest finite value") writes NaN and is
// caught as non_finite, while e4m3_tensorwise and e4m3_blockwise pass the
// built-in budgets on the same cases.
#include <gtest/gtest.h>

#include <string>
#include <vector>

#include "cli_support.h"
#include "headroom/generate.h"
#include "headroom/record.h"

namespace headroom {
namespace {

using namespace headroom::testing;

// The first `count` seeds whose fp8_scales case is of the delayed-scale kind.
std::vector<std::uint64_t> delayed_seeds(std::size_t count) {
  std::vector<std::uint64_t> seeds;
  for (std::uint64_t seed = 1; seed < 200 && seeds.size() < count; ++seed) {
    CaseRequest req;
    req.family = "fp8_scales";
    req.seed = seed;
    if (make_case(req).core.fp8_delayed.k != 0.0f) seeds.push_back(seed);
  }
  return seeds;
}

TEST(CliFp8Delayed, OverflowToNanSpecimenCaughtSoundKernelsPass) {
  const auto seeds = delayed_seeds(2);
  ASSERT_EQ(seeds.size(), 2u);
  const auto dir = fresh_cli_dir("fp8_delayed");
  for (std::uint64_t seed : seeds) {
    SCOPED_TRACE("seed " + std::to_string(seed));
    const std::string c = "c" + std::to_string(seed);
    ASSERT_EQ(shell_in(dir, kTool + " case make --family fp8_scales --seed " + std::to_string(seed) + " --out " + c +
                                " >/dev/null 2>&1"),
              0);
    EXPECT_NE(file_text(dir / c / "manifest.json").find("fp8_delayed_scales_hex"), std::string::npos);
    const std::string replay = kTool + " replay --determinism-runs 1 --quiet " + c + " --json ";
    ASSERT_EQ(shell_in(dir, replay + "nan.json --kernel e4m3_overflow_nan >nan.txt 2>&1"), 1) << file_text(dir / "nan.txt");
    const RunRecord bad = read_run_record(dir / "nan.json");
    ASSERT_EQ(bad.cases.size(), 1u);
    EXPECT_GT(bad.cases[0].faults.count("non_finite"), 0u) << file_text(dir / "nan.txt");
    for (const char* sound : {"e4m3_tensorwise", "e4m3_blockwise"}) {
      EXPECT_EQ(shell_in(dir, replay + "ok.json --kernel " + sound + " >ok.txt 2>&1"), 0)
          << sound << ": " << file_text(dir / "ok.txt");
    }
  }
}

}  // namespace
}  // namespace headroom
