// headroom — the built-in suites: deterministic lists of case requests.
//
// A suite is families × shapes × masks × seeds, the same list on every run and
// machine, so `--shard i/n` slices agree across a CI matrix. Every suite covers
// every family and every mask kind, Tq ≠ Tk under both causal alignments,
// grouped-query shapes (Hq 4 with Hkv 2 and 1), fully masked rows and block-level cases.
//
//   quick     ~55 small cases, for every commit. Every family twice at size 20
//             (Tk ≤ 13), the masks family under each mask kind, ragged causal
//             cases of both alignments, three grouped-query shapes, four
//             tile-edge lengths up to 129, one long sequence (Tk 128), three
//             blocks. Sized to finish with the MPFR reference and a float32
//             kernel in well under 30 s.
//   standard  ~5× quick, for nightly runs: every family at ten seeds over sizes
//             10 to 100, plus wider mask, ragged, grouped-query, tile-edge
//             (all 15 lengths), long-sequence and block sections, and every
//             family under a forced causal bottom-right mask.
//   deep      ~20× quick, for sharded sweeps: every family at forty seeds over
//             sizes 10 to 150, every family under every mask kind, tile edges
//             up to 257 tokens, long sequences up to ~1000 keys.
#pragma once

#include <string_view>
#include <vector>

#include "headroom/generate.h"

namespace headroom {

struct SuiteInfo {
  std::string_view name;
  std::string_view summary;
};

inline constexpr SuiteInfo kSuites[] = {
    {"quick", "~55 small cases covering every family and mask kind; seconds"},
    {"standard", "~5x quick: more seeds, sizes up to 100, all tile-edge lengths"},
    {"deep", "~20x quick: forty seeds per family, every family under every mask, long sequences"},
};

/// Returns: the requests of suite `name`, in a fixed order; case names are
/// unique within a suite. Throws: InputError (file "command line", place
/// "--suite") for an unknown name.
std::vector<CaseRequest> suite_requests(std::string_view name);

}  // namespace headroom
