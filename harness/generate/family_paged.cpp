// headroom — the paged_decode family: decode queries over a K/V cache in pages.
// Its documentation is its FamilyInfo entry (families.h).
#include <algorithm>
#include <array>
#include <numeric>

#include "headroom/paged_kv.h"
#include "recipe.h"

namespace headroom::generate_internal {
namespace {

// Page sizes, the most common first: 16 (a customary cache block), then 8,
// 4, 32 and an odd 5 so no page boundary falls on a power of two.
constexpr std::array<std::int64_t, 5> kPageSizes{16, 8, 4, 32, 5};
// Layouts, simplest first: pages in order; shuffled in the pool; shuffled with
// the sequences sharing their first full pages (a common prompt prefix);
// that, with two pages in the pool no table names (freed cache blocks).
constexpr int kLayouts = 4;

std::int64_t page_size_of(const Recipe& r) {
  return kPageSizes[static_cast<std::size_t>(std::clamp(r.knobs[0], 0, static_cast<int>(kPageSizes.size()) - 1))];
}

MaskKind paged_mask(Draw& d) {
  return d.pick({MaskKind::causal_bottom_right, MaskKind::causal_bottom_right, MaskKind::none});
}

void paged_sample(Draw& d, int size, Recipe& r) {
  r.shape = sample_core_shape(d, size);
  r.knobs[0] = d.uniform_int(0, static_cast<int>(kPageSizes.size()) - 1);
  r.knobs[1] = d.uniform_int(0, kLayouts - 1);
  const std::int64_t ps = page_size_of(r);
  r.knobs[2] = d.uniform_int(0, static_cast<int>(ps) - 1);
  if (size >= 20) r.shape.batch = d.pick<std::int64_t>({1, 2, 3, 4});
  // The table's capacity Tk: one page, or up to Tk ≤ 64 at the default size.
  const std::int64_t most = std::max<std::int64_t>(1, size_cap(size, 64) / ps);
  r.shape.kv_len = ps * d.pick<std::int64_t>({1, 1, std::min<std::int64_t>(2, most), d.uniform(1, most), d.uniform(1, most)});
  // Decode: one query, or a few speculated tokens verified at once.
  r.shape.q_len = d.pick<std::int64_t>({1, 1, 1, 2, 4, 8});
}

// The page size: the drawn one when it divides Tk (always, as sampled), else
// (a requested shape) the largest divisor of Tk below it.
std::int64_t page_size_for(const Recipe& r) {
  std::int64_t ps = std::min(page_size_of(r), r.shape.kv_len);
  while (r.shape.kv_len % ps != 0) --ps;
  return ps;
}

// Sequence b ends (knob2 + b) mod page size keys before Tk, so across
// sequences and seeds the last page ends on each of its rows; with knob2 ≡ 1
// (mod 3) the last sequence has one key, with knob2 ≡ 2 exactly one page. No
// sequence is shorter than the queries (speculated tokens are in every cache).
std::vector<std::int64_t> lengths(const Recipe& r, std::int64_t ps) {
  const std::int64_t tk = r.shape.kv_len, batch = r.shape.batch;
  std::vector<std::int64_t> lens(static_cast<std::size_t>(batch));
  for (std::int64_t b = 0; b < batch; ++b) lens[static_cast<std::size_t>(b)] = tk - (r.knobs[2] + b) % ps;
  if (batch > 1 && r.knobs[2] % 3 == 1) lens.back() = 1;
  if (batch > 1 && r.knobs[2] % 3 == 2) lens.back() = ps;
  for (std::int64_t& len : lens) len = std::clamp(len, std::min(r.shape.q_len, tk), tk);
  return lens;
}

// The block table: logical pages (b, slot) numbered in order, the shared prefix
// slots of every sequence mapped to sequence 0's, then placed in the pool by
// a permutation (none for layout 0).
PagedKv layout(const Recipe& r, const std::vector<std::int64_t>& lens, std::int64_t ps, std::int64_t shared) {
  const std::int64_t batch = r.shape.batch;
  PagedKv p;
  p.page_size = ps;
  p.max_pages_per_seq = r.shape.kv_len / ps;
  p.block_table.assign(static_cast<std::size_t>(batch * p.max_pages_per_seq), -1);
  std::int32_t next = 0;
  for (std::int64_t b = 0; b < batch; ++b)
    for (std::int64_t s = 0; s < pages_for(lens[static_cast<std::size_t>(b)], ps); ++s)
      p.block_table[static_cast<std::size_t>(b * p.max_pages_per_seq + s)] =
          b > 0 && s < shared ? p.page(0, s) : next++;
  const int kind = std::clamp(r.knobs[1], 0, kLayouts - 1);
  p.num_pages = next + (kind == 3 ? 2 : 0);
  std::vector<std::int32_t> perm(static_cast<std::size_t>(p.num_pages));
  std::iota(perm.begin(), perm.end(), 0);
  if (kind >= 1) {
    const Noise n = r.noise();
    for (std::int64_t k = p.num_pages - 1; k > 0; --k)  // Fisher–Yates
      std::swap(perm[static_cast<std::size_t>(k)], perm[static_cast<std::size_t>(n.index(k + 1, Stream::plan, 11, k))]);
  }
  for (std::int32_t& pg : p.block_table)
    if (pg >= 0) pg = perm[static_cast<std::size_t>(pg)];
  return p;
}

void paged_realize(const Recipe& r, Case& c) {
  const std::int64_t ps = page_size_for(r);
  const std::vector<std::int64_t> lens = lengths(r, ps);
  const std::int64_t shortest = *std::min_element(lens.begin(), lens.end());
  // Shared prefix pages lie wholly inside every sequence (paged_kv.h).
  const std::int64_t shared = r.knobs[1] >= 2 && r.shape.batch > 1 ? (shortest / ps + 1) / 2 : 0;
  PagedKv p = layout(r, lens, ps, shared);
  c.core.mask.kv_lens = lens;
  c.core.scale = softmax_scale(r.shape.key_dim);
  c.core_inputs = gaussian_inputs(r, 1.0);
  // Shared pages hold sequence 0's keys; slots past a sequence's pages hold nothing.
  for (Tensor* t : {&c.core_inputs.k, &c.core_inputs.v})
    for (std::int64_t b = 0; b < r.shape.batch; ++b)
      for (std::int64_t g = 0; g < t->shape[1]; ++g)
        for (std::int64_t j = 0; j < t->shape[2]; ++j)
          for (std::int64_t d = 0; d < t->shape[3]; ++d) {
            const std::int64_t slot = j / ps;
            if (p.page(b, slot) < 0) t->at(b, g, j, d) = 0.0;
            else if (b > 0 && slot < shared) t->at(b, g, j, d) = t->at(0, g, j, d);
          }
  c.core.paged = std::move(p);
}

}  // namespace

std::vector<FamilyImpl> paged_families() {
  return {{.name = "paged_decode", .choose_mask = paged_mask, .sample = paged_sample, .realize = paged_realize}};
}

}  // namespace headroom::generate_internal
