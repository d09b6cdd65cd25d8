// headroom — the varlen_edges family: packed variable-length batches (kernel_abi.h
// version 2, HR_FEATURE_VARLEN). Its documentation is its FamilyInfo entry (families.h).
//
// The recipe's shape reads as the kernel is told it: batch = N sequences (at
// least 2, so a neighbour exists), q_len and kv_len the largest lengths. The
// case itself is packed (varlen.h): batch 1, Tq and Tk the totals.
#include <algorithm>
#include <array>

#include "headroom/varlen.h"
#include "recipe.h"

namespace headroom::generate_internal {
namespace {

// Lengths around the tile widths 16, 32, 64, 128, so packed offsets land on,
// just before and just after tile boundaries.
constexpr std::array<std::int64_t, 12> kTileEdges{15, 16, 17, 31, 32, 33, 63, 64, 65, 127, 128, 129};

enum Pattern : int { uniform, edges, one_long, tile_edges, ragged, kPatterns };

// The pattern and the long sequence's place come from the value seed, which
// shrinking keeps, so every shrink (fewer sequences, shorter maxima) keeps its
// pattern and never grows: each length below is nondecreasing in N, Tq and Tk.
int pattern_of(const Recipe& r) {
  return static_cast<int>(Noise(r.value_seed, 24).index(kPatterns, Stream::plan, 0, 0));
}
std::int64_t long_place(const Recipe& r) { return Noise(r.value_seed, 24).index(8, Stream::plan, 0, 1); }

MaskKind varlen_mask(Draw& d) {
  return d.pick({MaskKind::none, MaskKind::causal_bottom_right, MaskKind::causal_bottom_right,
                 MaskKind::causal_top_left});
}

void varlen_sample(Draw& d, int size, Recipe& r) {
  r.shape = sample_core_shape(d, size);
  // Small sizes (the quick suite's 20) keep the packed totals within 32 keys.
  const bool small = size < 50;
  r.shape.batch = d.uniform(2, small ? 3 : 5);
  // Tile-edge lengths need room up to 129 keys; others stay short.
  const std::int64_t cap = std::max<std::int64_t>(2, size_cap(size, pattern_of(r) == tile_edges && !small ? 130 : 48));
  r.shape.kv_len = d.uniform(1, cap);
  r.shape.q_len = d.pick<std::int64_t>({1, r.shape.kv_len, d.uniform(1, cap)});
}

struct Lengths {
  std::vector<std::int64_t> q, kv;
};

// Per-sequence lengths: at most Tq queries and Tk keys each, at least one
// query and one key in the batch.
Lengths lengths_of_recipe(const Recipe& r) {
  const std::int64_t n = std::max<std::int64_t>(2, r.shape.batch), tq = r.shape.q_len, tk = r.shape.kv_len;
  const Noise noise(r.value_seed, 24);  // raw draws, whatever the value bits
  const int pattern = pattern_of(r);
  const std::int64_t long_one = std::min(long_place(r), n - 1);
  Lengths l;
  for (std::int64_t s = 0; s < n; ++s) {
    std::int64_t q = tq, kv = tk;
    switch (pattern) {
      case edges: {
        // Lengths 0 and 1 on either side, next to full ones: (full), (1, 1),
        // (0 queries), (no keys: fully masked rows), (1 query, all keys), (all queries, 1 key).
        static constexpr std::array<std::array<int, 2>, 6> kCycle{{{2, 2}, {1, 1}, {0, 2}, {2, 0}, {1, 2}, {2, 1}}};
        const auto& c = kCycle[static_cast<std::size_t>(s % 6)];
        q = c[0] == 2 ? tq : std::min<std::int64_t>(c[0], tq);
        kv = c[1] == 2 ? tk : std::min<std::int64_t>(c[1], tk);
        break;
      }
      case one_long:
        if (s != long_one) q = std::min<std::int64_t>(1 + s % 3, tq), kv = std::min<std::int64_t>(1 + (s + 1) % 3, tk);
        break;
      case tile_edges:
        q = std::min(tq, kTileEdges[static_cast<std::size_t>(noise.index(kTileEdges.size(), Stream::plan, s, 1))]);
        kv = std::min(tk, kTileEdges[static_cast<std::size_t>(noise.index(kTileEdges.size(), Stream::plan, s, 2))]);
        break;
      case ragged:  // Tq ≠ Tk per sequence, both ways round
        q = 1 + static_cast<std::int64_t>(noise.unit(Stream::plan, s, 3) * static_cast<double>(tq - 1));
        kv = 1 + static_cast<std::int64_t>(noise.unit(Stream::plan, s, 4) * static_cast<double>(tk - 1));
        break;
      default:
        break;
    }
    l.q.push_back(q);
    l.kv.push_back(kv);
  }
  return l;
}

void varlen_realize(const Recipe& r, Case& c) {
  const Lengths l = lengths_of_recipe(r);
  Recipe packed = r;
  packed.shape.batch = 1;
  packed.shape.q_len = offsets_of(l.q).back();
  packed.shape.kv_len = offsets_of(l.kv).back();
  c.core.shape = packed.shape;
  c.core.scale = softmax_scale(r.shape.key_dim);
  c.core_inputs = gaussian_inputs(packed, 1.0);
  Mask m;
  // Variable lengths replace key padding, and kernel_abi.h defines no dense
  // or bias mask over packed sequences: a request for those gets none.
  const bool causal = r.mask == MaskKind::causal_top_left || r.mask == MaskKind::causal_bottom_right;
  m.kind = causal ? r.mask : MaskKind::none;
  m.cu_q_lens = offsets_of(l.q);
  m.cu_kv_lens = offsets_of(l.kv);
  c.core.mask = std::move(m);
}

}  // namespace

std::vector<FamilyImpl> varlen_families() {
  return {{.name = "varlen_edges", .choose_mask = varlen_mask, .sample = varlen_sample, .realize = varlen_realize}};
}

}  // namespace headroom::generate_internal
