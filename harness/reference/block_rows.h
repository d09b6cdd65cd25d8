// headroom — block attention rows in MPFR on double-double inputs (the fast block's escalation).
#pragma once

#include <cstdint>
#include <vector>

#include "fast_core.h"
#include "mp_arith.h"
#include "mp_core.h"
#include "mp_row.h"

namespace headroom::detail {

/// Past this precision the projections' uncertainty dominates: the caller redoes the batch.
inline constexpr long kMaxBlockRowPrecision = 1024;

/// Core attention rows in MPFR on the block's double-double inputs (held
/// values hi + lo of CoreInputs and WideCoreInputs, bounds a ≥ |exact| per
/// element, |held − exact| ≤ γ'·a): mp_row.h with a BlockSource. The target
/// can be lowered for a row of Y that needs tighter head outputs. One per worker.
class BlockRows final : public RowRecompute {
 public:
  using Num = MpfrArith::Num;
  BlockRows(const CoreProblem& p, const CoreInputs& hi, const WideCoreInputs& wide, const std::vector<double>& aq,
            const std::vector<double>& ak, const std::vector<double>& av, double gamma_in, int target)
      : target_log2(target), p_(p), hi_(hi), wide_(wide), aq_(aq), ak_(ak), av_(av), gin_(gamma_in) {}

  int target_log2;  // the row target, lowered by the caller for a row of Y that needs it
  std::int64_t elements = 0;
  long max_precision = 0;

  /// Computes the row on the double-double inputs at a precision raised until
  /// its target is met or kMaxBlockRowPrecision is reached; each computed element
  /// also gets its low part (wide.out_lo) and the 2^-105|hi| + 2^-1074 that
  /// taking it back as a double-double costs, in its bound.
  bool run(std::int64_t row, CoreReference& ref, const std::uint8_t* want, bool with_lse) override;

 private:
  static void load(const MpfrArith& ar, std::vector<Num>& dst, std::size_t at, std::int64_t cols, std::int64_t rows,
                   const std::vector<std::int64_t>* keys, const Tensor& hi, const Tensor& lo);

  const CoreProblem& p_;
  const CoreInputs& hi_;
  const WideCoreInputs& wide_;
  const std::vector<double>&aq_, &ak_, &av_;
  double gin_;
  MpWorkspace<MpfrArith> ws_;
  std::vector<Num> q_, k_, v_, keep_;
  std::vector<std::int64_t> keys_;
  std::vector<double> bias_, abs_dot_;
};

}  // namespace headroom::detail
