// headroom fuzzing — parse_budget on arbitrary text: an InputError, or a budget whose every limit is a number.
//
// Any other outcome is a finding: a crash, a sanitizer report, a leak, an
// exception other than InputError (a toml::parse_error escaping, say), or an
// accepted budget that yields a NaN limit — a NaN compares false with every
// figure, so it would pass anything silently.
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <cstdlib>
#include <string>
#include <string_view>

#include "headroom/budget.h"
#include "headroom/input_error.h"

namespace {

void check(bool ok) {
  if (!ok) std::abort();
}

constexpr headroom::Format kFormats[] = {headroom::Format::float64, headroom::Format::float32, headroom::Format::binary16,
                                         headroom::Format::bfloat16, headroom::Format::int8};

void check_limits(const headroom::KernelBudget& b) {
  for (const headroom::Limit* l : {&b.max_ulp, &b.max_scaled_error, &b.max_rel_rmse, &b.max_ratio_to_plain}) {
    for (std::int64_t n : {std::int64_t{1}, std::int64_t{100}, std::int64_t{1} << 20, std::int64_t{1} << 40}) {
      for (headroom::Format out : {headroom::Format::float64, headroom::Format::float32, headroom::Format::binary16}) {
        const double v = l->relative_at(n, headroom::unit_roundoff(out));
        check(!std::isnan(v) && v >= 0);
        check(!l->describe(n, headroom::unit_roundoff(out)).empty());
      }
    }
  }
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  const std::string_view text(reinterpret_cast<const char*>(data), size);
  headroom::Budget budget;
  try {
    budget = headroom::parse_budget(text, "fuzz.toml");
  } catch (const headroom::InputError&) {
    return 0;
  }
  for (headroom::Format f : kFormats) check_limits(budget.for_kernel("any_kernel", f));
  for (const auto& [name, section] : budget.kernels)
    for (headroom::Format f : kFormats) check_limits(budget.for_kernel(name, f));
  return 0;
}
