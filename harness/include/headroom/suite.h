// headroom — the built-in suites: deterministic lists of case requests.
//
// A suite is families × shapes × masks × seeds, the same list on every run and
// machine, so `--shard i/n` slices agree across a CI matrix. Every suite covers
// every family and every mask kind, Tq ≠ Tk under both causal alignments,
// grouped-query shapes (Hq 4 with Hkv 2 and 1), fully masked rows and block-level cases.
//
//   quick     ~60 small cases, for every commit. Every family twice at size 20
//             (Tk ≤ 13), the masks family under each mask kind, ragged causal
//             cases of both alignments, three grouped-query shapes, four
//             tile-edge lengths up to 129, one long sequence (Tk 128), three
//             blocks. Sized to finish with the MPFR reference and a float32
//             kernel in well under 30 s; production shapes are standard's.
//   standard  for nightly runs: every family at ten seeds over sizes 10 to
//             100, wider mask, ragged, grouped-query, tile-edge (all 15
//             lengths), long-sequence and block sections, every family under a
//             forced causal bottom-right mask; and the production sections
//             (suite_shapes.cpp): head dims 64, 80, 96, 128, 192, 256, 192/128,
//             128/64; group sizes 1, 2, 4, 8, 16 at Hq 32 over Hkv 8, 4, 2;
//             batches 2, 4, 8 of different lengths; Tk at and just past every
//             power of two from 256 to 16384, Tq from 192 down to 1 — each
//             under the adversarial families, not only the Gaussian one.
//   deep      for sharded sweeps: every family at forty seeds over sizes 10 to
//             150, every family under every mask kind, tile edges up to 257
//             tokens, long sequences up to ~1000 keys; the production sections
//             with every adversarial family at every head dim and length, Tk to
//             65536.
// Long cases are judged on a deterministic sample of query rows (judge.h).
#pragma once

#include <cstdint>
#include <string>
#include <string_view>
#include <vector>

#include "headroom/generate.h"

namespace headroom {

struct SuiteInfo {
  std::string_view name;
  std::string_view summary;
};

inline constexpr SuiteInfo kSuites[] = {
    {"quick", "small cases covering every family and mask kind; seconds"},
    {"standard", "more seeds and sizes, all tile-edge lengths, production shapes up to Tk 16384"},
    {"deep", "forty seeds per family, every family under every mask, production shapes up to Tk 65536"},
};

/// Returns: the requests of suite `name`, in a fixed order; case names are
/// unique within a suite. Throws: InputError (file "command line", place
/// "--suite") for an unknown name.
std::vector<CaseRequest> suite_requests(std::string_view name);

/// Returns: every adversarial family (the core families that take any fixed
/// shape) at each of `shapes`, `seeds` seeds each, under the family's own
/// mask and under causal bottom-right (decode: every key visible; prefill:
/// the causal mask serving uses), once when they coincide: the requests
/// behind `qualify --shape` and `--shapes`.
std::vector<CaseRequest> shape_requests(const std::vector<CoreShape>& shapes, int seeds = 1);

/// Returns: the requests whose family is one of `families` (all when empty).
/// Throws: InputError (file "command line", place "--family") for a name that
/// is no family, listing the names.
std::vector<CaseRequest> only_families(std::vector<CaseRequest> requests, const std::vector<std::string>& families);

/// Head dims from which coverage lists each pair: the sizes released models use (64 … 256).
inline constexpr std::int64_t kProductionHeadDim = 64;

/// What a list of requests covers, from their outlines (no values made).
struct SuiteCoverage {
  std::size_t cases = 0, block_cases = 0;
  std::int64_t max_kv_len = 0, max_q_len = 0, max_batch = 0;
  std::size_t long_cases = 0;  ///< cases with Tk ≥ 4096
  std::vector<std::string> head_dims;    ///< "64" or "192/128" (Dk/Dv), ascending, both ≥ kProductionHeadDim
  std::size_t small_head_dims = 0;       ///< distinct (Dk, Dv) pairs with a dim below kProductionHeadDim
  std::size_t odd_head_dims = 0;         ///< ... of which a dim is not a multiple of 8
  std::int64_t largest_small_dim = 0;
  std::vector<std::int64_t> group_sizes; ///< Hq / Hkv, ascending
  std::vector<std::string> masks;        ///< mask kinds, in problem.h's order
  std::vector<std::string> families;     ///< in families.h's order
  /// Cases per kernel_abi.h version-2 feature ("window", "softcap", "sinks", "paged_kv"), in families.h's order.
  std::vector<std::pair<std::string, std::size_t>> features;
};

/// Returns: the coverage of `requests`. Throws: InputError as make_case.
SuiteCoverage suite_coverage(const std::vector<CaseRequest>& requests);

/// Returns: the coverage as "label: text" lines, for `headroom suites` and README.
std::vector<std::string> coverage_text(const SuiteCoverage& c);

}  // namespace headroom
