// headroom — core attention rows on the multiprecision path, precision raised until certified.
#pragma once

#include <cstdint>
#include <memory>

#include "headroom/reference.h"

namespace headroom::detail {

/// Largest working precision tried before a row is declared uncertified.
inline constexpr long kMaxPrecision = 4096;

/// Recomputes on the multiprecision path the rows (or elements of rows) the
/// fast path could not certify: MpCoreRows at core level, the block level's
/// own on double-double inputs (fast_block.cpp).
class RowRecompute {
 public:
  virtual ~RowRecompute() = default;
  /// Computes row `row` (= (b·Hq + h)·Tq + i) into `ref` — every element when
  /// `want` is null, else those with want[d] != 0, and the lse when `with_lse`.
  /// Returns: whether the computed elements (and lse) met the target.
  virtual bool run(std::int64_t row, CoreReference& ref, const std::uint8_t* want, bool with_lse) = 0;
};

/// Per-worker scratch and driver for multiprecision core rows. Not shareable
/// between threads; one per worker.
class MpCoreRows : public RowRecompute {
 public:
  MpCoreRows(const CoreProblem& p, const CoreInputs& in, const ReferenceOptions& opt);
  ~MpCoreRows() override;
  MpCoreRows(const MpCoreRows&) = delete;
  MpCoreRows& operator=(const MpCoreRows&) = delete;

  /// Computes row `row` (= (b·Hq + h)·Tq + i) into `ref` — every element when
  /// `want` is null, else those with want[d] != 0, and the lse when `with_lse`
  /// — starting from the a-priori precision of mp_row.h and raising it until
  /// the target is met or kMaxPrecision is reached.
  /// Returns: whether the computed elements (and lse) met the target. A row
  /// with no visible key is written as fully masked (NaN) and returns true.
  bool run(std::int64_t row, CoreReference& ref, const std::uint8_t* want, bool with_lse) override;

  /// Returns: the highest precision any row of this worker needed.
  long max_precision_used() const;

 private:
  struct Impl;
  std::unique_ptr<Impl> impl_;
};

/// Writes the fully-masked convention for a row: out, bound, magnitude, lse and
/// lse_bound NaN, fully_masked = 1.
void write_fully_masked(std::int64_t row, CoreReference& ref);

/// Returns: whether `opt` leaves query row `row` out (ReferenceOptions::rows).
inline bool row_left_out(const ReferenceOptions& opt, std::int64_t row) {
  return !opt.rows.empty() && opt.rows[static_cast<std::size_t>(row)] == 0;
}

/// Writes a row left out by ReferenceOptions::rows: out, bound, magnitude, lse
/// and lse_bound NaN, unsampled = 1.
void write_unsampled(std::int64_t row, CoreReference& ref);

}  // namespace headroom::detail
