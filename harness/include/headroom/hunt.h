// headroom — property-based search for a failing case, and shrinking it.
//
// `hunt` generates N cases across the generator families of the kernel's level
// (family i mod F, seed S + i, size growing from small to the default, as
// RapidCheck ramps its size), judges each — with a size knob (max_kv_len),
// half the cases of the families that take any shape get a production-sized
// shape instead (shape_draw.h: head dims 64-256, groups to 16, batches to 8,
// lengths tile multiples as often as not, Tk up to the knob) — and for each failure walks
// RapidCheck's shrink tree (generate.h) greedily: the first shrink that still
// fails *the same way* is taken, until none does or the step limit is reached.
// "The same way" means the same first fault class, or — for a failure of the
// budget alone — any budget failure with no fault. The smallest failing case
// is saved as a case folder with its family, seed and shrink path.
#pragma once

#include <cstdint>
#include <filesystem>
#include <string>
#include <vector>

#include "headroom/qualify.h"

namespace headroom {

/// The range of HuntOptions::max_kv_len when not 0, the lengths the
/// production-shape draw spans (draw_production_shape: Tk from 16 up).
inline constexpr std::int64_t kMinHuntKvLen = 16;
inline constexpr std::int64_t kMaxHuntKvLen = std::int64_t{1} << 17;

struct HuntOptions {
  RunnerOptions runner;                ///< judging, budget, shard, journal; its save_failures is unused
  int cases = 100;
  std::uint64_t seed = 1;
  std::vector<std::string> families;   ///< empty: every family of the kernel's level
  std::filesystem::path save;          ///< folder for shrunk failing cases (empty: not saved)
  int max_shrink_steps = 200;          ///< judged shrinks per failure, at most
  /// > 0: a core case of a family that takes any shape gets, with even odds, a
  /// production shape with Tk up to this (draw_production_shape); 0: small shapes only.
  std::int64_t max_kv_len = 0;
};

struct HuntFinding {
  std::string original;                ///< the case as first found failing
  std::string shrunk;                  ///< the smallest case still failing the same way
  std::string signature;               ///< e.g. "fault:mask_leak" or "budget"
  int shrink_steps = 0;                ///< shrinks judged
  std::filesystem::path saved;         ///< its folder, when saved
};

struct HuntResult {
  RunRecord record;                    ///< one case per generated case; failures replaced by their shrunk case
  std::vector<HuntFinding> findings;
};

/// Returns: the failure signature of a judged case: "fault:<first class>",
/// "budget" when only a budget limit is exceeded, or "" when it passed.
std::string failure_signature(const CaseRecord& r);

/// Returns: the requests of a hunt, before sharding: family i mod F, seed S + i,
/// size from 10 up to kDefaultSize; with opt.max_kv_len, the production shapes
/// above as the request's fixed shape (so `case make --shape` recreates the case).
/// Throws: InputError (place "--max-kv-len") for a knob outside [16, 2^17].
std::vector<CaseRequest> hunt_requests(const HuntOptions& opt, Level level);

/// Returns: the hunt's result on kernel `k`.
HuntResult hunt(AttachedKernel& k, const HuntOptions& opt);

}  // namespace headroom
