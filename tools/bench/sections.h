// headroom bench — the options every section shares, and the sections.
//
// Each section is one file that prints its own table; bench.cpp parses the
// command line and runs the sections asked for. A new section: a function
// here, a file beside, a flag in bench.cpp.
#pragma once

#include <cstdint>
#include <string>
#include <utility>
#include <vector>

namespace bench {

struct Options {
  std::vector<std::pair<std::int64_t, std::int64_t>> core_sizes;  ///< (T, D)
  std::vector<std::int64_t> block_lengths;                         ///< T of the block rows
  std::vector<std::pair<std::int64_t, std::int64_t>> backward_sizes;  ///< (T, D) of the backward rows
  std::int64_t naive_rows = 8;  ///< query rows the all-MPFR core reference is timed on
  std::int64_t q_rows = 0;      ///< core: only this many query rows (0: T)
  unsigned threads = 1;         ///< for the reference and the plain baselines alike
  int reps = 3;                 ///< best of this many runs (plain, fast)
  bool naive = true;            ///< time the all-MPFR core reference
  bool block_mpfr = false;      ///< time the all-MPFR block too (minutes at T = 128)
  std::vector<std::string> suites;  ///< suites to run end to end (suites_section); empty: none
  std::string suites_kernel;        ///< the kernel they run on; empty: the example plug-in
};

/// Core attention: plain float64 vs certified (fast) vs all-MPFR.
void core_section(const Options& opt);
/// Core backward: plain float64 dQ, dK, dV vs the certified backward (fast).
void backward_section(const Options& opt);
/// Block level (d_model 512, 8 heads of 64): plain float64 block vs certified block.
void block_section(const Options& opt);
/// Suites end to end: `headroom qualify --suite S` on a kernel, isolated and --no-isolation.
void suites_section(const Options& opt);

}  // namespace bench
