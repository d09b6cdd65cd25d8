// headroom — core attention rows on the multiprecision path (MPFR or cpp_bin_float).
#include "mp_core.h"

#include <algorithm>
#include <cmath>
#include <limits>
#include <vector>

#include "bound_arith.h"
#include "input_check.h"
#include "mp_arith.h"
#include "mp_row.h"

namespace headroom::detail {
namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

// The operands of one core row for mp_row: exact doubles q, K, V of the
// problem (γ' = 0, a = |·|). Ā_j is computed once per row (prepass) and cached.
struct CoreSource {
  const double* q;
  const double* k;  // [Tk, Dk] of the kv head
  const double* v;  // [Tk, Dv]
  std::int64_t dk, dv;
  const double* abs_dot;  // [Tk] Ā_j

  std::int64_t key_dim() const { return dk; }
  std::int64_t value_dim() const { return dv; }
  double gamma_in() const { return 0.0; }
  double abs_dot_up(std::int64_t j) const { return abs_dot[j]; }
  double abs_v(std::int64_t j, std::int64_t d) const { return std::fabs(v[j * dv + d]); }

  template <class Ar>
  void begin_row(const Ar& ar, MpWorkspace<Ar>& ws) const {
    for (std::int64_t c = 0; c < dk; ++c) ar.set_d(ws.q[static_cast<std::size_t>(c)], q[c]);
  }
  template <class Ar>
  void dot(const Ar& ar, MpWorkspace<Ar>& ws, typename Ar::Num& acc, std::int64_t j) const {
    ar.zero(acc);
    const double* kr = k + j * dk;
    for (std::int64_t c = 0; c < dk; ++c) ar.add_prod_d(acc, ws.tmp, ws.q[static_cast<std::size_t>(c)], kr[c]);
  }
  template <class Ar>
  void add_v(const Ar& ar, typename Ar::Num& acc, typename Ar::Num& tmp, const typename Ar::Num& w, std::int64_t j,
             std::int64_t d) const {
    ar.add_prod_d(acc, tmp, w, v[j * dv + d]);
  }
};

}  // namespace

void write_fully_masked(std::int64_t row, CoreReference& ref) {
  const std::int64_t dv = ref.out.shape[3];
  for (std::int64_t d = 0; d < dv; ++d) {
    const auto at = static_cast<std::size_t>(row * dv + d);
    ref.out.values[at] = kNaN;
    ref.bound.values[at] = kNaN;
    ref.magnitude.values[at] = kNaN;
  }
  ref.lse.values[static_cast<std::size_t>(row)] = kNaN;
  ref.lse_bound.values[static_cast<std::size_t>(row)] = kNaN;
  ref.fully_masked[static_cast<std::size_t>(row)] = 1;
}

void write_unsampled(std::int64_t row, CoreReference& ref) {
  write_fully_masked(row, ref);
  ref.fully_masked[static_cast<std::size_t>(row)] = 0;
  ref.unsampled[static_cast<std::size_t>(row)] = 1;
}

struct MpCoreRows::Impl {
  const CoreProblem& p;
  const CoreInputs& in;
  ReferenceOptions opt;
  std::vector<std::int64_t> keys;
  std::vector<double> bias, abs_dot;
  MpWorkspace<MpfrArith> mpfr;
  MpWorkspace<BinFloatArith<128>> bin128;
  MpWorkspace<BinFloatArith<256>> bin256;
  MpWorkspace<BinFloatArith<512>> bin512;
  long max_used = 0;

  Impl(const CoreProblem& problem, const CoreInputs& inputs, const ReferenceOptions& o)
      : p(problem), in(inputs), opt(o), abs_dot(static_cast<std::size_t>(problem.shape.kv_len)) {}

  template <class Ar>
  RowVerdict attempt(const Ar& ar, MpWorkspace<Ar>& ws, const CoreSource& src, const RowSpec& spec, std::int64_t row,
                     CoreReference& ref, const std::uint8_t* want, bool with_lse) {
    const std::int64_t dv = p.shape.value_dim;
    RowOut<typename Ar::Num> o;
    o.out = &ref.out.values[static_cast<std::size_t>(row * dv)];
    o.bound = &ref.bound.values[static_cast<std::size_t>(row * dv)];
    o.magnitude = &ref.magnitude.values[static_cast<std::size_t>(row * dv)];
    if (with_lse) {
      o.lse = &ref.lse.values[static_cast<std::size_t>(row)];
      o.lse_bound = &ref.lse_bound.values[static_cast<std::size_t>(row)];
    }
    o.want = want;
    return mp_row(ar, ws, src, spec, o);
  }
};

