// headroom bench — the plain float64 baselines: vectorised textbook attention, core and block.
//
// What a careful engineer writes without a certified reference: float64
// throughout, max-shifted softmax, loops laid out so each inner loop runs
// over contiguous memory four doubles at a time. Compiled, like the
// reference's fast path (harness/reference/fast_row_avx2.cpp), for AVX2 + FMA
// when the CPU has both (chosen at run time), for the baseline instruction
// set otherwise; rows split over the same number of threads the reference
// is given.
#pragma once

#include <vector>

#include "headroom/problem.h"

namespace bench {

/// O = softmax(s·Q Kᵀ) V for one batch and head of an unmasked core problem.
void plain_core(const headroom::CoreProblem& p, const headroom::CoreInputs& in, unsigned threads,
                std::vector<double>& out);

/// Y of an unmasked block problem (one batch): projections, attention per
/// head, concatenation, output projection.
void plain_block(const headroom::BlockProblem& p, const headroom::BlockInputs& in, unsigned threads,
                 std::vector<double>& out);

/// dQ, dK, dV of one batch and head of an unmasked core problem for upstream
/// gradient d_o [Tq, Dv] (Dao et al. 2022, Alg. 4, P recomputed from the
/// scores); query rows split over `threads`, each thread summing its own dK,
/// dV, added at the end. Outputs row-major [Tq, Dk], [Tk, Dk], [Tk, Dv].
void plain_backward(const headroom::CoreProblem& p, const headroom::CoreInputs& in, const headroom::Tensor& d_o,
                    unsigned threads, std::vector<double>& d_q, std::vector<double>& d_k, std::vector<double>& d_v);

/// Returns: "avx2+fma" or "baseline", the build the plain loops run.
const char* plain_isa();

}  // namespace bench
