// headroom — paged K/V layouts: validation, scatter and gather (paged_kv.h).
#include "headroom/paged_kv.h"

#include <algorithm>
#include <array>
#include <cstring>
#include <set>

#include "headroom/problem.h"

namespace headroom {

std::vector<int> PagedKv::sharers() const {
  std::vector<int> n(static_cast<std::size_t>(num_pages > 0 ? num_pages : 0), 0);
  const std::int64_t batch = max_pages_per_seq > 0 ? static_cast<std::int64_t>(block_table.size()) / max_pages_per_seq : 0;
  for (std::int64_t b = 0; b < batch; ++b) {
    std::set<std::int32_t> own;
    for (std::int64_t s = 0; s < max_pages_per_seq; ++s) {
      const std::int32_t pg = page(b, s);
      if (pg >= 0 && pg < num_pages && own.insert(pg).second) ++n[static_cast<std::size_t>(pg)];
    }
  }
  return n;
}

std::vector<ProblemError> paged_findings(const PagedKv& p, std::int64_t batch, std::int64_t kv_len,
                                         const std::vector<std::int64_t>& kv_lens) {
  std::vector<ProblemError> out;
  auto add = [&](const std::string& field, const std::string& expected, const std::string& found) {
    out.push_back({field, expected, found});
  };
  if (p.page_size < 1) add("paged.page_size", "a key count >= 1", std::to_string(p.page_size));
  if (p.num_pages < 1 || p.num_pages > (std::int64_t{1} << 31) - 1)
    add("paged.num_pages", "a page count in [1, 2^31 - 1]", std::to_string(p.num_pages));
  if (p.max_pages_per_seq < 1) add("paged.max_pages_per_seq", "a slot count >= 1", std::to_string(p.max_pages_per_seq));
  if (!out.empty()) return out;
  if (kv_len != p.max_pages_per_seq * p.page_size)
    add("shape.kv_len", "max_pages_per_seq * page_size = " + std::to_string(p.max_pages_per_seq * p.page_size),
        std::to_string(kv_len));
  if (p.block_table.size() != static_cast<std::size_t>(batch * p.max_pages_per_seq))
    add("paged.block_table", std::to_string(batch * p.max_pages_per_seq) + " entries (batch x max_pages_per_seq)",
        std::to_string(p.block_table.size()));
  if (kv_lens.size() != static_cast<std::size_t>(batch))
    add("paged.seq_lens", std::to_string(batch) + " lengths (one per sequence)", std::to_string(kv_lens.size()));
  if (!out.empty()) return out;
  for (std::int64_t b = 0; b < batch; ++b) {
    const std::string at = "[" + std::to_string(b) + "]";
    const std::int64_t len = kv_lens[static_cast<std::size_t>(b)];
    if (len < 1 || len > kv_len) {
      add("paged.seq_lens" + at, "a length in [1, " + std::to_string(kv_len) + "]", std::to_string(len));
      continue;
    }
    const std::int64_t used = pages_for(len, p.page_size);
    std::set<std::int32_t> seen;
    for (std::int64_t s = 0; s < p.max_pages_per_seq; ++s) {
      const std::int32_t pg = p.page(b, s);
      const std::string field = "paged.block_table" + at + "[" + std::to_string(s) + "]";
      if (s >= used) {
        if (pg != -1) add(field, "-1 (past the sequence's " + std::to_string(used) + " pages)", std::to_string(pg));
      } else if (pg < 0 || pg >= p.num_pages) {
        add(field, "a page in [0, " + std::to_string(p.num_pages - 1) + "]", std::to_string(pg));
      } else if (!seen.insert(pg).second) {
        add(field, "a page not already in the sequence's table", std::to_string(pg));
      }
    }
  }
  if (!out.empty()) return out;
  // A page shared between sequences must be full in each: rows past one
  // sequence's length would be visible keys of the other, and a detector
  // poisoning them for the first would change the second legitimately.
  const std::vector<int> n = p.sharers();
  for (std::int64_t b = 0; b < batch; ++b) {
    const std::int64_t len = kv_lens[static_cast<std::size_t>(b)];
    for (std::int64_t s = 0; s < pages_for(len, p.page_size); ++s) {
      const std::int32_t pg = p.page(b, s);
      if (n[static_cast<std::size_t>(pg)] > 1 && (s + 1) * p.page_size > len)
        add("paged.block_table[" + std::to_string(b) + "][" + std::to_string(s) + "]",
            "a page shared with another sequence to lie wholly within sequence " + std::to_string(b) + "'s " +
                std::to_string(len) + " keys",
            "page " + std::to_string(pg) + " partly past it");
    }
  }
  return out;
}

std::string shared_page_conflict(const PagedKv& p, const Tensor& logical) {
  const std::int64_t batch = logical.shape[0], heads = logical.shape[1], dim = logical.shape[3];
  std::vector<std::array<std::int64_t, 2>> owner(static_cast<std::size_t>(p.num_pages), {-1, -1});
  for (std::int64_t b = 0; b < batch; ++b)
    for (std::int64_t s = 0; s < p.max_pages_per_seq; ++s) {
      const std::int32_t pg = p.page(b, s);
      if (pg < 0) continue;
      auto& first = owner[static_cast<std::size_t>(pg)];
      if (first[0] < 0) {
        first = {b, s};
        continue;
      }
      for (std::int64_t r = 0; r < p.page_size; ++r)
        for (std::int64_t h = 0; h < heads; ++h)
          for (std::int64_t d = 0; d < dim; ++d) {
            const double x = logical.at(first[0], h, first[1] * p.page_size + r, d);
            const double y = logical.at(b, h, s * p.page_size + r, d);
            if (std::memcmp(&x, &y, sizeof x) != 0)
              return "page " + std::to_string(pg) + " row " + std::to_string(r) + " holds different values for sequences " +
                     std::to_string(first[0]) + " and " + std::to_string(b) + " (head " + std::to_string(h) +
                     ", dim " + std::to_string(d) + ")";
          }
    }
  return {};
}

namespace {

// Calls f(page, row, b, t) for every row of a mapped page, t being that row's
// logical token; scatter and gather are the two directions of this one walk.
template <class F>
void for_each_mapped_row(const PagedKv& p, std::int64_t batch, F f) {
  for (std::int64_t b = 0; b < batch; ++b)
    for (std::int64_t s = 0; s < p.max_pages_per_seq; ++s) {
      const std::int32_t pg = p.page(b, s);
      if (pg < 0) continue;
      for (std::int64_t r = 0; r < p.page_size; ++r) f(pg, r, b, s * p.page_size + r);
    }
}

}  // namespace

Tensor scatter_pages(const PagedKv& p, const Tensor& logical, double fill) {
  const std::int64_t heads = logical.shape[1], dim = logical.shape[3];
  Tensor pages({p.num_pages, p.page_size, heads, dim});
  std::fill(pages.values.begin(), pages.values.end(), fill);
  for_each_mapped_row(p, logical.shape[0], [&](std::int64_t pg, std::int64_t r, std::int64_t b, std::int64_t t) {
    for (std::int64_t h = 0; h < heads; ++h)
      for (std::int64_t d = 0; d < dim; ++d) pages.at(pg, r, h, d) = logical.at(b, h, t, d);
  });
  return pages;
}

Tensor gather_pages(const PagedKv& p, const Tensor& pages, std::int64_t batch) {
  const std::int64_t heads = pages.shape[2], dim = pages.shape[3];
  Tensor logical({batch, heads, p.max_pages_per_seq * p.page_size, dim});
  for_each_mapped_row(p, batch, [&](std::int64_t pg, std::int64_t r, std::int64_t b, std::int64_t t) {
    for (std::int64_t h = 0; h < heads; ++h)
      for (std::int64_t d = 0; d < dim; ++d) logical.at(b, h, t, d) = pages.at(pg, r, h, d);
  });
  return logical;
}

}  // namespace headroom
