// headroom — the built-in suites (suite.h): families × shapes × masks × seeds.
#include "headroom/suite.h"

#include <string>

#include "headroom/families.h"
#include "headroom/input_error.h"
#include "suite_builder.h"

namespace headroom {
namespace {

constexpr MaskKind kAllMasks[] = {MaskKind::none,        MaskKind::causal_top_left, MaskKind::causal_bottom_right,
                                  MaskKind::key_padding, MaskKind::dense,           MaskKind::bias};

// Sections draw seeds from disjoint ranges so no two requests of a suite can
// produce the same case.
using Builder = generate_internal::SuiteBuilder;
using generate_internal::shape;

// Every family at `seeds` seeds, sizes cycling through `sizes`.
void every_family(Builder& b, std::uint64_t base, int seeds, std::initializer_list<int> sizes) {
  for (const FamilyInfo& f : kFamilies)
    for (int s = 0; s < seeds; ++s)
      b.add(f.name, base + static_cast<std::uint64_t>(s), sizes.begin()[static_cast<std::size_t>(s) % sizes.size()]);
}

// Tq ≠ Tk both ways under both causal alignments: bottom-right with Tq > Tk
// leaves leading rows fully masked; top-left with Tq < Tk never shows trailing keys.
void ragged_causal(Builder& b, std::uint64_t base, int seeds) {
  for (int s = 0; s < seeds; ++s)
    for (MaskKind m : {MaskKind::causal_top_left, MaskKind::causal_bottom_right}) {
      const std::uint64_t seed = base + static_cast<std::uint64_t>(s);
      b.add("ragged", seed, 30, shape(1, 2, 1, 12, 7, 16, 16), m);
      b.add("ragged", seed, 30, shape(1, 2, 2, 5, 19, 16, 8), m);
    }
}

// Blocks that a module with one head dim for Q, K and V and no shared key/value
// heads can take (Hkv = Hq, Dk = Dv, Dm = Hq·Dk: torch.nn.MultiheadAttention's
// constraints), led by the base model of Vaswani et al. 2017 (Table 3: d_model
// 512, h 8, d_k = d_v 64). Model dim defaults to Hq·Dk (generate.h).
void full_head_blocks(Builder& b, std::uint64_t base, int seeds) {
  for (int s = 0; s < seeds; ++s) {
    const std::uint64_t seed = base + 10 * static_cast<std::uint64_t>(s);
    b.add("block_gaussian", seed, 20, shape(1, 8, 8, 16 + s, 16, 64, 64));
    b.add("block_gaussian", seed + 1, 20, shape(2, 2, 2, 6, 9, 4, 4), MaskKind::key_padding);
    b.add("block_gaussian", seed + 2, 20, shape(1, 4, 4, 7, 5, 8, 8), MaskKind::causal_bottom_right);
  }
}

// Packed variable-length batches at serving shapes: the batch is the number
// of sequences, Tq and Tk the largest lengths (family_varlen.cpp); the seed
// picks the length pattern (one long sequence among short ones, tile edges, ...).
void varlen_production(Builder& b, std::uint64_t base, int seeds) {
  for (int s = 0; s < seeds; ++s) {
    const std::uint64_t seed = base + 10 * static_cast<std::uint64_t>(s);
    b.add("varlen_edges", seed, 100, shape(8, 8, 2, 64, 600, 128, 128), MaskKind::causal_bottom_right);
    b.add("varlen_edges", seed + 1, 100, shape(4, 8, 1, 32, 2049, 64, 64), MaskKind::causal_bottom_right);
    b.add("varlen_edges", seed + 2, 100, shape(8, 4, 4, 16, 257, 256, 256), MaskKind::none);
  }
}

// The backward's cases (docs/backward.md): rows where D_i cancels against dP
// under every mask kind, with 8 query heads per kv head (dK and dV sum over
// 8), and long rows up to `long_tk` keys, still judged on every row
// (B·Hq·Tq·Tk ≤ kJudgedKeyRows, judge.h) so their gradients are judged too.
void gradient_section(Builder& b, std::uint64_t base, int seeds, std::int64_t long_tk) {
  for (int s = 0; s < seeds; ++s)
    for (std::size_t m = 0; m < std::size(kAllMasks); ++m)
      b.add("gradient_cancellation", base + 10 * static_cast<std::uint64_t>(s) + m, 50,
            shape(1, 8, 1, 16, 40 + 8 * s, 32, 32), kAllMasks[m]);
  std::uint64_t seed = base + 900;
  for (std::int64_t tk = 1025; tk <= long_tk; tk = 2 * tk - 1) {
    b.add("gradient_cancellation", seed++, 100, shape(1, 8, 1, tk > 8193 ? 4 : 8, tk, 64, 64),
          MaskKind::causal_bottom_right);
    b.add("gradient_cancellation", seed++, 100, shape(1, 8, 2, 4, tk - 1, 128, 128), MaskKind::key_padding);
  }
}

std::vector<CaseRequest> quick() {
  Builder b;
  every_family(b, 1, 2, {20});
  for (MaskKind m : kAllMasks) b.add("masks", 101, 20, std::nullopt, m);
  ragged_causal(b, 201, 1);
  b.add("gaussian", 301, 20, shape(2, 4, 2, 16, 16, 16, 16));
  b.add("gaussian", 302, 20, shape(1, 4, 1, 8, 24, 32, 32), MaskKind::causal_bottom_right);
  b.add("large_logits", 303, 20, shape(1, 4, 2, 8, 8, 16, 16), MaskKind::causal_top_left);
  for (std::int64_t tk : {63, 65, 127, 129})
    b.add("tile_edges", 401, 100, shape(1, 1, 1, tk < 100 ? 17 : 15, tk, 17, 15));
  b.add("long_sequence", 501, 0);
  b.add("block_gaussian", 601, 20, shape(1, 4, 2, 8, 8, 8, 8));
  full_head_blocks(b, 901, 1);
  return b.take();
}

std::vector<CaseRequest> standard() {
  Builder b;
  every_family(b, 1, 10, {10, 30, 50, 70, 100});
  for (MaskKind m : kAllMasks)
    for (std::uint64_t s = 0; s < 4; ++s) b.add("masks", 101 + s, 30, std::nullopt, m);
  ragged_causal(b, 201, 3);
  std::uint64_t seed = 301;
  for (auto [hq, hkv] : {std::pair{4, 2}, {4, 1}, {2, 1}, {8, 2}})
    for (MaskKind m : {MaskKind::none, MaskKind::causal_top_left, MaskKind::causal_bottom_right, MaskKind::key_padding})
      b.add("gaussian", seed++, 30, shape(1, hq, hkv, 12, 20, 16, 16), m);
  for (std::int64_t tk : {1, 15, 16, 17, 31, 32, 33, 63, 64, 65, 127, 128, 129, 255, 257})
    for (std::int64_t tq : {1, 17}) b.add("tile_edges", 401, 100, shape(1, 1, 1, tq, tk, 33, 17));
  for (std::uint64_t s = 0; s < 5; ++s) b.add("long_sequence", 501 + s, static_cast<int>(s * 10));
  for (std::uint64_t s = 0; s < 5; ++s) {
    b.add("block_gaussian", 601 + s, 30, shape(1, 4, 2, 8, 12, 8, 8), MaskKind::causal_bottom_right);
    b.add("block_gaussian", 611 + s, 30, shape(2, 2, 1, 10, 10, 6, 5), std::nullopt, 17);
  }
  for (const FamilyInfo& f : kFamilies) b.add(f.name, 701, 30, std::nullopt, MaskKind::causal_bottom_right);
  full_head_blocks(b, 901, 4);
  varlen_production(b, 1701, 1);
  gradient_section(b, 1801, 1, 4097);
  generate_internal::production_sections(b, generate_internal::Depth::standard, 1001);
  return b.take();
}

std::vector<CaseRequest> deep() {
  Builder b;
  every_family(b, 1, 40, {10, 30, 50, 70, 100, 150});
  for (MaskKind m : kAllMasks)
    for (std::uint64_t s = 0; s < 16; ++s) b.add("masks", 101 + s, 50, std::nullopt, m);
  ragged_causal(b, 201, 10);
  std::uint64_t seed = 301;
  for (auto [hq, hkv] : {std::pair{4, 2}, {4, 1}, {2, 1}, {8, 2}})
    for (MaskKind m : {MaskKind::none, MaskKind::causal_top_left, MaskKind::causal_bottom_right, MaskKind::key_padding})
      for (int s = 0; s < 4; ++s) b.add("gaussian", seed++, 50, shape(1, hq, hkv, 12 + 4 * s, 20 + 8 * s, 16, 16), m);
  for (std::int64_t tk : {1, 15, 16, 17, 31, 32, 33, 63, 64, 65, 127, 128, 129, 255, 257})
    for (std::int64_t tq : {1, 17, 33, 65}) b.add("tile_edges", 401, 100, shape(1, 1, 1, tq, tk, 65, 33));
  for (std::uint64_t s = 0; s < 20; ++s) b.add("long_sequence", 501 + s, static_cast<int>(s * 5));
  for (std::uint64_t s = 0; s < 20; ++s) {
    b.add("block_gaussian", 601 + s, 50, shape(1, 4, 2, 8, 12, 8, 8), MaskKind::causal_bottom_right);
    b.add("block_gaussian", 701 + s, 50, shape(2, 2, 1, 10, 10, 6, 5), std::nullopt, 17);
  }
  for (const FamilyInfo& f : kFamilies)
    for (MaskKind m : kAllMasks) b.add(f.name, 801, 30, std::nullopt, m);
  full_head_blocks(b, 901, 8);
  varlen_production(b, 2701, 4);
  gradient_section(b, 2801, 4, 16385);
  generate_internal::production_sections(b, generate_internal::Depth::deep, 2001);
  return b.take();
}

}  // namespace

std::vector<CaseRequest> suite_requests(std::string_view name) {
  if (name == "quick") return quick();
  if (name == "standard") return standard();
  if (name == "deep") return deep();
  throw InputError("command line", "--suite", "unknown suite \"" + std::string(name) + "\"",
                   "use quick, standard or deep");
}

}  // namespace headroom
