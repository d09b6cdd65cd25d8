// headroom — the two multiprecision arithmetics the reference can run on.
//
// Both present the same small set of operations to the row algorithm
// (mp_row.h), each with a stated relative error, so one error analysis serves
// both: `unit()` bounds the relative error of + − × ÷ and `unit_fn()` that of
// exp and log.
//
//   MpfrArith      Boost.Multiprecision's mpfr_float as storage, raw MPFR calls
//                  in the loops. MPFR rounds every operation correctly (MPFR
//                  4.2 manual, §4.4 "Rounding": results are correctly rounded
//                  to the target precision), so with round-to-nearest the
//                  relative error of + − × ÷, exp and log is ≤ 2^-p: ½ ulp and
//                  ulp(x) ≤ 2^(1−p)|x|.
//   BinFloatArith  Boost's own cpp_bin_float<B> (an implementation independent
//                  of MPFR), for cross-checks. Its four operations round to
//                  nearest (Boost.Multiprecision documentation, cpp_bin_float —
//                  from memory), but to stay safe the analysis charges a full
//                  ulp, 2^(1−B), per operation, and 2^(12−B) for exp, log and
//                  tanh, which Boost computes by series without a correct-rounding
//                  claim (tests/reference_test.cpp measures it against MPFR).
#pragma once

#include <mpfr.h>

#include <boost/multiprecision/cpp_bin_float.hpp>
#include <boost/multiprecision/mpfr.hpp>
#include <cmath>

#include "bound_arith.h"

namespace headroom::detail {

class MpfrArith {
 public:
  using Num = boost::multiprecision::mpfr_float;

  explicit MpfrArith(long precision) : p_(precision), u_(detail::unit(precision)) {}
  long precision() const { return p_; }
  double unit() const { return u_; }
  double unit_fn() const { return u_; }

  /// Gives x the working precision (its value becomes NaN until set).
  void init(Num& x) const {
    if (mpfr_get_prec(raw(x)) != p_) mpfr_set_prec(raw(x), p_);
  }
  void zero(Num& x) const { mpfr_set_zero(raw(x), 1); }
  /// x = d exactly (p ≥ 53).
  void set_d(Num& x, double d) const { mpfr_set_d(raw(x), d, MPFR_RNDN); }
  void set(Num& x, const Num& a) const { mpfr_set(raw(x), raw(a), MPFR_RNDN); }
  /// acc = RN(acc + RN(a·b)).
  void add_prod_d(Num& acc, Num& tmp, const Num& a, double b) const {
    mpfr_mul_d(raw(tmp), raw(a), b, MPFR_RNDN);
    mpfr_add(raw(acc), raw(acc), raw(tmp), MPFR_RNDN);
  }
  /// acc = RN(acc + RN(a·b)).
  void add_prod(Num& acc, Num& tmp, const Num& a, const Num& b) const {
    mpfr_mul(raw(tmp), raw(a), raw(b), MPFR_RNDN);
    mpfr_add(raw(acc), raw(acc), raw(tmp), MPFR_RNDN);
  }
  void mul_d(Num& x, double b) const { mpfr_mul_d(raw(x), raw(x), b, MPFR_RNDN); }
  void add_d(Num& x, double b) const { mpfr_add_d(raw(x), raw(x), b, MPFR_RNDN); }
  void add(Num& x, const Num& a) const { mpfr_add(raw(x), raw(x), raw(a), MPFR_RNDN); }
  void sub(Num& x, const Num& a) const { mpfr_sub(raw(x), raw(x), raw(a), MPFR_RNDN); }
  void div_d(Num& x, double b) const { mpfr_div_d(raw(x), raw(x), b, MPFR_RNDN); }
  void exp(Num& x) const { mpfr_exp(raw(x), raw(x), MPFR_RNDN); }
  void tanh(Num& x) const { mpfr_tanh(raw(x), raw(x), MPFR_RNDN); }
  void log(Num& x, const Num& a) const { mpfr_log(raw(x), raw(a), MPFR_RNDN); }
  void div(Num& x, const Num& a, const Num& b) const { mpfr_div(raw(x), raw(a), raw(b), MPFR_RNDN); }
  bool less(const Num& a, const Num& b) const { return mpfr_less_p(raw(a), raw(b)) != 0; }
  bool is_zero(const Num& x) const { return mpfr_zero_p(raw(x)) != 0; }
  double nearest(const Num& x) const { return mpfr_get_d(raw(x), MPFR_RNDN); }
  /// Returns: an upper bound of |x| (+inf beyond the double range).
  double abs_up(const Num& x) const { return std::fabs(mpfr_get_d(raw(x), MPFR_RNDA)); }
  /// Returns: an upper bound of a/b (a ≥ 0, b > 0), directed roundings throughout.
  double quotient_up(const Num& a, const Num& b, Num& tmp) const {
    mpfr_div(raw(tmp), raw(a), raw(b), MPFR_RNDU);
    return mpfr_get_d(raw(tmp), MPFR_RNDU);
  }
  /// Returns: a lower bound ≥ 0 of a/b (a ≥ 0, b > 0).
  double quotient_down(const Num& a, const Num& b, Num& tmp) const {
    mpfr_div(raw(tmp), raw(a), raw(b), MPFR_RNDD);
    return mpfr_get_d(raw(tmp), MPFR_RNDD);
  }

