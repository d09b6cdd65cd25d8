// headroom — production-sized shapes drawn at random, for `hunt --max-kv-len`.
//
// The suites list production shapes (suite.h); a search draws them: head dims
// and group sizes from the same tables as the suites' production sections,
// batches to 8, and sequence lengths that are a multiple of a tile as often as
// not, since kernels pad and mask the tail of a sequence that does not fill
// its last tile, and that tail is where an off-by-one lives.
#pragma once

#include <cstdint>
#include <string_view>

#include "headroom/problem.h"

namespace headroom {

/// Tiles a length is aligned to, or not: 8 (vector width), 16 to 128 (key tiles). Common practice.
inline constexpr std::int64_t kTileWidths[] = {8, 16, 32, 64, 128};

/// Returns: a production-sized core shape drawn from `seed`, the same on every machine:
///   (Dk, Dv) one of the suites' head dims (64, 80, 96, 128, 192, 256, 192/128, 128/64);
///   (Hq, Hkv) one of the suites' groups (1, 2, 4, 8, 16 at Hq up to 32); batch 1, 2, 4 or 8;
///   Tk near a length log-uniform in [16, max_kv_len]; Tq 1 (decode) a third of
///   the time, else (a chunk or a prefill) near a length uniform in [1, min(Tk, 256)];
///   each length other than Tq = 1 is, with even odds, a multiple k·t of a tile t
///   from kTileWidths or k·t ± j with j in 1..7 (not a multiple of 8, nor of any tile);
///   batch, then Hq and Hkv together (the group kept), halved while a tensor holds
///   more than 2^22 elements or the scores (B·Hq·Tq·Tk) more than 2^24, then Tq
///   halved (its tiling then not kept) while the scores do. Tk is at most
///   max(max_kv_len, 128) + 7, Tq at most 263.
/// Preconditions: 16 ≤ max_kv_len ≤ 2^17.
CoreShape draw_production_shape(std::uint64_t seed, std::int64_t max_kv_len);

/// Returns: whether case i of a hunt with seed `seed` gets a production shape
/// (even odds, drawn from the seed, independent of the family).
bool draws_production_shape(std::uint64_t seed);

/// Returns: whether `family` is adversarial at any fixed shape: the core
/// families the production sections, `--shape` and hunt's production shapes run.
bool takes_any_shape(std::string_view family);

}  // namespace headroom
