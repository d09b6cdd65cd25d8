// headroom bench — the certified reference against plain float64 attention, side by side.
//
//   bench [--small] [--core-only | --block-only | --backward-only] [--sizes T:D,...]
//         [--backward-sizes T:D,...] [--block-lengths T,...]
//         [--q-rows Q] [--naive-rows R] [--reps N] [--threads N] [--no-naive] [--block-mpfr]
//         [--suites quick,standard,deep [--suites-kernel K]]
//
// Sections (one file each, sections.h): core rows (core_section.cpp: T in
// {256, 1024, 4096} × D in {64, 128}) and block rows (block_section.cpp:
// d_model 512, 8 heads of 64, T in {128, 512, 2048}) and backward rows
// (backward_section.cpp: T:D in {256:64, 1024:128}). Every measurement runs
// in its own child process, so its peak memory is its own. Times are CPU
// seconds with one thread, wall seconds with more; the plain baselines get
// the same thread count as the reference. --small: core T in {64, 256} at
// D = 64, block T = 128, backward T = 64 at D = 64. --q-rows Q keeps Tk = T but takes only Q query
// rows (long-key memory checks). --suites runs only the suites section
// (suites_section.cpp): `headroom qualify` per suite on the float32 textbook
// example plug-in (or K), isolated and --no-isolation, wall and CPU seconds.
// A malformed or out-of-range value is one line on stderr naming the option,
// the value and the fix, and exit 2, as for headroom's options.
#include <algorithm>
#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <string>

#include "headroom/input_error.h"
#include "headroom/suite.h"
#include "measure.h"
#include "sections.h"
#include "usage_error.h"  // tools/headroom: the validators headroom's own options use

namespace {

// Caps that keep a typo from asking for terabytes; the default rows go up to
// T = 4096, D = 128 (core) and T = 2048 (block).
constexpr std::int64_t kMaxLength = std::int64_t{1} << 20;
constexpr std::int64_t kMaxHeadDim = 4096;
constexpr std::int64_t kMaxReps = 1000;

// Returns: `text` as an integer in [lo, hi]; otherwise prints headroom's one-line
// message for option `name` (the value, the range, the fix) and exits 2.
std::int64_t integer_option(const std::string& name, const std::string& text, std::int64_t lo, std::int64_t hi,
                            const std::string& example) {
  const std::string problem = headroom::cli::integer_in(name, lo, hi, example)(text);
  if (!problem.empty()) {
    std::fprintf(stderr, "bench: %s: %s\n", name.c_str(), problem.c_str());
    std::exit(2);
  }
  return std::stoll(text);
}

// Returns: the comma-separated items of `list` ("" items included, so that "1,,2" is refused).
std::vector<std::string> items_of(const std::string& list) {
  std::vector<std::string> items;
  for (std::size_t at = 0;;) {
    const std::size_t comma = std::min(list.find(',', at), list.size());
    items.push_back(list.substr(at, comma - at));
    if (comma == list.size()) return items;
    at = comma + 1;
  }
}

// Returns: the T:D pairs of option `name`; exits 2 on a malformed one.
std::vector<std::pair<std::int64_t, std::int64_t>> size_list(const std::string& name, const std::string& list) {
  std::vector<std::pair<std::int64_t, std::int64_t>> sizes;
  for (const std::string& item : items_of(list)) {
    const std::size_t colon = item.find(':');
    if (colon == std::string::npos) {
      std::fprintf(stderr, "bench: %s: %s is not T:D (fix: write e.g. %s 1024:128 or 256:64,1024:128)\n",
                   name.c_str(), headroom::quote_input(item, 40).c_str(), name.c_str());
      std::exit(2);
    }
    sizes.push_back({integer_option(name, item.substr(0, colon), 1, kMaxLength, "1024:128"),
                     integer_option(name, item.substr(colon + 1), 1, kMaxHeadDim, "1024:128")});
  }
  return sizes;
}

}  // namespace

int main(int argc, char** argv) {
  bench::Options opt;
  for (std::int64_t t : {256, 1024, 4096})
    for (std::int64_t d : {64, 128}) opt.core_sizes.push_back({t, d});
  opt.block_lengths = {128, 512, 2048};
  opt.backward_sizes = {{256, 64}, {1024, 128}};
  bool core = true, block = true, backward = true;
  for (int a = 1; a < argc; ++a) {
    const std::string arg = argv[a];
    if (arg == "--small") {
      opt.core_sizes = {{64, 64}, {256, 64}};
      opt.block_lengths = {128};
      opt.backward_sizes = {{64, 64}};
    } else if (arg == "--core-only") {
      block = backward = false;
    } else if (arg == "--block-only") {
      core = backward = false;
    } else if (arg == "--backward-only") {
      core = block = false;
    } else if (arg == "--backward-sizes" && a + 1 < argc) {
      opt.backward_sizes = size_list(arg, argv[++a]);
    } else if (arg == "--sizes" && a + 1 < argc) {
      opt.core_sizes = size_list(arg, argv[++a]);
    } else if (arg == "--block-lengths" && a + 1 < argc) {
      opt.block_lengths.clear();
      for (const std::string& t : items_of(argv[++a]))
        opt.block_lengths.push_back(integer_option(arg, t, 1, kMaxLength, "512"));
    } else if (arg == "--q-rows" && a + 1 < argc) {
      opt.q_rows = integer_option(arg, argv[++a], 1, kMaxLength, "64");
    } else if (arg == "--naive-rows" && a + 1 < argc) {
      opt.naive_rows = integer_option(arg, argv[++a], 1, kMaxLength, "8");
    } else if (arg == "--threads" && a + 1 < argc) {
      opt.threads = static_cast<unsigned>(integer_option(arg, argv[++a], 1, headroom::cli::kMaxThreads, "4"));
    } else if (arg == "--reps" && a + 1 < argc) {
      opt.reps = static_cast<int>(integer_option(arg, argv[++a], 1, kMaxReps, "3"));
    } else if (arg == "--no-naive") {
      opt.naive = false;
    } else if (arg == "--block-mpfr") {
      opt.block_mpfr = true;
    } else if (arg == "--suites" && a + 1 < argc) {
      for (const std::string& suite : items_of(argv[++a])) {
        try {
          headroom::suite_requests(suite);  // the suites headroom knows, and its message for another name
        } catch (const headroom::InputError& e) {
          std::fprintf(stderr, "bench: --suites: %s (fix: %s)\n", e.problem().c_str(), e.fix().c_str());
          return 2;
        }
        opt.suites.push_back(suite);
      }
      core = block = backward = false;
    } else if (arg == "--suites-kernel" && a + 1 < argc) {
      opt.suites_kernel = argv[++a];
    } else {
      std::fprintf(stderr,
                   "usage: bench [--small] [--core-only | --block-only | --backward-only] [--sizes T:D,...] "
                   "[--backward-sizes T:D,...] [--block-lengths T,...] "
                   "[--q-rows Q] [--naive-rows R] [--reps N] [--threads N] [--no-naive] [--block-mpfr] "
                   "[--suites quick,standard,deep [--suites-kernel K]]\n");
      return 2;
    }
  }
  bench::cpu_clock() = opt.threads == 1;
  if (core) bench::core_section(opt);
  if (block) bench::block_section(opt);
  if (backward) bench::backward_section(opt);
  if (!opt.suites.empty()) bench::suites_section(opt);
  return 0;
}
