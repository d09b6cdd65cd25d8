// headroom bench — backward rows: the certified backward reference against a plain float64 backward.
//
// For each size (core problem, one batch, one head, Tq = Tk = T, Dk = Dv = D,
// float32-valued N(0, 1) inputs Q, K, V and upstream gradient dO, scale
// 1/sqrt(D), unmasked) it times, in one run and each in its own children:
//   plain   plain_backward (plain.h): vectorised float64 dQ, dK, dV, same
//           instruction set and thread count as the reference
//   fast    reference_backward with the default method (double-double fast
//           path, escalating to MPFR per element where a bound misses 2^-80)
// in turn for --reps rounds (measure.h, interleaved: a slow phase of a shared
// machine falls on both), and prints the worst bound / magnitude of the
// reference, the elements it escalated, and the worst |plain − reference| /
// magnitude (a float64 backward errs by some 1e-16 to 1e-14 of the magnitude:
// a larger figure means one of the two is wrong).
#include <algorithm>
#include <cmath>
#include <cstdio>

#include "gaussian_problem.h"
#include "headroom/reference_backward.h"
#include "measure.h"
#include "plain.h"
#include "sections.h"

namespace bench {
namespace {

using headroom::Tensor;

struct Problem {
  headroom::CoreProblem p;
  headroom::CoreInputs in;
  Tensor d_o;
};

Problem make_problem(std::int64_t t, std::int64_t d, std::uint64_t seed) {
  Problem pr;
  pr.p = one_head_problem(t, t, d);
  GaussianTensors fill(seed);
  pr.in.q = fill({1, 1, t, d});
  pr.in.k = fill({1, 1, t, d});
  pr.in.v = fill({1, 1, t, d});
  pr.d_o = fill({1, 1, t, d});
  return pr;
}

// Worst over the elements of |x − ref| / magnitude (0 where both are 0).
double worst_gap(const std::vector<double>& x, const headroom::GradientReference& g) {
  double worst = 0;
  for (std::size_t e = 0; e < x.size(); ++e) {
    const double gap = std::fabs(x[e] - g.out.values[e]);
    if (gap > 0) worst = std::max(worst, gap / g.magnitude.values[e]);
  }
  return worst;
}

double worst_bound(const headroom::GradientReference& g) {
  double worst = 0;
  for (std::size_t e = 0; e < g.bound.values.size(); ++e)
    if (g.bound.values[e] > 0) worst = std::max(worst, g.bound.values[e] / g.magnitude.values[e]);
  return worst;
}

}  // namespace

void backward_section(const Options& opt) {
  std::printf("core backward (dQ, dK, dV), 1 head, Tq = Tk = T, Dk = Dv = D, float32-valued N(0,1) Q, K, V, dO, "
              "%u thread(s) each, %s\n",
              opt.threads, cpu_clock() ? "CPU seconds of the measuring process" : "wall seconds");
  std::printf("plain = vectorised float64 backward (%s); %d rounds of plain then fast, each in its own child timing "
              "2 runs; best over the rounds\n",
              plain_isa(), opt.reps);
  std::printf("%6s %4s | %10s %10s | %10s | %8s %8s | %10s %5s %9s | %10s\n", "T", "D", "plain s", "fast s",
              "fast/plain", "MiB pl", "MiB fast", "worst b/m", "cert", "escalated", "plain gap");
  for (const auto& [t, d] : opt.backward_sizes) {
    const Problem pr = make_problem(t, d, 42);
    Measure plain, fast;
    interleaved(
        opt.reps,
        [&](int round) {
          std::vector<double> dq, dk, dv;
          Measure m;
          m.seconds = best_of(2, [&] { plain_backward(pr.p, pr.in, pr.d_o, opt.threads, dq, dk, dv); });
          if (round == 0) {  // the gap needs the reference: computed here, outside the timing
            headroom::BackwardOptions bo;
            bo.base.threads = opt.threads;
            const headroom::BackwardReference r = headroom::reference_backward(pr.p, pr.in, pr.d_o, bo);
            m.worst = std::max({worst_gap(dq, r.d_q), worst_gap(dk, r.d_k), worst_gap(dv, r.d_v)});
          }
          return m;
        },
        [&](int) {
          headroom::BackwardOptions bo;
          bo.base.threads = opt.threads;
          headroom::BackwardReference r;
          Measure m;
          m.seconds = best_of(2, [&] { r = headroom::reference_backward(pr.p, pr.in, pr.d_o, bo); });
          m.certified = r.certified ? 1 : 0;
          m.escalated = static_cast<long long>(r.stats.escalated_elements);
          m.worst = std::max({worst_bound(r.d_q), worst_bound(r.d_k), worst_bound(r.d_v)});
          return m;
        },
        plain, fast);
    std::printf("%6lld %4lld | %10.4f %10.4f | %10.2f | %8.1f %8.1f | %10.3g %5s %9lld | %10.3g\n",
                static_cast<long long>(t), static_cast<long long>(d), plain.seconds, fast.seconds,
                fast.seconds / plain.seconds, plain.peak_mib, fast.peak_mib, fast.worst, fast.certified ? "yes" : "NO",
                fast.escalated, plain.worst);
    std::fflush(stdout);
  }
}

}  // namespace bench