  static mpfr_ptr raw(Num& x) { return x.backend().data(); }
  static mpfr_srcptr raw(const Num& x) { return x.backend().data(); }

 private:
  long p_;
  double u_;
};

/// MPFR's exponent range widened to its maximum for the current thread while
/// alive (so exp(t) underflows only below t ≈ −3·10^18), restored afterwards.
class WideExponentRange {
 public:
  WideExponentRange() : emin_(mpfr_get_emin()), emax_(mpfr_get_emax()) {
    mpfr_set_emin(mpfr_get_emin_min());
    mpfr_set_emax(mpfr_get_emax_max());
  }
  ~WideExponentRange() {
    mpfr_set_emin(emin_);
    mpfr_set_emax(emax_);
  }
  WideExponentRange(const WideExponentRange&) = delete;
  WideExponentRange& operator=(const WideExponentRange&) = delete;

 private:
  mpfr_exp_t emin_, emax_;
};

template <unsigned Bits>
class BinFloatArith {
 public:
  using Num = boost::multiprecision::number<
      boost::multiprecision::cpp_bin_float<Bits, boost::multiprecision::digit_base_2>,
      boost::multiprecision::et_off>;

  BinFloatArith() = default;
  long precision() const { return Bits; }
  double unit() const { return std::ldexp(1.0, 1 - static_cast<int>(Bits)); }
  double unit_fn() const { return std::ldexp(1.0, 12 - static_cast<int>(Bits)); }

  void init(Num& x) const { x = 0; }
  void zero(Num& x) const { x = 0; }
  void set_d(Num& x, double d) const { x = d; }
  void set(Num& x, const Num& a) const { x = a; }
  void add_prod_d(Num& acc, Num& tmp, const Num& a, double b) const {
    tmp = a;
    tmp *= b;
    acc += tmp;
  }
  void add_prod(Num& acc, Num& tmp, const Num& a, const Num& b) const {
    tmp = a;
    tmp *= b;
    acc += tmp;
  }
  void mul_d(Num& x, double b) const { x *= b; }
  void add_d(Num& x, double b) const { x += b; }
  void add(Num& x, const Num& a) const { x += a; }
  void sub(Num& x, const Num& a) const { x -= a; }
  void div_d(Num& x, double b) const { x /= b; }
  void exp(Num& x) const { x = boost::multiprecision::exp(x); }
  void tanh(Num& x) const { x = boost::multiprecision::tanh(x); }
  void log(Num& x, const Num& a) const { x = boost::multiprecision::log(a); }
  void div(Num& x, const Num& a, const Num& b) const { x = a / b; }
  bool less(const Num& a, const Num& b) const { return a < b; }
  bool is_zero(const Num& x) const { return x == 0; }
  double nearest(const Num& x) const { return x.template convert_to<double>(); }
  // Conversion to double is not claimed correctly rounded: widen by 4 ulps
  // (relative 2^-50) and one subnormal step.
  double abs_up(const Num& x) const { return widen_up(std::fabs(nearest(x))); }
  double quotient_up(const Num& a, const Num& b, Num& tmp) const {
    tmp = a / b;
    return widen_up(nearest(tmp));
  }
  double quotient_down(const Num& a, const Num& b, Num& tmp) const {
    tmp = a / b;
    return sub_down(mul_down(nearest(tmp), 1.0 - 0x1p-50), 0x1p-1074);
  }

 private:
  static double widen_up(double x) { return add_up(mul_up(x, 1.0 + 0x1p-50), 0x1p-1074); }
};

}  // namespace headroom::detail
