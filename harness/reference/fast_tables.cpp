// headroom — constants of the double-double exp, computed once with MPFR.
//
// Each constant x is evaluated at 320 bits (MPFR rounds correctly, so the
// 320-bit value is within 2^-320 relative) and split hi = RN(x), lo = RN(x −
// hi): |x − hi − lo| ≤ u|x − hi| + 2^-320|x| ≤ u²(1+u)|x| with u = 2^-53, and
// |lo| ≤ u|hi| (normalised). ln2/128 is split three ways (c1, c2, c3), leaving
// ≤ u³(1+u)·ln2/128 < 2^-159·ln2/128.
#include <mpfr.h>

#include "backward_kernels.h"
#include "fast_row.h"

namespace headroom::detail {
namespace {

FastTables build() {
  FastTables t{};
  mpfr_t x, one;
  mpfr_inits2(320, x, one, static_cast<mpfr_ptr>(nullptr));
  auto split = [&](double& hi, double& lo) {
    hi = mpfr_get_d(x, MPFR_RNDN);
    mpfr_sub_d(x, x, hi, MPFR_RNDN);  // exact at 320 bits
    lo = mpfr_get_d(x, MPFR_RNDN);
  };
  for (int i = 0; i < 128; ++i) {
    mpfr_set_si(x, i, MPFR_RNDN);
    mpfr_div_ui(x, x, 128, MPFR_RNDN);
    mpfr_exp2(x, x, MPFR_RNDN);
    split(t.pow2_hi[i], t.pow2_lo[i]);
  }
  mpfr_const_log2(x, MPFR_RNDN);
  mpfr_div_ui(x, x, 128, MPFR_RNDN);
  for (double& c : t.ln2_128) {
    c = mpfr_get_d(x, MPFR_RNDN);
    mpfr_sub_d(x, x, c, MPFR_RNDN);
  }
  mpfr_const_log2(x, MPFR_RNDN);
  mpfr_ui_div(x, 128, x, MPFR_RNDN);
  t.inv_ln2_128 = mpfr_get_d(x, MPFR_RNDN);
  mpfr_set_ui(one, 1, MPFR_RNDN);
  for (int k = 0; k < 10; ++k) {
    mpfr_fac_ui(x, static_cast<unsigned long>(k), MPFR_RNDN);
    mpfr_div(x, one, x, MPFR_RNDN);
    split(t.fact_hi[k], t.fact_lo[k]);
  }
  mpfr_clears(x, one, static_cast<mpfr_ptr>(nullptr));
  return t;
}

}  // namespace

const FastTables& fast_tables() {
  static const FastTables tables = build();
  return tables;
}

const FastKernels& fast_kernels_baseline() {
  static const FastKernels k{&fast_baseline::group, &fast_baseline::weighted, "baseline"};
  return k;
}

const FastKernels& fast_kernels() {
  static const FastKernels k = fast_avx2::available() ? FastKernels{&fast_avx2::group, &fast_avx2::weighted, "avx2+fma"}
                                                      : fast_kernels_baseline();
  return k;
}

const BackwardKernels& backward_kernels_baseline() {
  static const BackwardKernels k{&fast_baseline::backward_dp, &fast_baseline::backward_dq_grid,
                                 &fast_baseline::backward_dq_cascade, &fast_baseline::backward_kv_scatter,
                                 &fast_baseline::backward_renormalise, "baseline"};
  return k;
}

const BackwardKernels& backward_kernels() {
  static const BackwardKernels k =
      fast_avx2::available()
          ? BackwardKernels{&fast_avx2::backward_dp, &fast_avx2::backward_dq_grid, &fast_avx2::backward_dq_cascade,
                            &fast_avx2::backward_kv_scatter, &fast_avx2::backward_renormalise, "avx2+fma"}
          : backward_kernels_baseline();
  return k;
}

}  // namespace headroom::detail
