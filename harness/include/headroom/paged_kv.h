// headroom — a key/value cache in pages: where each logical key of a sequence lives.
//
// A paged cache (kernel_abi.h version 2, HR_FEATURE_PAGED_KV) keeps K and V as
// pages [P, page_size, Hkv, D]; sequence b's logical key t lives in page
// block_table[b][t / page_size], row t % page_size. The problem model keeps the
// *logical* view, K and V [B, Hkv, Tk, D] with Tk = max_pages_per_seq ·
// page_size (what the reference and the detectors read), and this layout;
// pages are made from the logical view (scatter_pages) where a kernel or a
// case folder needs them, and the logical view from pages (gather_pages) when
// a case folder is read. Keys at or past a sequence's length (Mask::kv_lens)
// are invisible, so what the rows past the length in its last page hold never
// changes the exact answer.
#pragma once

#include <cstdint>
#include <string>
#include <vector>

#include "headroom/tensor.h"

namespace headroom {

struct PagedKv {
  std::int64_t page_size = 0;          ///< keys per page; 0: the case is not paged
  std::int64_t num_pages = 0;          ///< P, pages in the pool (some may be in no table)
  std::int64_t max_pages_per_seq = 0;  ///< columns of the block table
  /// [B · max_pages_per_seq], row-major: the page of each slot; −1 for the
  /// slots past a sequence's last page.
  std::vector<std::int32_t> block_table;

  /// Returns: whether the case is paged.
  bool active() const { return page_size > 0; }
  /// Returns: the page of slot `slot` of sequence `b` (−1 when unused).
  std::int32_t page(std::int64_t b, std::int64_t slot) const {
    return block_table[static_cast<std::size_t>(b * max_pages_per_seq + slot)];
  }
  /// Returns: how many sequences' tables name each page, [P].
  std::vector<int> sharers() const;
  bool operator==(const PagedKv&) const = default;
};

/// Returns: the page counts a sequence of `len` keys needs: ceil(len / page_size).
inline std::int64_t pages_for(std::int64_t len, std::int64_t page_size) { return (len + page_size - 1) / page_size; }

// Validation of a layout against a shape: paged_findings in problem.h.

/// Returns: the first place where two slots naming the same page disagree on
/// the logical values they hold in `logical` [B, H, Tk, D], as a text, or
/// empty when every shared page holds one content. Preconditions: paged_findings empty.
std::string shared_page_conflict(const PagedKv& p, const Tensor& logical);

/// Returns: the pages [P, page_size, H, D] holding `logical` [B, H, Tk, D];
/// rows of pages in no table are `fill`. Preconditions: paged_findings empty,
/// shared_page_conflict empty.
Tensor scatter_pages(const PagedKv& p, const Tensor& logical, double fill = 0.0);

/// Returns: the logical view [B, H, max_pages_per_seq · page_size, D] of
/// `pages` [P, page_size, H, D]; slots −1 read as zeros. Preconditions:
/// paged_findings empty for `batch`.
Tensor gather_pages(const PagedKv& p, const Tensor& pages, std::int64_t batch);

}  // namespace headroom
