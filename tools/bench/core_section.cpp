// headroom bench — core rows: the certified reference against the vectorised float64 baseline and all-MPFR.
//
// For each size (core problem, one batch, one head, Tq = Tk = T, Dk = Dv = D,
// float32-valued Gaussian inputs, scale 1/sqrt(D)) it times, in one run:
//   plain   plain_core (plain.h): vectorised float64 attention, same
//           instruction set and thread count as the reference
//   fast    reference_core with the default method (double-double fast path,
//           escalating to MPFR only where a bound misses the target)
//   naive   reference_core with method multiprecision (every row on MPFR);
//           timed on the first R query rows and scaled by T/R (rows of an
//           unmasked problem cost the same), and said so
#include <algorithm>
#include <cmath>
#include <cstdio>

#include "gaussian_problem.h"
#include "headroom/reference.h"
#include "measure.h"
#include "plain.h"
#include "sections.h"

namespace bench {
namespace {

using headroom::Tensor;

struct Problem {
  headroom::CoreProblem p;
  headroom::CoreInputs in;
};

Problem make_problem(std::int64_t tq, std::int64_t t, std::int64_t d, std::uint64_t seed) {
  Problem pr;
  pr.p = one_head_problem(tq, t, d);
  GaussianTensors fill(seed);
  pr.in.k = fill({1, 1, t, d});
  pr.in.v = fill({1, 1, t, d});
  pr.in.q = fill({1, 1, tq, d});
  return pr;
}

Measure run_reference(const Problem& pr, headroom::ReferenceMethod method, unsigned threads, int reps) {
  headroom::ReferenceOptions opt;
  opt.method = method;
  opt.threads = threads;
  headroom::CoreReference r;
  Measure m;
  m.seconds = best_of(reps, [&] { r = headroom::reference_core(pr.p, pr.in, opt); });
  m.certified = r.certified ? 1 : 0;
  m.escalated = static_cast<long long>(r.stats.escalated_elements);
  for (std::size_t e = 0; e < r.bound.values.size(); ++e)
    m.worst = std::max(m.worst, r.bound.values[e] / r.magnitude.values[e]);
  return m;
}

}  // namespace

void core_section(const Options& opt) {
  std::printf("core attention, 1 head, Tq = Tk = T, Dk = Dv = D, float32-valued N(0,1) inputs, %u thread(s) each, %s\n",
              opt.threads, cpu_clock() ? "CPU seconds of the measuring process" : "wall seconds");
  std::printf("plain = vectorised float64 (%s); plain and fast: best of %d runs; ", plain_isa(), opt.reps);
  std::printf("naive = all-MPFR reference (method multiprecision) timed on the first %lld query rows, scaled by T/rows\n",
              static_cast<long long>(opt.naive_rows));
  if (opt.q_rows > 0) std::printf("only the first %lld query rows (Tq = min(Q, T))\n", static_cast<long long>(opt.q_rows));
  std::printf("%6s %4s | %10s %10s %12s | %10s %10s | %8s %8s %8s | %10s %5s %9s\n", "T", "D", "plain s", "fast s",
              "naive s", "fast/plain", "naive/fast", "MiB pl", "MiB fast", "MiB nv", "worst b/m", "cert", "escalated");
  for (const auto& [t, d] : opt.core_sizes) {
    const std::int64_t tq = opt.q_rows > 0 ? std::min(opt.q_rows, t) : t;
    const Problem pr = make_problem(tq, t, d, 42);
    const Measure plain = in_child([&] {
      std::vector<double> out;
      Measure m;
      m.seconds = best_of(opt.reps, [&] { plain_core(pr.p, pr.in, opt.threads, out); });
      return m;
    });
    const Measure fast =
        in_child([&] { return run_reference(pr, headroom::ReferenceMethod::fast, opt.threads, opt.reps); });
    Measure slow;
    double naive_s = NAN;
    if (opt.naive) {
      const std::int64_t rows = std::min(opt.naive_rows, tq);
      Problem sub = pr;
      sub.p.shape.q_len = rows;
      sub.in.q.shape[2] = rows;
      sub.in.q.values.resize(static_cast<std::size_t>(rows * d));
      slow = in_child([&] { return run_reference(sub, headroom::ReferenceMethod::multiprecision, opt.threads, 1); });
      naive_s = slow.seconds * static_cast<double>(tq) / static_cast<double>(rows);
    }
    std::printf("%6lld %4lld | %10.4f %10.4f %12.3f | %10.2f %10.1f | %8.1f %8.1f %8.1f | %10.3g %5s %9lld\n",
                static_cast<long long>(t), static_cast<long long>(d), plain.seconds, fast.seconds, naive_s,
                fast.seconds / plain.seconds, naive_s / fast.seconds, plain.peak_mib, fast.peak_mib,
                opt.naive ? slow.peak_mib : NAN, fast.worst, fast.certified && (!opt.naive || slow.certified) ? "yes" : "NO",
                fast.escalated);
    std::fflush(stdout);
  }
}

}  // namespace bench