MpCoreRows::MpCoreRows(const CoreProblem& p, const CoreInputs& in, const ReferenceOptions& opt)
    : impl_(std::make_unique<Impl>(p, in, opt)) {}
MpCoreRows::~MpCoreRows() = default;
long MpCoreRows::max_precision_used() const { return impl_->max_used; }

bool MpCoreRows::run(std::int64_t row, CoreReference& ref, const std::uint8_t* want, bool with_lse) {
  Impl& m = *impl_;
  const CoreShape& s = m.p.shape;
  const std::int64_t i = row % s.q_len, h = (row / s.q_len) % s.q_heads, b = row / (s.q_len * s.q_heads);
  const std::int64_t g = kv_head_of(s, h), dk = s.key_dim, dv = s.value_dim;
  visible_keys(s, m.p.mask, b, h, i, m.keys, m.bias);
  const auto n = static_cast<std::int64_t>(m.keys.size());
  if (n == 0) {
    write_fully_masked(row, ref);
    return true;
  }
  if (row_left_out(m.opt, row)) {
    write_unsampled(row, ref);
    return true;
  }
  const double* q = &m.in.q.values[static_cast<std::size_t>(m.in.q.offset(b, h, i, 0))];
  const double* k = &m.in.k.values[static_cast<std::size_t>(m.in.k.offset(b, g, 0, 0))];
  const double* v = &m.in.v.values[static_cast<std::size_t>(m.in.v.offset(b, g, 0, 0))];
  const double scale = m.p.scale;

  // Prepass in double: Ā_j (certified upper bounds) and rough scores, which
  // only steer the choice of precision.
  double a_max = 0, z_max = -kInf, z_min = kInf;
  for (std::int64_t idx = 0; idx < n; ++idx) {
    const std::int64_t j = m.keys[static_cast<std::size_t>(idx)];
    double a = 0, z = 0;
    for (std::int64_t c = 0; c < dk; ++c) {
      a += std::fabs(q[c] * k[j * dk + c]);
      z += q[c] * k[j * dk + c];
    }
    a = nonneg_sum_up(a, 2 * dk);
    m.abs_dot[static_cast<std::size_t>(j)] = a;
    const double beta = m.bias.empty() ? 0.0 : m.bias[static_cast<std::size_t>(idx)];
    z = scale * z + beta;
    a_max = std::max(a_max, std::fabs(scale) * a + std::fabs(beta));
    z_max = std::max(z_max, z);
    z_min = std::min(z_min, z);
  }
  if (m.p.has_sinks()) {  // the sink joins the range of exponents
    z_max = std::max<double>(z_max, m.p.sinks[static_cast<std::size_t>(h)]);
    z_min = std::min<double>(z_min, m.p.sinks[static_cast<std::size_t>(h)]);
  }
  const double r = 2.0 * static_cast<double>(dk + 3) * a_max + 2.0 * (z_max - z_min) + 2.0 * static_cast<double>(n) + 8;
  long prec = a_priori_precision(m.opt.target_log2, r, kMaxPrecision);

  const CoreSource src{q, k, v, dk, dv, m.abs_dot.data()};
  RowSpec spec;
  spec.keys = m.keys.data();
  spec.bias = m.bias.empty() ? nullptr : m.bias.data();
  spec.n = n;
  spec.scale = scale;
  spec.softcap = m.p.softcap;
  spec.has_sink = m.p.has_sinks();
  if (spec.has_sink) spec.sink = m.p.sinks[static_cast<std::size_t>(h)];
  spec.target_log2 = m.opt.target_log2;

  if (m.opt.backend == ReferenceBackend::mpfr) {
    for (;;) {
      const RowVerdict verdict = m.attempt(MpfrArith(prec), m.mpfr, src, spec, row, ref, want, with_lse);
      m.max_used = std::max(m.max_used, prec);
      if (verdict.certified) return true;
      if (prec >= kMaxPrecision) return false;
      prec = next_precision(prec, verdict.worst_excess, kMaxPrecision);
    }
  }
  // cpp_bin_float: three fixed precisions, the first one at least as wide as asked.
  if (prec <= 128) {
    m.max_used = std::max(m.max_used, 128L);
    if (m.attempt(BinFloatArith<128>(), m.bin128, src, spec, row, ref, want, with_lse).certified) return true;
  }
  if (prec <= 256) {
    m.max_used = std::max(m.max_used, 256L);
    if (m.attempt(BinFloatArith<256>(), m.bin256, src, spec, row, ref, want, with_lse).certified) return true;
  }
  m.max_used = std::max(m.max_used, 512L);
  return m.attempt(BinFloatArith<512>(), m.bin512, src, spec, row, ref, want, with_lse).certified;
}

}  // namespace headroom::detail
