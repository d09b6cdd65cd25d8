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
#include <algorithm>
#include <cstdio>
#include <cstdlib>
#include <string>

#include "measure.h"
#include "sections.h"

namespace {

bool parse_list(const std::string& list, bool pairs, bench::Options& opt,
                std::vector<std::pair<std::int64_t, std::int64_t>>* sizes = nullptr) {
  if (sizes == nullptr) sizes = &opt.core_sizes;
  for (std::size_t at = 0; at < list.size();) {
    const std::size_t comma = std::min(list.find(',', at), list.size());
    const std::string item = list.substr(at, comma - at);
    if (pairs) {
      const std::size_t colon = item.find(':');
      if (colon == std::string::npos) {
        std::fprintf(stderr, "bench: --sizes and --backward-sizes want T:D[,T:D...], got \"%s\"\n", item.c_str());
        return false;
      }
      sizes->push_back({std::atoll(item.substr(0, colon).c_str()), std::atoll(item.substr(colon + 1).c_str())});
    } else {
      opt.block_lengths.push_back(std::atoll(item.c_str()));
    }
    at = comma + 1;
  }
  return true;
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
      opt.backward_sizes.clear();
      if (!parse_list(argv[++a], true, opt, &opt.backward_sizes)) return 2;
    } else if (arg == "--sizes" && a + 1 < argc) {
      opt.core_sizes.clear();
      if (!parse_list(argv[++a], true, opt)) return 2;
    } else if (arg == "--block-lengths" && a + 1 < argc) {
      opt.block_lengths.clear();
      if (!parse_list(argv[++a], false, opt)) return 2;
    } else if (arg == "--q-rows" && a + 1 < argc) {
      opt.q_rows = std::max<std::int64_t>(1, std::atoll(argv[++a]));
    } else if (arg == "--naive-rows" && a + 1 < argc) {
      opt.naive_rows = std::max<std::int64_t>(1, std::atoll(argv[++a]));
    } else if (arg == "--threads" && a + 1 < argc) {
      opt.threads = static_cast<unsigned>(std::atoi(argv[++a]));
    } else if (arg == "--reps" && a + 1 < argc) {
      opt.reps = std::max(1, std::atoi(argv[++a]));
    } else if (arg == "--no-naive") {
      opt.naive = false;
    } else if (arg == "--block-mpfr") {
      opt.block_mpfr = true;
    } else if (arg == "--suites" && a + 1 < argc) {
      const std::string list = argv[++a];
      for (std::size_t at = 0; at < list.size();) {
        const std::size_t comma = std::min(list.find(',', at), list.size());
        opt.suites.push_back(list.substr(at, comma - at));
        at = comma + 1;
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
